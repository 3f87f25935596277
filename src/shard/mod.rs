//! Shard files: the mergeable state of a Poisson audit of part of a log ([`Partial`]), in a
//! safetensors container with JSON metadata, and their merge into the report of the whole.
//!
//! # Format `gradaudit.shard/2`
//! A safetensors file (8-byte little-endian header length, JSON header, raw little-endian
//! tensors). Its `__metadata__` strings:
//! - `format`: `gradaudit.shard/2`; `tool`: the writing gradaudit's version;
//! - `settings`: JSON of [`ShardSettings`]; shards merge only when these are equal;
//! - `input`: JSON `{file, rows, episodes, steps, terminated, truncated}` of this shard;
//! - `warnings`: JSON list of `{code, message, count, first}`;
//! - `episodes`: the episode count; `fingerprint`: 32 hex digits, SipHash-2-4 of the sorted
//!   episode id hashes (equal for shards of the same episodes, whatever their order);
//! - `critic_steps`: step count behind the recorded values' explained variance.
//!
//! Tensors: `sums_hi`, `sums_lo` (F64, rows x width, rows = 1 + B + 2S: the point row, the B
//! Poisson replicates, the 2S hash half splits; the sum is hi + lo), `weights` (F64, rows: each
//! row's sum of weights), `id_hashes` (U64, episodes x 2: each episode's 128-bit id hash as
//! high and low words, sorted, no repeats; two shards sharing a hash share an episode) and
//! `critic_g`, `critic_g2`, `critic_e`, `critic_e2` (F64: the exact sums of the returns G and
//! the residuals G - V and their squares, as `[flag, special, partials...]`, critic/exact.rs).
//!
//! Version 2 (against 1): the contribution rows carry the moment columns (q_k = |g_k|^2 and
//! r_k = |g_k - g_ref|^2 per per-episode estimator, contrib.rs) behind the noise scale's
//! interval, and the settings carry the bias test's level and multiplicity procedure. A
//! version-1 file is refused with a message to write the shards again.
//!
//! Merging adds the sums (resample/poisson.rs: replicate weights depend only on seed, replicate
//! and id, so the merged sums are those of one pass over the whole log), after checking that
//! every setting agrees and that no episode is in two shards.

use crate::audit::streamed::Partial;
use crate::audit::{AuditConfig, Layout, Prepared};
use crate::critic::ExplainedVariance;
use crate::error::{Error, Result};
use crate::report::{InputSummary, Skipped};
use crate::resample::poisson::{PoissonSums, siphash24};
use crate::warnings::Warnings;
use serde::{Deserialize, Serialize};

mod merge;
pub use merge::{MergeInput, merge, merged_report};

/// The format name written into every shard file.
pub const FORMAT: &str = "gradaudit.shard/2";

/// Everything that must agree between shards for their sums to add up to one audit.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ShardSettings {
    pub estimators: Vec<String>,
    pub reference: String,
    pub gamma: f64,
    pub resamples: usize,
    pub seed: u64,
    pub splits: usize,
    pub confidence: f64,
    pub target_snr: f64,
    /// The bias test's level and multiplicity procedure (`holm` or `bh`).
    pub bias_level: f64,
    pub multiplicity: String,
    pub score_dim: usize,
    /// Columns of a contribution row.
    pub width: usize,
    pub parameters: Vec<String>,
    pub scores_from: String,
    /// `(k, full_dim)` when the figures are rescaled from k projections (full_dim: computed by
    /// gradaudit from a policy of that many parameters; None: logged sketch columns).
    pub rescale: Option<(usize, Option<usize>)>,
    /// The log has a value column (its explained variance is reported).
    pub recorded_values: bool,
    /// Skipped estimators and why, as `[name, reason]`.
    pub skipped: Vec<(String, String)>,
}

impl ShardSettings {
    pub fn of(prep: &Prepared, cfg: &AuditConfig, recorded_values: bool) -> ShardSettings {
        let layout = prep.layout(cfg);
        ShardSettings {
            estimators: prep.plan.estimators.iter().map(|e| e.to_string()).collect(),
            reference: cfg.reference.to_string(),
            gamma: cfg.gamma,
            resamples: cfg.resamples,
            seed: cfg.seed,
            splits: cfg.splits,
            confidence: cfg.confidence,
            target_snr: cfg.target_snr,
            bias_level: cfg.bias_level,
            multiplicity: cfg.multiplicity.key().to_string(),
            score_dim: prep.plan.d,
            width: prep.plan.width(),
            parameters: prep.scores.names.clone(),
            scores_from: if prep.scores.policy.is_some() {
                "policy"
            } else {
                "columns"
            }
            .to_string(),
            rescale: layout.rescale.map(|(k, source)| match source {
                crate::sketch::Source::Logged => (k, None),
                crate::sketch::Source::Computed { full_dim } => (k, Some(full_dim)),
            }),
            recorded_values,
            skipped: prep
                .skipped
                .iter()
                .map(|s| (s.name.clone(), s.reason.clone()))
                .collect(),
        }
    }

    /// The settings' differences, one line each (`gamma: 0.99 vs 0.9`); empty when equal.
    pub fn differences(&self, other: &ShardSettings) -> Vec<String> {
        let (a, b) = (serde_json::to_value(self), serde_json::to_value(other));
        let (Ok(serde_json::Value::Object(a)), Ok(serde_json::Value::Object(b))) = (a, b) else {
            return vec!["the settings cannot be compared".to_string()];
        };
        let short = |v: &serde_json::Value| {
            let t = v.to_string();
            if t.chars().count() > 60 {
                format!("{}...", t.chars().take(57).collect::<String>())
            } else {
                t
            }
        };
        a.iter()
            .filter(|(k, v)| b.get(*k) != Some(*v))
            .map(|(k, v)| {
                let theirs = b.get(k).map_or("absent".to_string(), short);
                format!("{k}: {} vs {theirs}", short(v))
            })
            .collect()
    }
}

#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct WireWarning {
    code: String,
    message: String,
    count: u64,
    first: Option<String>,
}

/// A shard file's content.
#[derive(Debug, Clone)]
pub struct Shard {
    pub settings: ShardSettings,
    pub partial: Partial,
}

/// An order-free digest of a set of id hashes: SipHash-2-4 of the sorted hashes, twice.
pub fn fingerprint(sorted: &[u128]) -> String {
    let bytes: Vec<u8> = sorted.iter().flat_map(|h| h.to_le_bytes()).collect();
    let a = siphash24((0x7368_6172_6420_6669, 0x6e67_6572_7072_696e), &bytes);
    let b = siphash24((0x7420_6f66_2069_6473, 0x2020_2020_2020_2020), &bytes);
    format!("{a:016x}{b:016x}")
}

fn f64_bytes(x: &[f64]) -> Vec<u8> {
    x.iter().flat_map(|v| v.to_le_bytes()).collect()
}

/// The bytes of a shard file.
pub fn encode(shard: &Shard) -> Result<Vec<u8>> {
    use safetensors::{Dtype, tensor::TensorView};
    let p = &shard.partial;
    let input = p.input.counts();
    let warnings: Vec<WireWarning> = p
        .warnings
        .iter()
        .map(|w| WireWarning {
            code: w.code.to_string(),
            message: w.message.clone(),
            count: w.count,
            first: w.first.clone(),
        })
        .collect();
    let (steps, critic) = p.recorded.to_parts();
    let meta = std::collections::HashMap::from([
        ("format".to_string(), FORMAT.to_string()),
        (
            "tool".to_string(),
            format!("gradaudit {}", env!("CARGO_PKG_VERSION")),
        ),
        ("settings".to_string(), json(&shard.settings)),
        ("input".to_string(), json(&input)),
        ("warnings".to_string(), json(&warnings)),
        ("episodes".to_string(), p.hashes.len().to_string()),
        ("fingerprint".to_string(), fingerprint(&p.hashes)),
        ("critic_steps".to_string(), steps.to_string()),
    ]);
    let s = &p.sums;
    let (rows, width) = s.hi.dim();
    let hi = f64_bytes(&s.hi.iter().copied().collect::<Vec<_>>());
    let lo = f64_bytes(&s.lo.iter().copied().collect::<Vec<_>>());
    let weights = f64_bytes(&s.weight);
    let ids: Vec<u8> = p
        .hashes
        .iter()
        .flat_map(|h| [((h >> 64) as u64).to_le_bytes(), (*h as u64).to_le_bytes()])
        .flatten()
        .collect();
    let critic: Vec<Vec<u8>> = critic.iter().map(|c| f64_bytes(c)).collect();
    let mut tensors = vec![
        (
            "sums_hi",
            TensorView::new(Dtype::F64, vec![rows, width], &hi),
        ),
        (
            "sums_lo",
            TensorView::new(Dtype::F64, vec![rows, width], &lo),
        ),
        ("weights", TensorView::new(Dtype::F64, vec![rows], &weights)),
        (
            "id_hashes",
            TensorView::new(Dtype::U64, vec![p.hashes.len(), 2], &ids),
        ),
    ];
    for (name, c) in ["critic_g", "critic_g2", "critic_e", "critic_e2"]
        .into_iter()
        .zip(&critic)
    {
        tensors.push((name, TensorView::new(Dtype::F64, vec![c.len() / 8], c)));
    }
    let tensors: Vec<(&str, TensorView)> = tensors
        .into_iter()
        .map(|(n, t)| t.map(|t| (n, t)))
        .collect::<std::result::Result<_, _>>()
        .map_err(|e| Error::usage(format!("cannot lay out the shard file: {e}")))?;
    safetensors::serialize(tensors, Some(meta))
        .map_err(|e| Error::usage(format!("cannot write the shard file: {e}")))
}

/// JSON of the wire types (they hold only strings, counts and finite numbers).
fn json<T: Serialize>(v: &T) -> String {
    serde_json::to_string(v).expect("plain data serialises")
}

/// A shard file's metadata strings, parsed.
struct Header {
    settings: ShardSettings,
    /// The per-shard input counts.
    input: crate::report::LogCounts,
    warnings: Vec<WireWarning>,
    critic_steps: u64,
}

/// The error for a malformed part of the shard file `path`.
fn bad(path: &str, what: String) -> Error {
    Error::usage(format!("{path}: not a usable {FORMAT} file: {what}"))
}

/// Reads and checks the metadata of a shard file.
fn read_header(path: &str, bytes: &[u8]) -> Result<Header> {
    let bad = |what: String| bad(path, what);
    let (_, header) = safetensors::SafeTensors::read_metadata(bytes)
        .map_err(|e| bad(format!("not a safetensors container ({e})")))?;
    let meta = header.metadata().clone().unwrap_or_default();
    let field = |k: &str| {
        meta.get(k)
            .cloned()
            .ok_or_else(|| bad(format!("the metadata lacks `{k}`")))
    };
    let format = field("format")?;
    if format != FORMAT {
        let why = if format == "gradaudit.shard/1" {
            ": version 1 lacks the noise scale's moment columns and the bias test's settings"
        } else {
            ""
        };
        return Err(bad(format!(
            "its format is `{format}`; this gradaudit reads `{FORMAT}`{why} (write the shards \
             again with this version)"
        )));
    }
    let parse = |k: &str| -> Result<serde_json::Value> {
        serde_json::from_str(&field(k)?).map_err(|e| bad(format!("`{k}` is not JSON ({e})")))
    };
    Ok(Header {
        settings: serde_json::from_value(parse("settings")?)
            .map_err(|e| bad(format!("`settings`: {e}")))?,
        input: serde_json::from_value(parse("input")?).map_err(|e| bad(format!("`input`: {e}")))?,
        warnings: serde_json::from_value(parse("warnings")?)
            .map_err(|e| bad(format!("`warnings`: {e}")))?,
        critic_steps: field("critic_steps")?
            .parse()
            .map_err(|_| bad("`critic_steps` is not a count".into()))?,
    })
}

/// Reads a shard file; every malformed part is an error naming the file and the part.
pub fn decode(path: &str, bytes: &[u8]) -> Result<Shard> {
    use safetensors::{Dtype, SafeTensors};
    let Header {
        settings,
        input,
        warnings: wire,
        critic_steps: steps,
    } = read_header(path, bytes)?;
    let bad = |what: String| bad(path, what);
    let st = SafeTensors::deserialize(bytes).map_err(|e| bad(e.to_string()))?;
    let tensor = |name: &str, dtype: Dtype| -> Result<(Vec<usize>, &[u8])> {
        let t = st
            .tensor(name)
            .map_err(|_| bad(format!("the tensor `{name}` is missing")))?;
        if t.dtype() != dtype {
            return Err(bad(format!(
                "the tensor `{name}` is {:?}, not {dtype:?}",
                t.dtype()
            )));
        }
        Ok((t.shape().to_vec(), t.data()))
    };
    let floats = |b: &[u8]| -> Vec<f64> {
        b.chunks_exact(8)
            .map(|c| f64::from_le_bytes(c.try_into().expect("8 bytes")))
            .collect()
    };
    let rows = 1 + settings.resamples + 2 * settings.splits;
    let matrix = |name: &str| -> Result<ndarray::Array2<f64>> {
        let (shape, b) = tensor(name, Dtype::F64)?;
        if shape != [rows, settings.width] {
            return Err(bad(format!(
                "`{name}` has shape {shape:?}, the settings say [{rows}, {}]",
                settings.width
            )));
        }
        let m = ndarray::Array2::from_shape_vec((rows, settings.width), floats(b))
            .expect("shape checked");
        Ok(m)
    };
    let (hi, lo) = (matrix("sums_hi")?, matrix("sums_lo")?);
    let weight = floats(tensor("weights", Dtype::F64)?.1);
    let sums = PoissonSums::from_parts(
        settings.seed,
        (settings.resamples, settings.splits),
        hi,
        lo,
        weight,
    )
    .ok_or_else(|| bad("`weights` does not have one entry per row".into()))?;
    let hashes = read_hashes(tensor("id_hashes", Dtype::U64)?, input.episodes).map_err(&bad)?;
    let mut critic: [Vec<f64>; 4] = Default::default();
    for (c, name) in critic
        .iter_mut()
        .zip(["critic_g", "critic_g2", "critic_e", "critic_e2"])
    {
        *c = floats(tensor(name, Dtype::F64)?.1);
    }
    let recorded = ExplainedVariance::from_parts(steps, &critic)
        .ok_or_else(|| bad("the critic sums are malformed".into()))?;
    let partial = Partial {
        sums,
        hashes,
        input: InputSummary {
            score_dim: settings.score_dim,
            parameters: settings.parameters.clone(),
            scores_from: settings.scores_from.clone(),
            ..InputSummary::from_counts(input)
        },
        warnings: warnings_from(wire),
        recorded,
    };
    Ok(Shard { settings, partial })
}

/// The id hashes of a shard: `episodes` rows of (high, low) words, strictly increasing.
fn read_hashes(
    (shape, b): (Vec<usize>, &[u8]),
    episodes: u64,
) -> std::result::Result<Vec<u128>, String> {
    if shape.len() != 2 || shape[1] != 2 || shape[0] as u64 != episodes {
        return Err(format!(
            "`id_hashes` has shape {shape:?}, expected [{episodes}, 2]"
        ));
    }
    let words: Vec<u64> = b
        .chunks_exact(8)
        .map(|c| u64::from_le_bytes(c.try_into().expect("8 bytes")))
        .collect();
    let hashes: Vec<u128> = words
        .chunks_exact(2)
        .map(|w| (u128::from(w[0]) << 64) | u128::from(w[1]))
        .collect();
    if hashes.windows(2).any(|w| w[0] >= w[1]) {
        return Err("`id_hashes` is not sorted without repeats".into());
    }
    Ok(hashes)
}

/// Warnings read back: their codes are kept for the life of the run (a handful of short
/// strings), since a warning's code is a `&'static str` everywhere else.
fn warnings_from(wire: Vec<WireWarning>) -> Warnings {
    let mut out = Warnings::default();
    for w in wire {
        let code: &'static str = Box::leak(w.code.into_boxed_str());
        out.add_many(code, w.message, w.first, w.count);
    }
    out
}

/// The layout of a merged audit, from the shards' settings: the plan, the reference, the
/// skipped estimators and the rescaling; with the audit config the report states.
pub struct Rebuilt {
    pub plan: crate::contrib::Plan,
    pub reference: usize,
    pub skipped: Vec<Skipped>,
    pub rescale: Option<(usize, crate::sketch::Source)>,
    pub cfg: AuditConfig,
}

impl Rebuilt {
    pub fn of(s: &ShardSettings) -> Result<Rebuilt> {
        use crate::estimator::Estimator;
        let parse =
            |e: &str| Estimator::parse(e).map_err(|m| Error::usage(format!("shard settings: {m}")));
        let estimators = s
            .estimators
            .iter()
            .map(|e| parse(e))
            .collect::<Result<Vec<_>>>()?;
        let reference = parse(&s.reference)?;
        let k = estimators
            .iter()
            .position(|e| *e == reference)
            .ok_or_else(|| Error::usage("shard settings: the reference is not an estimator"))?;
        let multiplicity = match s.multiplicity.as_str() {
            "holm" => crate::stats::Multiplicity::Holm,
            "bh" => crate::stats::Multiplicity::Bh,
            other => {
                return Err(Error::usage(format!(
                    "shard settings: unknown multiplicity procedure `{other}` (holm or bh)"
                )));
            }
        };
        let plan = crate::contrib::Plan::new(estimators, s.gamma, s.score_dim).with_moments(k);
        if plan.width() != s.width {
            return Err(Error::usage(format!(
                "shard settings: {} summary columns, but this gradaudit lays out {} for those \
                 estimators (write the shards again with this version)",
                s.width,
                plan.width()
            )));
        }
        let cfg = AuditConfig {
            gamma: s.gamma,
            reference,
            resamples: s.resamples,
            seed: s.seed,
            confidence: s.confidence,
            target_snr: s.target_snr,
            splits: s.splits,
            bias_level: s.bias_level,
            multiplicity,
            resampling: crate::audit::Resampling::Poisson,
            ..AuditConfig::default()
        };
        Ok(Rebuilt {
            plan,
            reference: k,
            skipped: s
                .skipped
                .iter()
                .map(|(name, reason)| Skipped {
                    name: name.clone(),
                    reason: reason.clone(),
                })
                .collect(),
            rescale: s.rescale.map(|(k, full)| {
                let source = match full {
                    None => crate::sketch::Source::Logged,
                    Some(full_dim) => crate::sketch::Source::Computed { full_dim },
                };
                (k, source)
            }),
            cfg,
        })
    }

    pub fn layout(&self) -> Layout<'_> {
        Layout {
            plan: &self.plan,
            reference: self.reference,
            skipped: &self.skipped,
            rescale: self.rescale,
        }
    }
}

/// Audits `reader` into a shard (Poisson resampling whatever `cfg` says). A cross-fitted
/// critic and a value network are refused: their figures need the whole log.
pub fn write_shard(reader: crate::log::LogReader, cfg: &AuditConfig) -> Result<Shard> {
    if cfg.critic.is_some() || cfg.value_net.is_some() {
        return Err(Error::usage(
            "shard: --fit-value and --value-net are not available for shards (the critic's \
             quality needs the whole log); audit the whole log instead",
        ));
    }
    let cfg = AuditConfig {
        resampling: crate::audit::Resampling::Poisson,
        ..cfg.clone()
    };
    let recorded_values = reader.schema().has(crate::log::Role::Value);
    // The pass advises --value-net / --fit-value for truncated ends without a bootstrap
    // value; a shard cannot take them, so the advice is to audit the whole log with them.
    let advice = ["pass", "audit the whole log with"]
        .map(|how| crate::critic::net::no_bootstrap_hint(reader.schema(), how));
    let prep = crate::audit::prepare(&reader, &cfg)?;
    let mut partial = crate::audit::streamed::accumulate(reader, &prep, &cfg)?;
    let code = crate::critic::net::NO_BOOTSTRAP;
    partial.warnings.reword(code, &advice[0], &advice[1]);
    Ok(Shard {
        settings: ShardSettings::of(&prep, &cfg, recorded_values),
        partial,
    })
}

#[cfg(test)]
mod tests;
