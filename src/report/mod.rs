//! The report model: built once from the statistics, serialised as the public JSON wire format
//! (schema `gradaudit.audit/1`), and only formatted by the exporters beside this file.

pub mod columns;
pub mod csv;
pub mod gate;
pub mod inspect;
pub mod markdown;
pub mod svg;
pub mod sweep;
pub mod table;

use crate::stats::{EstimatorStats, Interval};
use crate::warnings::Warnings;
use serde::Serialize;

/// Output formats of `audit`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    Table,
    Json,
    Csv,
    Markdown,
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
}

/// An estimator that was not audited, and why.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Skipped {
    pub name: String,
    pub reason: String,
}

/// One estimator's line of the report. Optional figures are null where undefined, and `notes`
/// says why.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct EstimatorRow {
    pub name: String,
    pub reference: bool,
    pub gradient: Vec<f64>,
    pub gradient_norm: f64,
    pub gradient_norm_interval: Interval,
    pub variance: f64,
    pub bias_sq: f64,
    pub bias_sq_interval: Interval,
    pub bias_z: Option<f64>,
    pub bias_detected: bool,
    pub bias_norm_interval: Interval,
    pub mse: f64,
    pub snr: Option<f64>,
    pub ess: Option<f64>,
    pub cosine_half: Option<f64>,
    pub cosine_half_interval: Option<Interval>,
    pub episodes_for_snr: Option<u64>,
    pub bias_limited: bool,
    pub notes: Vec<String>,
}

impl EstimatorRow {
    pub fn new(name: String, reference: bool, s: EstimatorStats) -> EstimatorRow {
        let mut notes = s.notes;
        let figures = [s.gradient_norm, s.variance, s.bias_sq, s.mse];
        if figures.iter().chain(&s.gradient).any(|x| !x.is_finite()) {
            notes.push(
                "some figures overflowed the range of f64 and are shown as null; rescale the \
                 rewards"
                    .into(),
            );
        }
        EstimatorRow {
            name,
            reference,
            gradient: s.gradient,
            gradient_norm: s.gradient_norm,
            gradient_norm_interval: s.gradient_norm_interval,
            variance: s.variance,
            bias_sq: s.bias_sq,
            bias_sq_interval: s.bias_sq_interval,
            bias_z: s.bias_z.filter(|x| x.is_finite()),
            bias_detected: s.bias_detected,
            bias_norm_interval: s.bias_norm_interval,
            mse: s.mse,
            snr: s.snr.filter(|x| x.is_finite()),
            ess: s.ess.filter(|x| x.is_finite()),
            cosine_half: s.cosine_half,
            cosine_half_interval: s.cosine_half_interval,
            episodes_for_snr: s.episodes_for_snr,
            bias_limited: s.bias_limited,
            notes,
        }
    }
}

/// The one-line answer: which estimator has the lowest MSE and what limits it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Verdict {
    pub best: String,
    /// `bias` or `variance`: the larger part of the best estimator's MSE.
    pub dominated_by: &'static str,
    pub text: String,
}

impl Verdict {
    /// `rows` sorted by MSE, lowest first.
    pub fn from_rows(rows: &[EstimatorRow], signal: f64) -> Verdict {
        let best = &rows[0];
        let dominated_by = if best.bias_sq > best.variance {
            "bias"
        } else {
            "variance"
        };
        let share = if best.mse > 0.0 {
            100.0
                * if dominated_by == "bias" {
                    best.bias_sq
                } else {
                    best.variance
                }
                / best.mse
        } else {
            0.0
        };
        let mut text = format!(
            "lowest MSE: {} ({}-dominated, {share:.0}% of its MSE)",
            best.name, dominated_by
        );
        match (best.snr, signal > 0.0) {
            (Some(snr), _) => text.push_str(&format!(
                "; its SNR at this batch size is {}",
                table::num(snr)
            )),
            (None, false) => text.push_str(
                "; but the reference gradient is within its own noise, so no estimator's \
                 direction can be trusted at this batch size",
            ),
            _ => {}
        }
        Verdict {
            best: best.name.clone(),
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
    /// max(0, ||g_ref||^2 - V_ref), the squared norm of the reference gradient, noise removed.
    pub signal: f64,
    pub signal_interval: Interval,
    pub reference_variance: f64,
    /// Sorted by MSE, lowest first.
    pub estimators: Vec<EstimatorRow>,
    pub skipped: Vec<Skipped>,
    pub verdict: Verdict,
    pub warnings: Warnings,
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
    }
}

#[cfg(test)]
mod tests;
