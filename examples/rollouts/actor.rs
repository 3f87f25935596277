//! MLP Gaussian actors for make_rollouts: a ~ N(mu(s), diag sigma^2) with mu an MLP and a learned
//! state-independent log sigma. This is our own small forward and backward pass, written apart
//! from gradaudit's network module on purpose: the demo log's score columns come from here, so
//! gradaudit reproducing them from the weights file is a real cross-check.
//!
//! Layers x_l = f(W_l x_{l-1} + b_l), W_l stored [out, in] row-major, the last layer linear (mu).
//! Score, by the chain rule: g = d log pi / d mu = (a - mu) / sigma^2 and
//! d / d log sigma_i = (a_i - mu_i)^2 / sigma_i^2 - 1; going down, d/dW_l = delta_l x_{l-1}^T,
//! d/db_l = delta_l, delta_{l-1} = f'(z_{l-1}) * (W_l^T delta_l). Parameter order: for each
//! layer its weight (row-major) then its bias, then log sigma.

use ndarray::{Array2, Axis};
use rand::RngExt;
use rand_chacha::ChaCha8Rng;

#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Activation {
    Tanh,
    Elu,
}

impl Activation {
    pub fn name(self) -> &'static str {
        match self {
            Activation::Tanh => "tanh",
            Activation::Elu => "elu",
        }
    }
    fn f(self, z: f64) -> f64 {
        match self {
            Activation::Tanh => z.tanh(),
            Activation::Elu => {
                if z > 0.0 {
                    z
                } else {
                    z.exp_m1()
                }
            }
        }
    }
    /// f'(z) from z and y = f(z).
    fn df(self, z: f64, y: f64) -> f64 {
        match self {
            Activation::Tanh => 1.0 - y * y,
            Activation::Elu => {
                if z > 0.0 {
                    1.0
                } else {
                    y + 1.0
                }
            }
        }
    }
}

pub struct Layer {
    pub w: Vec<f64>,
    pub b: Vec<f64>,
    pub n_in: usize,
    pub n_out: usize,
}

pub struct Actor {
    pub layers: Vec<Layer>,
    pub activation: Activation,
    pub log_std: Vec<f64>,
}

/// Rounds to the nearest f32, so the weights file (F32, as trainers save it) holds them exactly.
fn f32_exact(x: f64) -> f64 {
    f64::from(x as f32)
}

impl Actor {
    /// Random weights, uniform in +-gain sqrt(6 / (in + out)) (Glorot and Bengio 2010; the
    /// output layer's range a tenth of that, as trainers shrink it so that the first actions
    /// stay near zero), biases uniform in +-0.1, rounded to f32.
    pub fn random(
        sizes: &[usize],
        activation: Activation,
        log_std: f64,
        gain: f64,
        rng: &mut ChaCha8Rng,
    ) -> Actor {
        let layers = sizes
            .windows(2)
            .enumerate()
            .map(|(l, w)| {
                let (n_in, n_out) = (w[0], w[1]);
                let last = if l + 2 == sizes.len() { 0.1 } else { 1.0 };
                let r = last * gain * (6.0 / (n_in + n_out) as f64).sqrt();
                Layer {
                    w: (0..n_in * n_out)
                        .map(|_| f32_exact(rng.random_range(-r..r)))
                        .collect(),
                    b: (0..n_out)
                        .map(|_| f32_exact(rng.random_range(-0.1..0.1)))
                        .collect(),
                    n_in,
                    n_out,
                }
            })
            .collect();
        let n_act = *sizes.last().expect("at least one layer");
        Actor {
            layers,
            activation,
            log_std: vec![f32_exact(log_std); n_act],
        }
    }

    pub fn dim(&self) -> usize {
        self.layers
            .iter()
            .map(|l| l.w.len() + l.b.len())
            .sum::<usize>()
            + self.log_std.len()
    }

    /// Layer inputs and pre-activations of one step: xs[0] = s, xs[l + 1] = output of layer l
    /// (the last one is mu); zs[l] = layer l's pre-activation.
    fn forward(&self, s: &[f64]) -> (Vec<Vec<f64>>, Vec<Vec<f64>>) {
        let mut xs = vec![s.to_vec()];
        let mut zs = Vec::new();
        let last = self.layers.len() - 1;
        for (l, layer) in self.layers.iter().enumerate() {
            let x = &xs[l];
            let z: Vec<f64> = (0..layer.n_out)
                .map(|o| {
                    layer.b[o]
                        + (0..layer.n_in)
                            .map(|i| layer.w[o * layer.n_in + i] * x[i])
                            .sum::<f64>()
                })
                .collect();
            let y = if l == last {
                z.clone()
            } else {
                z.iter().map(|&v| self.activation.f(v)).collect()
            };
            zs.push(z);
            xs.push(y);
        }
        (xs, zs)
    }

    pub fn mean(&self, s: &[f64]) -> Vec<f64> {
        self.forward(s).0.pop().expect("mu")
    }

    /// mu for T states at once (rows), for long benchmark logs.
    pub fn mean_batch(&self, s: &Array2<f64>) -> Array2<f64> {
        let mut x = s.clone();
        let last = self.layers.len() - 1;
        for (l, layer) in self.layers.iter().enumerate() {
            let w = Array2::from_shape_vec((layer.n_out, layer.n_in), layer.w.clone())
                .expect("out x in");
            let mut z = x.dot(&w.t());
            for mut row in z.axis_iter_mut(Axis(0)) {
                for (v, b) in row.iter_mut().zip(&layer.b) {
                    *v += b;
                }
            }
            if l != last {
                z.mapv_inplace(|v| self.activation.f(v));
            }
            x = z;
        }
        x
    }

    pub fn sigma(&self) -> Vec<f64> {
        self.log_std.iter().map(|l| l.exp()).collect()
    }

    /// log pi(a | s).
    pub fn log_density(&self, mu: &[f64], a: &[f64]) -> f64 {
        mu.iter()
            .zip(a)
            .zip(&self.log_std)
            .map(|((m, a), ls)| {
                let z = (a - m) / ls.exp();
                -0.5 * z * z - ls - 0.5 * (2.0 * std::f64::consts::PI).ln()
            })
            .sum()
    }

    /// The score vector grad_theta log pi(a | s), in the module header's parameter order.
    pub fn score(&self, s: &[f64], a: &[f64]) -> Vec<f64> {
        let (xs, zs) = self.forward(s);
        let mu = xs.last().expect("mu");
        let var: Vec<f64> = self.log_std.iter().map(|l| (2.0 * l).exp()).collect();
        let mut delta: Vec<f64> = (0..mu.len()).map(|i| (a[i] - mu[i]) / var[i]).collect();
        let mut parts: Vec<Vec<f64>> = Vec::new();
        for l in (0..self.layers.len()).rev() {
            let layer = &self.layers[l];
            let x = &xs[l];
            let mut g = Vec::with_capacity(layer.w.len() + layer.b.len());
            for d in &delta {
                g.extend(x.iter().map(|xi| d * xi));
            }
            g.extend_from_slice(&delta);
            parts.push(g);
            if l > 0 {
                delta = (0..layer.n_in)
                    .map(|i| {
                        let back: f64 = (0..layer.n_out)
                            .map(|o| layer.w[o * layer.n_in + i] * delta[o])
                            .sum();
                        back * self.activation.df(zs[l - 1][i], xs[l][i])
                    })
                    .collect();
            }
        }
        let mut out: Vec<f64> = parts.into_iter().rev().flatten().collect();
        out.extend((0..mu.len()).map(|i| (a[i] - mu[i]).powi(2) / var[i] - 1.0));
        out
    }

    /// The tensors as (name, shape, f32 values), named as the description lists them.
    pub fn tensors(&self) -> Vec<(String, Vec<usize>, Vec<f32>)> {
        let mut out = Vec::new();
        let last = self.layers.len() - 1;
        for (l, layer) in self.layers.iter().enumerate() {
            let name = if l == last {
                "mu".to_string()
            } else {
                format!("trunk.{l}")
            };
            let f = |v: &[f64]| v.iter().map(|&x| x as f32).collect::<Vec<f32>>();
            out.push((
                format!("{name}.weight"),
                vec![layer.n_out, layer.n_in],
                f(&layer.w),
            ));
            out.push((format!("{name}.bias"), vec![layer.n_out], f(&layer.b)));
        }
        out.push((
            "log_std".to_string(),
            vec![self.log_std.len()],
            self.log_std.iter().map(|&x| x as f32).collect(),
        ));
        out
    }

    /// Writes the tensors as a safetensors file (F32).
    pub fn write_safetensors(&self, path: &str) -> std::io::Result<()> {
        let tensors = self.tensors();
        let bytes: Vec<(String, Vec<usize>, Vec<u8>)> = tensors
            .into_iter()
            .map(|(n, s, v)| (n, s, v.iter().flat_map(|x| x.to_le_bytes()).collect()))
            .collect();
        let views: Vec<(String, safetensors::tensor::TensorView)> = bytes
            .iter()
            .map(|(n, s, b)| {
                (
                    n.clone(),
                    safetensors::tensor::TensorView::new(safetensors::Dtype::F32, s.clone(), b)
                        .expect("shape matches the data"),
                )
            })
            .collect();
        let data = safetensors::serialize(views, None).map_err(std::io::Error::other)?;
        std::fs::write(path, data)
    }
}
