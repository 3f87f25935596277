//! The report model: built once from the statistics, serialised as the public JSON wire format
//! (schema `gradaudit.audit/1`), and only formatted by the exporters beside this file.
//!
//! Every figure of the model is a finite number or None. A sum that overflowed f64 reaches the
//! statistics as inf or NaN, and clamps such as max(NaN, 0) = 0 can turn it into a plausible
//! finite value; so a row's figures are taken only when everything they derive from is finite:
//! its own gradient and spread (gradient, norm, variance), then the reference's (for bias_sq,
//! mse, ess), then the signal (for snr, episodes_for_snr). Otherwise they are None with a note.

pub mod columns;
pub mod crosscheck;
pub mod csv;
pub mod curves;
pub mod gate;
pub mod groups;
pub mod html;
pub mod inspect;
pub mod layout;
pub mod markdown;
pub mod significance;
pub mod svg;
pub mod sweep;
pub mod table;

use crate::stats::{EstimatorStats, Interval, Signal};
use crate::warnings::Warnings;
use serde::Serialize;

/// Output formats of `audit`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    Table,
    Json,
    Csv,
    Markdown,
    /// The terminal table with every column in one table (`--wide`).
    WideTable,
    /// One self-contained HTML page (report/html.rs).
    Html,
}

/// Identifies the program and the wire schema.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Tool {
    pub name: &'static str,
    pub version: &'static str,
    pub schema: &'static str,
}

impl Tool {
    pub fn current() -> Tool {
        Tool {
            name: "gradaudit",
            version: env!("CARGO_PKG_VERSION"),
            schema: "gradaudit.audit/1",
        }
    }

    /// The same envelope for a report with a wire schema of its own (inspect, sweep,
    /// crosscheck).
    pub fn with_schema(schema: &'static str) -> Tool {
        Tool {
            schema,
            ..Tool::current()
        }
    }
}

/// What a command read, counted: the fields every report's input opens with. The crosscheck
/// report and a shard file's header carry exactly these; the audit's [`InputSummary`] starts
/// with the same fields and converts to and from them.
#[derive(Debug, Clone, Default, PartialEq, Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LogCounts {
    pub file: String,
    pub rows: u64,
    pub episodes: u64,
    pub steps: u64,
    pub terminated: u64,
    pub truncated: u64,
}

#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct InputSummary {
    pub file: String,
    pub rows: u64,
    pub episodes: u64,
    pub steps: u64,
    pub terminated: u64,
    pub truncated: u64,
    pub score_dim: usize,
    /// Names of the gradient components: score column headers, or policy parameters such as
    /// `W[1,0]` and `log_sigma[1]`.
    pub parameters: Vec<String>,
    /// `columns` or `policy`.
    pub scores_from: String,
    /// Present when the score columns are random-projection sketches.
    pub sketch: Option<Sketch>,
    /// How well the recorded and the fitted critic explain the discounted returns.
    pub critic: crate::critic::CriticQuality,
    /// The value network behind V(s_t), with --value-net.
    pub value_net: Option<crate::critic::net::ValueNetSummary>,
    /// For a `merge`: the shard files added up, in the order given (empty for an audit). Named
    /// in the reports' titles, not in the JSON, which stays the audit's (a merge equals the
    /// Poisson audit of the whole log; `.input.file` lists the logs).
    #[serde(skip)]
    pub shards: Vec<MergedShard>,
}

/// One shard of a merged report: its file and the log it was written from.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct MergedShard {
    pub shard: String,
    pub log: String,
}

impl InputSummary {
    /// The counts of what was read.
    pub fn counts(&self) -> LogCounts {
        LogCounts {
            file: self.file.clone(),
            rows: self.rows,
            episodes: self.episodes,
            steps: self.steps,
            terminated: self.terminated,
            truncated: self.truncated,
        }
    }

    /// A summary holding only `counts` (the rest default).
    pub fn from_counts(c: LogCounts) -> InputSummary {
        InputSummary {
            file: c.file,
            rows: c.rows,
            episodes: c.episodes,
            steps: c.steps,
            terminated: c.terminated,
            truncated: c.truncated,
            ..InputSummary::default()
        }
    }
}

/// How the score columns were sketched, and what that means for the figures.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Sketch {
    pub k: usize,
    /// `logged` (the log's score columns are projections) or `computed` (gradaudit projected
    /// the policy network's scores, `--project`).
    pub source: String,
    /// The dimension that was projected, when gradaudit did the projecting.
    pub full_dim: Option<usize>,
    /// Standard error of the signal from the spread over the K projections.
    pub signal_se: Option<f64>,
    /// Each estimator's projection standard errors (see sketch.rs).
    pub precision: Vec<SketchPrecision>,
    pub note: String,
}

/// Standard errors, over the K projections, of one estimator's rescaled squared figures: the
/// precision of the projection itself (not of the data).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SketchPrecision {
    pub estimator: String,
    pub variance_se: Option<f64>,
    pub bias_sq_se: Option<f64>,
    pub mse_se: Option<f64>,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Settings {
    pub gamma: f64,
    pub resamples: usize,
    pub seed: u64,
    pub confidence: f64,
    pub target_snr: f64,
    pub reference: String,
    pub splits: usize,
    /// `multinomial` or `poisson` (the bootstrap scheme, `--resampling`).
    pub resampling: String,
}

/// An estimator that was not audited, and why.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Skipped {
    pub name: String,
    pub reason: String,
}

/// A figure as reported: None unless it is a finite number. A sum that overflowed f64 (values
/// near 1e308) or an undefined operation gives infinity or NaN, which no report shows.
pub fn finite(x: f64) -> Option<f64> {
    x.is_finite().then_some(x)
}

/// A CSV cell at full precision: empty where the figure is undefined or not finite.
pub fn finite_cell(x: Option<f64>) -> String {
    x.and_then(finite).map_or(String::new(), |v| format!("{v}"))
}

/// An interval as reported: None unless both ends are finite.
pub fn finite_interval(i: Interval) -> Option<Interval> {
    (i.low.is_finite() && i.high.is_finite()).then_some(i)
}

/// The reference's figures, which every estimator's bias, MSE and ratios are derived from.
/// When the reference's own sums overflowed, `defined` is false and everything derived from it
/// is undefined, whatever finite number a clamp such as max(NaN, 0) = 0 turned it into.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ReferenceFigures {
    pub defined: bool,
    pub signal: Option<f64>,
    pub signal_interval: Option<Interval>,
    pub variance: Option<f64>,
}

impl ReferenceFigures {
    pub fn of(reference: &EstimatorStats, signal: &Signal) -> ReferenceFigures {
        // signal = max(0, ||g_ref||^2 - V_ref): both terms must be finite for it to mean anything.
        let sq: f64 = reference.gradient.iter().map(|x| x * x).sum();
        let defined = sq.is_finite()
            && reference.variance.is_finite()
            && signal.reference_variance.is_finite();
        ReferenceFigures {
            defined,
            signal: defined.then_some(signal.signal).and_then(finite),
            signal_interval: defined
                .then_some(signal.signal_interval)
                .and_then(finite_interval),
            variance: defined.then_some(signal.reference_variance),
        }
    }
}

/// One estimator's line of the report. Optional figures are null where undefined (including
/// where a sum overflowed f64, and every figure derived from such a one), and `notes` says why.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct EstimatorRow {
    pub name: String,
    pub reference: bool,
    /// Null when a component overflowed f64.
    pub gradient: Option<Vec<f64>>,
    pub gradient_norm: Option<f64>,
    pub gradient_norm_interval: Option<Interval>,
    pub variance: Option<f64>,
    pub bias_sq: Option<f64>,
    pub bias_sq_interval: Option<Interval>,
    pub bias_z: Option<f64>,
    /// Bootstrap-null p-value of "no bias" (null for the reference).
    pub bias_p: Option<f64>,
    /// bias_p adjusted across the table (see `.significance`); bias_detected follows it.
    pub bias_p_adjusted: Option<f64>,
    pub bias_detected: bool,
    pub bias_norm_interval: Option<Interval>,
    pub mse: Option<f64>,
    pub snr: Option<f64>,
    pub ess: Option<f64>,
    pub cosine_half: Option<f64>,
    pub cosine_half_interval: Option<Interval>,
    pub episodes_for_snr: Option<u64>,
    pub bias_limited: bool,
    /// Gradient noise scale B_simple = N variance / signal, in episodes.
    pub noise_scale: Option<f64>,
    /// The interval of mse (stats/mse.rs), when the run asked for it (a gate with an mse, snr
    /// or ess rule); absent from JSON otherwise.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub mse_interval: Option<Interval>,
    /// The high end of bias_sq's interval of the same method (stats/mse.rs), asked for with
    /// mse_interval; the gate uses the larger of it and bias_sq_interval's high end.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bias_sq_upper: Option<f64>,
    pub notes: Vec<String>,
}

/// Notes of the statistics that an overflow makes wrong ("zero error", "zero signal", ...):
/// they are replaced by the overflow note.
fn superseded(note: &str, own: bool, bias: bool, signal: bool) -> bool {
    let starts = |p: &str| note.starts_with(p);
    (!own && starts("cosine_half"))
        || (!bias && (starts("snr") || starts("episodes_for_snr") || starts("bias-limited")))
        || (!signal && (starts("snr undefined") || starts("episodes_for_snr")))
}

/// Why figures are undefined after an overflow: the estimator's own figures, the reference's,
/// or their difference (in that order of precedence); None when nothing overflowed.
fn overflow_note(own: bool, reference: bool, bias: bool) -> Option<&'static str> {
    if !own {
        Some(
            "every figure undefined: this estimator's gradient or its resampling spread \
             overflowed the range of f64 (about 1.8e308); rescale the rewards or the scores",
        )
    } else if !reference {
        Some(
            "bias_sq, mse, snr, ess and episodes_for_snr undefined: the reference's gradient \
             or its resampling spread overflowed the range of f64; rescale the rewards or the \
             scores",
        )
    } else if !bias {
        Some(
            "bias_sq, mse, snr, ess and episodes_for_snr undefined: the difference from the \
             reference overflowed the range of f64; rescale the rewards or the scores",
        )
    } else {
        None
    }
}

impl EstimatorRow {
    /// The row of estimator `s`; `r` is the reference's figures (see [`ReferenceFigures`]).
    pub fn new(name: String, reference: bool, s: EstimatorStats, r: &ReferenceFigures) -> Self {
        // Its own figures: the gradient and its resampling spread.
        let own = s.gradient.iter().all(|x| x.is_finite())
            && s.gradient_norm.is_finite()
            && s.variance.is_finite()
            && finite_interval(s.gradient_norm_interval).is_some();
        // The bias needs its own figures, the reference's and a finite paired difference.
        let bias = own
            && r.defined
            && s.bias_sq.is_finite()
            && s.mse.is_finite()
            && finite_interval(s.bias_sq_interval).is_some()
            && finite_interval(s.bias_norm_interval).is_some();
        let signal = bias && r.signal.is_some();
        let mut notes: Vec<String> = s
            .notes
            .into_iter()
            .filter(|n| !superseded(n, own, bias, signal))
            .collect();
        notes.extend(overflow_note(own, r.defined, bias).map(String::from));
        // N V / (signal / target - bias^2) beyond u64 saturates to u64::MAX in the statistics:
        // an overflow too, not a batch size.
        let planned = s.episodes_for_snr.filter(|_| signal);
        let episodes_for_snr = planned.filter(|n| *n < u64::MAX);
        if planned.is_some() && episodes_for_snr.is_none() {
            notes.push(
                "episodes_for_snr undefined: the batch size it plans for is beyond 1.8e19 \
                 episodes (the signal is tiny next to the variance)"
                    .into(),
            );
        }
        let when = |ok: bool, x: f64| ok.then_some(x).and_then(finite);
        EstimatorRow {
            name,
            reference,
            gradient: own.then_some(s.gradient),
            gradient_norm: when(own, s.gradient_norm),
            gradient_norm_interval: own.then_some(s.gradient_norm_interval),
            variance: when(own, s.variance),
            bias_sq: when(bias, s.bias_sq),
            bias_sq_interval: bias.then_some(s.bias_sq_interval),
            bias_z: s.bias_z.filter(|x| bias && x.is_finite()),
            bias_p: s.bias_p.filter(|_| bias),
            bias_p_adjusted: s.bias_p_adjusted.filter(|_| bias),
            bias_detected: bias && s.bias_detected,
            bias_norm_interval: bias.then_some(s.bias_norm_interval),
            mse: when(bias, s.mse),
            snr: s.snr.filter(|x| signal && x.is_finite()),
            ess: s
                .ess
                .filter(|x| bias && r.variance.is_some() && x.is_finite()),
            cosine_half: s.cosine_half.filter(|x| own && x.is_finite()),
            cosine_half_interval: s
                .cosine_half_interval
                .filter(|_| own)
                .and_then(finite_interval),
            episodes_for_snr,
            bias_limited: signal && s.bias_limited,
            noise_scale: s.noise_scale.filter(|x| signal && x.is_finite()),
            mse_interval: None,
            bias_sq_upper: None,
            notes,
        }
    }
}

/// Orders rows by MSE, lowest first; rows whose MSE is undefined go last; ties by name.
pub fn sort_rows(rows: &mut [EstimatorRow]) {
    rows.sort_by(|a, b| {
        let key = |r: &EstimatorRow| (r.mse.is_none(), r.mse.unwrap_or(0.0));
        let (ka, kb) = (key(a), key(b));
        ka.0.cmp(&kb.0)
            .then(ka.1.total_cmp(&kb.1))
            .then_with(|| a.name.cmp(&b.name))
    });
}

/// The one-line answer: which estimator has the lowest MSE and what limits it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Verdict {
    /// Null when no estimator has a defined MSE.
    pub best: Option<String>,
    /// `bias` or `variance`: the larger part of the best estimator's MSE; null when the best
    /// MSE is zero or undefined.
    pub dominated_by: Option<&'static str>,
    pub text: String,
}

impl Verdict {
    /// `rows` sorted by [`sort_rows`]; `signal` is the report's.
    pub fn from_rows(rows: &[EstimatorRow], signal: Option<f64>) -> Verdict {
        let best = rows.first().and_then(|b| {
            let (mse, bias_sq, variance) = (b.mse?, b.bias_sq?, b.variance?);
            Some((b, mse, bias_sq, variance))
        });
        let Some((best, mse, bias_sq, variance)) = best else {
            return Verdict {
                best: None,
                dominated_by: None,
                text: "no estimator has a defined MSE: the log's sums overflowed the range of \
                       f64 (see the notes); rescale the rewards or the scores"
                    .into(),
            };
        };
        let (dominated_by, mut text) = if mse > 0.0 {
            let (part, share) = if bias_sq > variance {
                ("bias", bias_sq / mse)
            } else {
                ("variance", variance / mse)
            };
            let pct = 100.0 * share;
            let text = format!(
                "lowest MSE: {} ({part}-dominated, {pct:.0}% of its MSE)",
                best.name
            );
            (Some(part), text)
        } else {
            let text = format!(
                "lowest MSE: {} (MSE 0: its gradient equals the reference's in every resample)",
                best.name
            );
            (None, text)
        };
        match (best.snr, signal) {
            (Some(snr), _) => text.push_str(&format!(
                "; its SNR at this batch size is {}",
                table::num(snr)
            )),
            (None, Some(s)) if s <= 0.0 => text.push_str(
                "; but the reference gradient is within its own noise, so no estimator's \
                 direction can be trusted at this batch size",
            ),
            (None, None) => text.push_str(
                "; the reference's signal is undefined (its sums overflowed), so no SNR can be \
                 given",
            ),
            _ => {}
        }
        Verdict {
            best: Some(best.name.clone()),
            dominated_by,
            text,
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AuditReport {
    pub tool: Tool,
    pub input: InputSummary,
    pub settings: Settings,
    /// max(0, ||g_ref||^2 - V_ref), the squared norm of the reference gradient, noise removed;
    /// null when the reference's figures overflowed.
    pub signal: Option<f64>,
    pub signal_interval: Option<Interval>,
    pub reference_variance: Option<f64>,
    /// Sorted by MSE, lowest first.
    pub estimators: Vec<EstimatorRow>,
    pub skipped: Vec<Skipped>,
    pub verdict: Verdict,
    pub warnings: Warnings,
    /// How the bias decisions were made.
    pub significance: significance::Significance,
    /// B_simple of the reference and of the verdict's estimator.
    pub noise_scale: Vec<significance::NoiseScale>,
    /// The user's baseline against the minimum-variance one, when both were audited.
    pub baseline_gap: Option<significance::BaselineGap>,
}

/// Renders a report in the chosen format.
pub fn render(report: &AuditReport, format: Format) -> String {
    match format {
        Format::Table => table::render(report),
        Format::Json => {
            let mut s = serde_json::to_string_pretty(report).expect("report serialises");
            s.push('\n');
            s
        }
        Format::Csv => csv::render(report),
        Format::Markdown => markdown::render(report),
        Format::WideTable => table::render_with(report, true),
        Format::Html => html::audit(report),
    }
}

#[cfg(test)]
mod tests;
