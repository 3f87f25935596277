//! The report's significance figures: how the bias decisions were made (the test, the
//! multiplicity procedure and its level), the gradient noise scale of the reference and the
//! chosen estimator, and how much variance the user's baseline leaves against the
//! minimum-variance one; with the lines the table and Markdown formats print for them.

use super::AuditReport;
use super::table::num;
use crate::stats::Multiplicity;
use crate::stats::noise::ScaleInterval;
use serde::Serialize;

/// How `bias_detected` (and the table's `?`, and "bias-limited") was decided.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Significance {
    /// `bootstrap_centred_paired`: the null distribution of ||g_k - g_ref||^2 is that of the
    /// centred paired-difference replicates (stats/bias_test.rs).
    pub null: &'static str,
    /// `holm` (family-wise error rate) or `bh` (Benjamini-Hochberg false-discovery rate).
    pub multiplicity: Multiplicity,
    pub controls: &'static str,
    /// Detected when the adjusted p-value is at most this.
    pub level: f64,
    /// Estimators tested (every audited one but the reference, with a defined p-value).
    pub tested: usize,
    /// Distinct tests among them, the m of the adjustment: one estimator under several names
    /// (gae:0 = nstep:1 = td) is one test.
    pub distinct_tests: usize,
    pub detected: usize,
}

/// The gradient noise scale B_simple = tr(Sigma) / |G|^2 of one estimator (stats/noise.rs).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct NoiseScale {
    pub estimator: String,
    /// Why it is listed: `reference` or `chosen` (the verdict's lowest-MSE estimator).
    pub role: &'static str,
    pub episodes: Option<f64>,
    pub episodes_interval: Option<ScaleInterval>,
    /// episodes times the mean episode length (taken as fixed).
    pub steps: Option<f64>,
    pub steps_interval: Option<ScaleInterval>,
    pub note: Option<String>,
}

/// The user's baseline against the minimum-variance one of the same log.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BaselineGap {
    pub baseline: String,
    pub optimal: String,
    pub baseline_variance: f64,
    pub optimal_variance: f64,
    /// baseline_variance / optimal_variance.
    pub ratio: f64,
}

/// ", N distinct tests" when some estimators are one under several names.
pub fn distinct_text(s: &Significance) -> String {
    if s.distinct_tests < s.tested {
        format!(" ({} distinct tests)", s.distinct_tests)
    } else {
        String::new()
    }
}

/// The lines under the table: the test and its control, the '?' legend, the noise scale and
/// the baseline comparison.
pub fn lines(r: &AuditReport) -> Vec<String> {
    let mut out = Vec::new();
    let s = &r.significance;
    out.push(format!(
        "bias test: bootstrap null (centred paired resamples), {} controlled at {} over {} \
         estimators{}; {} detected",
        s.controls,
        s.level,
        s.tested,
        distinct_text(s),
        s.detected
    ));
    // One entry per group of identical estimators, as the table shows them.
    let unsure: Vec<String> = super::groups::groups(r)
        .iter()
        .filter(|g| {
            let e = g.first();
            e.bias_sq.is_some_and(|b| b > 0.0) && !e.bias_detected
        })
        .map(|g| {
            format!(
                "{} {}",
                g.names(),
                g.first().bias_p_adjusted.map_or("-".into(), p_text)
            )
        })
        .collect();
    if !unsure.is_empty() {
        out.push(format!(
            "?: bias^2 within resampling noise ({}-adjusted p > {}), it may be zero; adjusted p: \
             {}",
            s.multiplicity.key(),
            s.level,
            unsure.join(", ")
        ));
    }
    for ns in &r.noise_scale {
        out.push(noise_line(ns));
    }
    if let Some(g) = &r.baseline_gap {
        out.push(gap_line(g));
    }
    out
}

/// A p-value in two decimals, or in scientific notation below 0.01.
pub fn p_text(p: f64) -> String {
    if p >= 0.01 {
        format!("{p:.2}")
    } else {
        format!("{p:.1e}")
    }
}

fn interval_text(iv: Option<ScaleInterval>) -> String {
    match iv {
        Some(ScaleInterval { low, high }) => format!(
            "[{}, {}]",
            num(low),
            high.map_or("unbounded".to_string(), num)
        ),
        None => "[interval n/a]".into(),
    }
}

fn noise_line(ns: &NoiseScale) -> String {
    let mut line = match (ns.episodes, ns.steps) {
        (Some(e), Some(st)) => format!(
            "noise scale ({} {}): B_simple {} episodes {}, {} steps {}",
            ns.role,
            ns.estimator,
            num(e),
            interval_text(ns.episodes_interval),
            num(st),
            interval_text(ns.steps_interval)
        ),
        _ => format!("noise scale ({} {}): undefined", ns.role, ns.estimator),
    };
    if let Some(n) = &ns.note {
        line.push_str(&format!(" ({n})"));
    }
    line
}

/// A share as a percentage: whole percents, one decimal below 1% (so 0.4% is not "0%").
fn percent(x: f64) -> String {
    let p = 100.0 * x;
    if p < 1.0 {
        format!("{p:.1}%")
    } else {
        format!("{p:.0}%")
    }
}

fn gap_line(g: &BaselineGap) -> String {
    // value_baseline and mean_baseline are reward-to-go forms; minvar_total is the optimum of
    // the total-return form only, so that comparison is across forms and says so.
    let across = g.optimal == "minvar_total";
    let optimal = if across {
        format!("{}, the optimum of the total-return form", g.optimal)
    } else {
        format!("the minimum-variance {}", g.optimal)
    };
    let figures = format!(
        "({} vs {})",
        num(g.baseline_variance),
        num(g.optimal_variance)
    );
    let line = if g.ratio > 1.0 {
        format!(
            "baseline: {} (reward-to-go) leaves {} more variance {figures} than {optimal}",
            g.baseline,
            percent(g.ratio - 1.0),
        )
    } else {
        // A critic's state-dependent baseline can beat any baseline of time alone.
        format!(
            "baseline: {} (reward-to-go) has {} less variance {figures} than {optimal}{}",
            g.baseline,
            percent(1.0 - g.ratio),
            if across {
                ""
            } else {
                ": it uses more than the batch's time and score statistics (a critic's state values)"
            }
        )
    };
    let hint = if across {
        "; for the same form's optimum add --estimators ...,minvar_rtg"
    } else {
        ""
    };
    format!("{line}{hint}")
}
