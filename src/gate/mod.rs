//! The gate: rules on an audit's statistics and on its regression against a baseline report,
//! evaluated into pass/fail outcomes with the measured value, the bound and the margin. The
//! gate only reads the report model; it never recomputes statistics.

pub mod baseline;
pub mod rules;

use crate::report::{AuditReport, EstimatorRow};
pub use baseline::{Baseline, Regression, RegressionOutcome};
pub use rules::{At, Bound, Rule, RuleSet};
use serde::Serialize;

/// A statistic a rule can bound.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Stat {
    Snr,
    Ess,
    /// sqrt(bias_sq / signal): the bias as a fraction of the true gradient's length.
    RelativeBias,
    /// variance / signal: the noise of one update relative to the squared gradient.
    RelativeVariance,
    CosineHalf,
    EpisodesForSnr,
    Variance,
    BiasSq,
    Mse,
}

impl Stat {
    pub const ALL: [Stat; 9] = [
        Stat::Snr,
        Stat::Ess,
        Stat::RelativeBias,
        Stat::RelativeVariance,
        Stat::CosineHalf,
        Stat::EpisodesForSnr,
        Stat::Variance,
        Stat::BiasSq,
        Stat::Mse,
    ];

    pub fn key(self) -> &'static str {
        match self {
            Stat::Snr => "snr",
            Stat::Ess => "ess",
            Stat::RelativeBias => "relative_bias",
            Stat::RelativeVariance => "relative_variance",
            Stat::CosineHalf => "cosine_half",
            Stat::EpisodesForSnr => "episodes_for_snr",
            Stat::Variance => "variance",
            Stat::BiasSq => "bias_sq",
            Stat::Mse => "mse",
        }
    }

    pub fn parse(text: &str) -> Result<Stat, String> {
        Stat::ALL
            .into_iter()
            .find(|s| s.key() == text)
            .ok_or_else(|| {
                let keys: Vec<_> = Stat::ALL.iter().map(|s| s.key()).collect();
                format!("unknown statistic '{text}'; known: {}", keys.join(", "))
            })
    }

    /// Whether a larger value is better (snr, ess, cosine_half) or worse (the rest).
    pub fn higher_is_better(self) -> bool {
        matches!(self, Stat::Snr | Stat::Ess | Stat::CosineHalf)
    }
}

/// A statistic's value, or why it has none.
pub type Measured = Result<f64, String>;

/// The point figures of one estimator that statistics are read from (of this run or of a
/// baseline report). None where undefined, including where a sum overflowed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Figures {
    pub variance: Option<f64>,
    pub bias_sq: Option<f64>,
    pub mse: Option<f64>,
    pub snr: Option<f64>,
    pub ess: Option<f64>,
    pub cosine_half: Option<f64>,
    pub episodes_for_snr: Option<u64>,
    pub signal: Option<f64>,
}

impl Figures {
    pub fn of(report: &AuditReport, row: &EstimatorRow) -> Figures {
        Figures {
            variance: row.variance,
            bias_sq: row.bias_sq,
            mse: row.mse,
            snr: row.snr,
            ess: row.ess,
            cosine_half: row.cosine_half,
            episodes_for_snr: row.episodes_for_snr,
            signal: report.signal,
        }
    }

    /// The statistic's point value, None where undefined. A value that is not a finite number
    /// (from a report made elsewhere) counts as undefined: it satisfies no bound.
    pub fn stat(&self, stat: Stat) -> Option<f64> {
        let signal = self.signal.filter(|s| *s > 0.0);
        let value = match stat {
            Stat::Snr => self.snr,
            Stat::Ess => self.ess,
            Stat::CosineHalf => self.cosine_half,
            Stat::EpisodesForSnr => self.episodes_for_snr.map(|n| n as f64),
            Stat::RelativeBias => signal.zip(self.bias_sq).map(|(s, b)| (b / s).sqrt()),
            Stat::RelativeVariance => signal.zip(self.variance).map(|(s, v)| v / s),
            Stat::Variance => self.variance,
            Stat::BiasSq => self.bias_sq,
            Stat::Mse => self.mse,
        };
        value.filter(|x| x.is_finite())
    }
}

/// The point estimate of `stat` for one estimator of a report, or why it is undefined.
pub fn point(report: &AuditReport, row: &EstimatorRow, stat: Stat) -> Measured {
    Figures::of(report, row).stat(stat).ok_or_else(|| {
        let why = match stat {
            Stat::RelativeBias | Stat::RelativeVariance if report.signal.is_none() => {
                "the signal is undefined (the reference's sums overflowed)".to_string()
            }
            Stat::RelativeBias | Stat::RelativeVariance if row.bias_sq.is_some() => {
                "zero signal".to_string()
            }
            Stat::CosineHalf if row.variance.is_some() => {
                "the half-batch gradients are zero".to_string()
            }
            _ => note_or(row, "see the audit notes"),
        };
        format!("{} is undefined: {why}", stat.key())
    })
}

fn note_or(row: &EstimatorRow, fallback: &str) -> String {
    row.notes
        .first()
        .cloned()
        .unwrap_or_else(|| fallback.to_string())
}

/// The figures the pessimistic ends are computed from: the signal's lower bound, bias_sq's
/// upper bound, the variance and the reference variance, or why one is undefined.
fn interval_inputs(report: &AuditReport, row: &EstimatorRow) -> Result<[f64; 4], String> {
    let s_lo = report.signal_interval.map(|i| i.low);
    let b_hi = row.bias_sq_interval.map(|i| i.high);
    match (s_lo, b_hi, row.variance, report.reference_variance) {
        (Some(s), Some(b), Some(v), Some(r)) => Ok([s, b, v, r]),
        _ => Err(note_or(row, "a figure it derives from is undefined")),
    }
}

/// The pessimistic end of `stat`'s bootstrap interval for one estimator: the low end for a
/// statistic where higher is better, the high end otherwise. Derived statistics combine the
/// interval ends of signal and bias_sq in the direction that makes them worst.
pub fn pessimistic(report: &AuditReport, row: &EstimatorRow, stat: Stat) -> Measured {
    let undefined = |why: &str| {
        Err(format!(
            "{} at its interval end is undefined: {why}",
            stat.key()
        ))
    };
    let [s_lo, b_hi, v, v_ref] = match interval_inputs(report, row) {
        Ok(x) => x,
        Err(why) => return undefined(&why),
    };
    let n = report.input.episodes as f64;
    // The larger of two upper bounds of mse, each at the end's level: bias_sq's upper end plus
    // the point variance, and the high end of mse's own interval where the audit formed it
    // (stats/mse.rs; it allows for the variance's error too). The larger is exceeded no more
    // often than either: the first under-covers with a strong signal and heavy tails, the
    // second near the optimum where bias_sq sits at its clamp (README, "Coverage").
    let mse_hi = row.mse_interval.map_or(b_hi + v, |i| i.high.max(b_hi + v));
    let value = match stat {
        Stat::Snr if s_lo > 0.0 => s_lo / mse_hi,
        Stat::Snr => return undefined("the signal's lower bound is 0"),
        Stat::Ess if mse_hi > 0.0 => n * v_ref / mse_hi,
        Stat::Ess => return undefined("bias_sq's upper bound and the variance are both 0"),
        Stat::RelativeBias | Stat::RelativeVariance if s_lo <= 0.0 => {
            return undefined("the signal's lower bound is 0");
        }
        Stat::RelativeBias => (b_hi / s_lo).sqrt(),
        Stat::RelativeVariance => v / s_lo,
        Stat::CosineHalf => match row.cosine_half_interval {
            Some(i) => i.low,
            None => return undefined("the half-batch gradients are zero"),
        },
        Stat::EpisodesForSnr => {
            let room = s_lo / report.settings.target_snr - b_hi;
            if room > 0.0 {
                (n * v / room).ceil().max(1.0)
            } else {
                return undefined("at the interval ends the bias alone keeps snr below the target");
            }
        }
        Stat::BiasSq => b_hi,
        Stat::Variance => v,
        Stat::Mse => mse_hi,
    };
    if value.is_finite() {
        Ok(value)
    } else {
        undefined("it overflowed the range of f64")
    }
}

/// One rule applied to one estimator.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Outcome {
    pub estimator: String,
    /// e.g. `snr >= 2 (interval)`.
    pub rule: String,
    pub stat: Stat,
    pub bound: Bound,
    pub at: At,
    pub measured: Option<f64>,
    /// Positive when the rule holds: measured - min, or max - measured.
    pub margin: Option<f64>,
    pub passed: bool,
    /// Why a statistic is undefined, and whether that was allowed.
    pub detail: Option<String>,
}

/// Applies every rule to the estimators it names; unknown estimators are the caller's check.
pub fn evaluate(report: &AuditReport, rules: &[Rule]) -> Vec<Outcome> {
    let mut out = Vec::new();
    for rule in rules {
        let rows: Vec<&EstimatorRow> = match rule.estimator.as_str() {
            "*" => {
                let mut all: Vec<&EstimatorRow> = report.estimators.iter().collect();
                all.sort_by(|a, b| a.name.cmp(&b.name));
                all
            }
            name => report
                .estimators
                .iter()
                .filter(|e| e.name == name)
                .collect(),
        };
        for row in rows {
            // The reference has no bias against itself: a bias rule on it holds trivially and
            // is skipped under `*`, where it would only add noise to the report.
            if rule.estimator == "*" && row.reference && rule.stat == Stat::RelativeBias {
                continue;
            }
            let measured = match rule.at {
                At::Point => point(report, row, rule.stat),
                At::Interval => pessimistic(report, row, rule.stat),
            };
            let (measured, margin, passed, detail) = match measured {
                Ok(x) => {
                    // Decided by comparing with the bound, not by the margin's sign: the
                    // margin of two figures near 1e308 can overflow (and is then null).
                    let passed = match rule.bound {
                        Bound::Min(m) => x >= m,
                        Bound::Max(m) => x <= m,
                    };
                    let margin = crate::report::finite(rule.bound.margin(x));
                    (Some(x), margin, passed, None)
                }
                Err(why) if rule.allow_undefined => {
                    (None, None, true, Some(format!("{why} (allowed)")))
                }
                Err(why) => (None, None, false, Some(why)),
            };
            out.push(Outcome {
                estimator: row.name.clone(),
                rule: rule.describe(),
                stat: rule.stat,
                bound: rule.bound,
                at: rule.at,
                measured,
                margin,
                passed,
                detail,
            });
        }
    }
    out
}

/// Adds the estimators that rules name to the audit's list, so a rule on, say, `gae:0.8` is
/// checked even though the default set lacks it.
/// Also asks for the mse intervals (stats/mse.rs) when a rule reads mse, snr or ess at its
/// interval end.
pub fn include_named(cfg: &mut crate::audit::AuditConfig, rules: &RuleSet) {
    cfg.mse_intervals |= rules.rules.iter().any(|r| {
        r.at == rules::At::Interval && matches!(r.stat, Stat::Mse | Stat::Snr | Stat::Ess)
    });
    let named = rules.named_estimators();
    if named.is_empty() {
        return;
    }
    let list = cfg
        .estimators
        .get_or_insert_with(crate::estimator::Estimator::default_set);
    for e in named {
        if !list.contains(&e) {
            list.push(e);
        }
    }
}

/// Checks rules (and regressions against `baseline`) on a finished audit.
pub fn run(
    audit: AuditReport,
    rules: &RuleSet,
    baseline: Option<&Baseline>,
) -> crate::Result<GateReport> {
    for name in rules.named_estimators().iter().map(|e| e.to_string()) {
        if !audit.estimators.iter().any(|e| e.name == name) {
            let why = audit
                .skipped
                .iter()
                .find(|s| s.name == name)
                .map_or("it was not audited".to_string(), |s| s.reason.clone());
            return Err(crate::Error::usage(format!(
                "a rule names estimator {name}, which cannot be checked: {why}"
            )));
        }
    }
    let outcomes = evaluate(&audit, &rules.rules);
    let (regressions, notes) = match baseline {
        Some(b) => {
            let notes = b.check_compatible(&audit)?;
            let r = Regression {
                baseline: b,
                rules: &rules.regressions,
            }
            .evaluate(&audit);
            (r, Some((b.file.as_str(), notes)))
        }
        None => (Vec::new(), None),
    };
    Ok(GateReport::new(audit, outcomes, regressions, notes))
}

/// The whole gate result: the audit it judged, every rule outcome and every regression check.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct GateReport {
    pub tool: crate::report::Tool,
    pub passed: bool,
    pub outcomes: Vec<Outcome>,
    pub regressions: Vec<RegressionOutcome>,
    /// Settings that differ between baseline and this run without making them incompatible.
    pub baseline_notes: Vec<String>,
    pub baseline_file: Option<String>,
    pub audit: AuditReport,
}

impl GateReport {
    pub fn new(
        audit: AuditReport,
        outcomes: Vec<Outcome>,
        regressions: Vec<RegressionOutcome>,
        baseline: Option<(&str, Vec<String>)>,
    ) -> GateReport {
        let passed = outcomes.iter().all(|o| o.passed) && regressions.iter().all(|r| r.passed);
        let mut tool = crate::report::Tool::current();
        tool.schema = "gradaudit.gate/1";
        GateReport {
            tool,
            passed,
            outcomes,
            regressions,
            baseline_notes: baseline.as_ref().map(|b| b.1.clone()).unwrap_or_default(),
            baseline_file: baseline.map(|b| b.0.to_string()),
            audit,
        }
    }

    pub fn failures(&self) -> usize {
        self.outcomes.iter().filter(|o| !o.passed).count()
            + self.regressions.iter().filter(|r| !r.passed).count()
    }

    pub fn checks(&self) -> usize {
        self.outcomes.len() + self.regressions.len()
    }
}

#[cfg(test)]
mod tests;
