//! The tensors an MLP description names: read from a safetensors file (F32, F64, BF16 or F16,
//! little-endian as the format fixes, converted to f64) or given inline in the description.
//! Each lookup checks the tensor's shape against what its place in the network needs, and
//! every error names the file and the tensor.

use super::network::Param;
use crate::error::{Error, Position, Result};
use ndarray::Array2;
use safetensors::{Dtype, SafeTensors};
use serde::Deserialize;
use std::collections::BTreeMap;

/// A tensor written inline: a list of numbers (1-D) or a list of rows (2-D, [out, in]).
#[derive(Debug, Clone, Deserialize)]
#[serde(untagged)]
pub enum Inline {
    Vector(Vec<f64>),
    Matrix(Vec<Vec<f64>>),
}

/// Where the description's tensor names are looked up.
pub struct Tensors {
    /// The description file, for inline tensors' messages.
    desc: String,
    /// The weights file as a path the user can open, and its bytes.
    file: Option<(String, Vec<u8>)>,
    inline: BTreeMap<String, Inline>,
}

/// What shape a tensor must have: `rows` x `cols` for a matrix (None = any), `len` for a vector.
#[derive(Debug, Clone, Copy)]
pub enum Want {
    Matrix { rows: Option<usize>, cols: usize },
    Vector(usize),
}

fn shown(shape: &[usize]) -> String {
    format!("{shape:?}")
}

impl Tensors {
    /// `weights` is relative to the description file `desc`.
    pub fn open(
        desc: &str,
        weights: Option<&str>,
        inline: BTreeMap<String, Inline>,
    ) -> Result<Self> {
        let file = match weights {
            None => None,
            Some(w) => {
                let base = std::path::Path::new(desc).parent();
                let path = match base {
                    Some(b) if !std::path::Path::new(w).is_absolute() => {
                        b.join(w).to_string_lossy().into_owned()
                    }
                    _ => w.to_string(),
                };
                let bytes = std::fs::read(&path).map_err(|e| {
                    Error::input_hint(
                        Position {
                            file: desc.to_string(),
                            ..Default::default()
                        },
                        format!("cannot read the weights file '{path}' it names: {e}"),
                        "\"weights\" is a path relative to the description file's folder",
                    )
                })?;
                if let Err(e) = SafeTensors::deserialize(&bytes) {
                    return Err(at(&path, format!("not a readable safetensors file: {e}")));
                }
                Some((path, bytes))
            }
        };
        Ok(Tensors {
            desc: desc.to_string(),
            file,
            inline,
        })
    }

    /// The tensor `name`, playing `role` (e.g. "the weight of layer 1"), checked against `want`.
    pub fn get(&self, name: &str, want: Want, role: &str) -> Result<Param> {
        let (where_, shape, data) = self.lookup(name, role)?;
        let ok = match (want, shape.as_slice()) {
            (Want::Matrix { rows, cols }, [r, c]) => *c == cols && rows.is_none_or(|w| w == *r),
            (Want::Vector(n), [m]) => *m == n,
            (Want::Vector(n), [1, m]) => *m == n,
            _ => false,
        };
        if !ok {
            let expected = match want {
                Want::Matrix {
                    rows: Some(r),
                    cols,
                } => format!("[{r}, {cols}] ([out, in])"),
                Want::Matrix { rows: None, cols } => format!("[out, {cols}] ([out, in])"),
                Want::Vector(n) => format!("[{n}]"),
            };
            // [in, out] is how JAX/Flax and Keras save a dense kernel.
            let transposed = match (want, shape.as_slice()) {
                (Want::Matrix { rows, cols }, [r, c]) => *r == cols && rows.is_none_or(|w| w == *c),
                _ => false,
            };
            return Err(at(
                &where_,
                format!(
                    "tensor '{name}' ({role}) has shape {}, expected {expected}{}",
                    shown(&shape),
                    if transposed {
                        "; it looks transposed ([in, out], as JAX/Flax and Keras save dense \
                         kernels): save its transpose"
                    } else {
                        ""
                    }
                ),
            ));
        }
        if let Some(k) = data.iter().position(|v| !v.is_finite()) {
            return Err(at(
                &where_,
                format!("tensor '{name}' holds a non-finite number at flat index {k}"),
            ));
        }
        let (r, c) = match want {
            Want::Matrix { .. } => (shape[0], shape[1]),
            Want::Vector(n) => (1, n),
        };
        Ok(Param {
            name: name.to_string(),
            value: Array2::from_shape_vec((r, c), data).expect("shape checked"),
            shape,
        })
    }

    /// The file it came from, its shape and its values (row-major) as f64.
    fn lookup(&self, name: &str, role: &str) -> Result<(String, Vec<usize>, Vec<f64>)> {
        let in_file = self.file.as_ref().and_then(|(path, bytes)| {
            let st = SafeTensors::deserialize(bytes).expect("checked when opened");
            st.tensor(name).ok().map(|v| (path, v))
        });
        match (self.inline.get(name), in_file) {
            (Some(_), Some((path, _))) => Err(at(
                &self.desc,
                format!("tensor '{name}' is given inline and also in '{path}'; name it once"),
            )),
            (Some(t), None) => inline_values(&self.desc, name, t),
            (None, Some((path, view))) => {
                let data = convert(view.dtype(), view.data()).ok_or_else(|| {
                    at(
                        path,
                        format!(
                            "tensor '{name}' has dtype {:?}; gradaudit reads F32, F64, BF16 and F16",
                            view.dtype()
                        ),
                    )
                })?;
                Ok((path.clone(), view.shape().to_vec(), data))
            }
            (None, None) => Err(self.missing(name, role)),
        }
    }

    fn missing(&self, name: &str, role: &str) -> Error {
        let mut names: Vec<String> = self.inline.keys().cloned().collect();
        if let Some((_, bytes)) = &self.file {
            let st = SafeTensors::deserialize(bytes).expect("checked when opened");
            names.extend(st.names().into_iter().map(String::from));
        }
        names.sort();
        let near = names
            .iter()
            .map(|n| (strsim::jaro_winkler(n, name), n))
            .filter(|(s, _)| *s > 0.8)
            .max_by(|a, b| a.0.total_cmp(&b.0))
            .map(|(_, n)| format!("; did you mean '{n}'?"))
            .unwrap_or_default();
        let file = self.file.as_ref().map_or(&self.desc, |f| &f.0);
        let held = if names.is_empty() {
            "no tensors".to_string()
        } else if names.len() <= 8 {
            names.join(", ")
        } else {
            format!("{}, ... ({} in all)", names[..8].join(", "), names.len())
        };
        at(
            file,
            format!("no tensor named '{name}' ({role}){near} (it holds: {held})"),
        )
    }
}

fn at(file: &str, message: String) -> Error {
    Error::input_hint(
        Position {
            file: file.to_string(),
            ..Default::default()
        },
        message,
        "see the README section 'Network policies' for the description and the weights",
    )
}

fn inline_values(desc: &str, name: &str, t: &Inline) -> Result<(String, Vec<usize>, Vec<f64>)> {
    match t {
        Inline::Vector(v) => Ok((desc.to_string(), vec![v.len()], v.clone())),
        Inline::Matrix(m) => {
            let cols = m.first().map_or(0, Vec::len);
            if let Some(i) = m.iter().position(|r| r.len() != cols) {
                return Err(at(
                    desc,
                    format!(
                        "inline tensor '{name}': row {i} has {} entries, row 0 has {cols}",
                        m[i].len()
                    ),
                ));
            }
            Ok((
                desc.to_string(),
                vec![m.len(), cols],
                m.iter().flatten().copied().collect(),
            ))
        }
    }
}

/// Little-endian floats of `dtype` as f64; None for a dtype that is not a float we read.
pub fn convert(dtype: Dtype, bytes: &[u8]) -> Option<Vec<f64>> {
    Some(match dtype {
        Dtype::F64 => bytes
            .chunks_exact(8)
            .map(|b| f64::from_le_bytes(b.try_into().expect("8 bytes")))
            .collect(),
        Dtype::F32 => bytes
            .chunks_exact(4)
            .map(|b| f64::from(f32::from_le_bytes(b.try_into().expect("4 bytes"))))
            .collect(),
        Dtype::BF16 => bytes
            .chunks_exact(2)
            .map(|b| half::bf16::from_le_bytes([b[0], b[1]]).to_f64())
            .collect(),
        Dtype::F16 => bytes
            .chunks_exact(2)
            .map(|b| half::f16::from_le_bytes([b[0], b[1]]).to_f64())
            .collect(),
        _ => return None,
    })
}
