//! Regression gating: a previous report (from `audit --format json` or `gate --format json`) is
//! the baseline; a statistic may not get worse than there by more than a tolerance. Reports are
//! compared only when they were made with compatible settings.

use super::rules::RegressionRule;
use super::{Figures, Stat};
use crate::error::{Error, Position, Result};
use crate::report::AuditReport;
use serde::{Deserialize, Serialize};

#[derive(Debug, Clone, Deserialize)]
struct WireTool {
    schema: String,
}

#[derive(Debug, Clone, Deserialize)]
struct WireSettings {
    gamma: f64,
    reference: String,
    resamples: u64,
    seed: u64,
    target_snr: f64,
    confidence: f64,
}

#[derive(Debug, Clone, Deserialize)]
struct WireInput {
    episodes: u64,
}

#[derive(Debug, Clone, Deserialize)]
struct WireRow {
    name: String,
    variance: Option<f64>,
    bias_sq: Option<f64>,
    mse: Option<f64>,
    snr: Option<f64>,
    ess: Option<f64>,
    cosine_half: Option<f64>,
    episodes_for_snr: Option<u64>,
}

#[derive(Debug, Clone, Deserialize)]
struct WireAudit {
    tool: WireTool,
    input: WireInput,
    settings: WireSettings,
    signal: Option<f64>,
    estimators: Vec<WireRow>,
}

/// The parts of a previous report that regression checks read.
#[derive(Debug, Clone)]
pub struct Baseline {
    pub file: String,
    audit: WireAudit,
}

impl Baseline {
    /// Reads an audit report, or the audit inside a gate report.
    pub fn from_json(text: &str, file: &str) -> Result<Baseline> {
        let bad = |e: serde_json::Error| {
            Error::input_hint(
                Position {
                    file: file.to_string(),
                    line: Some(e.line() as u64),
                    column: None,
                },
                format!("not a gradaudit report: {e}"),
                "pass a file written by `gradaudit audit --format json` or `gradaudit gate \
                 --format json`",
            )
        };
        let value: serde_json::Value = serde_json::from_str(text).map_err(bad)?;
        let inner = match value.get("audit") {
            Some(a) => a.clone(),
            None => value,
        };
        let audit: WireAudit = serde_json::from_value(inner).map_err(bad)?;
        if !audit.tool.schema.starts_with("gradaudit.audit/") {
            return Err(Error::input(
                Position {
                    file: file.to_string(),
                    ..Default::default()
                },
                format!("unsupported report schema '{}'", audit.tool.schema),
            ));
        }
        Ok(Baseline {
            file: file.to_string(),
            audit,
        })
    }

    pub fn load(path: &str) -> Result<Baseline> {
        let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
        Baseline::from_json(&text, path)
    }

    /// Settings that make the comparison meaningless are errors; others are returned as notes.
    pub fn check_compatible(&self, current: &AuditReport) -> Result<Vec<String>> {
        let b = &self.audit;
        let mut problems = Vec::new();
        if b.settings.gamma != current.settings.gamma {
            problems.push(format!(
                "gamma {} in the baseline, {} now",
                b.settings.gamma, current.settings.gamma
            ));
        }
        if b.settings.reference != current.settings.reference {
            problems.push(format!(
                "reference {} in the baseline, {} now",
                b.settings.reference, current.settings.reference
            ));
        }
        let mut old: Vec<&str> = b.estimators.iter().map(|e| e.name.as_str()).collect();
        let mut new: Vec<&str> = current.estimators.iter().map(|e| e.name.as_str()).collect();
        old.sort_unstable();
        new.sort_unstable();
        if old != new {
            let only_old: Vec<&str> = old.iter().filter(|n| !new.contains(n)).copied().collect();
            let only_new: Vec<&str> = new.iter().filter(|n| !old.contains(n)).copied().collect();
            problems.push(format!(
                "different estimators (only in the baseline: [{}]; only now: [{}])",
                only_old.join(", "),
                only_new.join(", ")
            ));
        }
        if !problems.is_empty() {
            return Err(Error::usage(format!(
                "the baseline {} is not comparable with this run: {}. Re-create the baseline \
                 with the same --gamma, --reference and --estimators",
                self.file,
                problems.join("; ")
            )));
        }
        let mut notes = Vec::new();
        let s = &current.settings;
        if b.settings.seed != s.seed || b.settings.resamples != s.resamples as u64 {
            notes.push(format!(
                "seed/resamples differ (baseline {}/{}, now {}/{}): differences include fresh \
                 Monte-Carlo noise",
                b.settings.seed, b.settings.resamples, s.seed, s.resamples
            ));
        }
        if b.settings.confidence != s.confidence || b.settings.target_snr != s.target_snr {
            notes.push("confidence or target snr differ from the baseline".to_string());
        }
        if b.input.episodes != current.input.episodes {
            notes.push(format!(
                "the baseline audited {} episodes, this run {}",
                b.input.episodes, current.input.episodes
            ));
        }
        Ok(notes)
    }

    fn figures(&self, name: &str) -> Option<Figures> {
        self.audit
            .estimators
            .iter()
            .find(|e| e.name == name)
            .map(|r| Figures {
                variance: r.variance,
                bias_sq: r.bias_sq,
                mse: r.mse,
                snr: r.snr,
                ess: r.ess,
                cosine_half: r.cosine_half,
                episodes_for_snr: r.episodes_for_snr,
                signal: self.audit.signal,
            })
    }
}

/// One regression check on one estimator.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RegressionOutcome {
    pub estimator: String,
    pub stat: Stat,
    pub baseline: Option<f64>,
    pub current: Option<f64>,
    /// How much worse than the baseline, in percent (negative: better).
    pub worse_pct: Option<f64>,
    pub tolerance_pct: f64,
    pub passed: bool,
    pub detail: Option<String>,
}

/// A regression rule set applied to a current report.
pub struct Regression<'a> {
    pub baseline: &'a Baseline,
    pub rules: &'a [RegressionRule],
}

impl Regression<'_> {
    pub fn evaluate(&self, current: &AuditReport) -> Vec<RegressionOutcome> {
        let mut out = Vec::new();
        for rule in self.rules {
            let mut rows: Vec<_> = current
                .estimators
                .iter()
                .filter(|e| rule.estimator == "*" || e.name == rule.estimator)
                .collect();
            rows.sort_by(|a, b| a.name.cmp(&b.name));
            for row in rows {
                let now = Figures::of(current, row).stat(rule.stat);
                let before = self
                    .baseline
                    .figures(&row.name)
                    .and_then(|f| f.stat(rule.stat));
                out.push(compare(&row.name, rule, before, now));
            }
        }
        out
    }
}

fn compare(
    name: &str,
    rule: &RegressionRule,
    before: Option<f64>,
    now: Option<f64>,
) -> RegressionOutcome {
    let worse_pct = match (before, now) {
        (Some(b), Some(n)) if b != 0.0 => {
            let change = if rule.stat.higher_is_better() {
                b - n
            } else {
                n - b
            };
            Some(100.0 * change / b.abs())
        }
        _ => None,
    };
    let (passed, detail) = match (before, now, worse_pct) {
        (_, _, Some(w)) => (w <= rule.tolerance_pct, None),
        (Some(b), Some(n), None) => {
            // A zero baseline: any worsening is an infinite percentage.
            let worse = if rule.stat.higher_is_better() {
                n < b
            } else {
                n > b
            };
            (!worse, Some("the baseline value is 0".to_string()))
        }
        // An undefined figure satisfies no check, whatever the baseline held.
        (Some(_), None, _) => (false, Some(format!("{} became undefined", rule.stat.key()))),
        (None, None, _) => (
            false,
            Some(format!(
                "{} is undefined here and in the baseline",
                rule.stat.key()
            )),
        ),
        (None, _, _) => (
            true,
            Some(format!("{} is undefined in the baseline", rule.stat.key())),
        ),
    };
    RegressionOutcome {
        estimator: name.to_string(),
        stat: rule.stat,
        baseline: before,
        current: now,
        worse_pct,
        tolerance_pct: rule.tolerance_pct,
        passed,
        detail,
    }
}
