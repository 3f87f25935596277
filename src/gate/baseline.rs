//! Regression gating: a previous report (from `audit --format json` or `gate --format json`) is
//! the baseline; a statistic may not get worse than there by more than a tolerance. Reports are
//! compared only when they were made with compatible settings.
//!
//! Accepted: exactly the schemas this build writes (`gradaudit.audit/1`, or `gradaudit.gate/1`
//! with the audit inside), including the nulls it writes for undefined figures; any other version
//! is refused before its fields are read, since its layout may differ anywhere. Errors carry the
//! line and column that serde_json reports in the file itself.

use super::rules::RegressionRule;
use super::{Figures, Stat};
use crate::error::{Error, Position, Result};
use crate::report::{AuditReport, Tool};
use serde::{Deserialize, Serialize};

/// The schema of `gate --format json`, whose `audit` field holds the audit report.
const GATE_SCHEMA: &str = "gradaudit.gate/1";

const HINT: &str =
    "pass a file written by `gradaudit audit --format json` or `gradaudit gate --format json`";

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
    // Null where a figure overflowed f64 (the report says so in its notes).
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
    input: WireInput,
    settings: WireSettings,
    signal: Option<f64>,
    estimators: Vec<WireRow>,
}

/// A gate report: only its audit is read.
#[derive(Debug, Clone, Deserialize)]
struct WireGate {
    audit: WireAudit,
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
        let bad = |e: serde_json::Error| json_error(file, e);
        let value: serde_json::Value = serde_json::from_str(text).map_err(bad)?;
        let audit = match schema_of(&value) {
            Some(GATE_SCHEMA) => {
                check_schema(text, file, schema_of(&value["audit"]))?;
                serde_json::from_str::<WireGate>(text).map_err(bad)?.audit
            }
            schema => {
                check_schema(text, file, schema)?;
                serde_json::from_str::<WireAudit>(text).map_err(bad)?
            }
        };
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

    /// The baseline's value of `stat` for the estimator `name`; None where it is not there or
    /// undefined (null in the file).
    fn stat(&self, name: &str, stat: Stat) -> Option<f64> {
        let r = self.audit.estimators.iter().find(|e| e.name == name)?;
        match stat {
            Stat::Variance => r.variance,
            Stat::BiasSq => r.bias_sq,
            Stat::Mse => r.mse,
            Stat::Snr => r.snr,
            Stat::Ess => r.ess,
            Stat::CosineHalf => r.cosine_half,
            Stat::EpisodesForSnr => r.episodes_for_snr.map(|n| n as f64),
            // Derived as for the current report; undefined when a figure they need is null.
            Stat::RelativeBias | Stat::RelativeVariance => Figures {
                variance: r.variance,
                bias_sq: r.bias_sq,
                mse: r.mse,
                snr: r.snr,
                ess: r.ess,
                cosine_half: r.cosine_half,
                episodes_for_snr: r.episodes_for_snr,
                signal: self.audit.signal,
            }
            .stat(stat),
        }
    }
}

/// `tool.schema` of a report value, when it is a string.
fn schema_of(value: &serde_json::Value) -> Option<&str> {
    value.get("tool")?.get("schema")?.as_str()
}

/// Refuses a report whose schema this build does not write, naming the line where it stands.
fn check_schema(text: &str, file: &str, schema: Option<&str>) -> Result<()> {
    let expected = Tool::current().schema;
    let Some(found) = schema else {
        return Err(Error::input_hint(
            at(file, 1, 0),
            "not a gradaudit report: no tool.schema",
            HINT,
        ));
    };
    if found == expected {
        return Ok(());
    }
    // The first place the quoted schema string appears is where a reader should look.
    let (line, column) = text
        .find(&format!("\"{found}\""))
        .map_or((1, 0), |offset| line_column(text, offset));
    Err(Error::input_hint(
        at(file, line, column),
        format!(
            "unsupported report schema '{found}' (this gradaudit reads '{expected}' and '{GATE_SCHEMA}')"
        ),
        "re-create the baseline with this version of gradaudit",
    ))
}

/// 1-based line and column of a byte offset.
fn line_column(text: &str, offset: usize) -> (usize, usize) {
    let before = &text[..offset];
    let line = before.matches('\n').count() + 1;
    let column = before.len() - before.rfind('\n').map_or(0, |i| i + 1) + 1;
    (line, column)
}

fn at(file: &str, line: usize, column: usize) -> Position {
    Position {
        file: file.to_string(),
        line: Some(line as u64),
        column: (column > 0).then(|| (column, String::from("json"))),
    }
}

/// A serde_json error at its line and column, its message without the repeated position.
fn json_error(file: &str, e: serde_json::Error) -> Error {
    let text = e.to_string();
    let suffix = format!(" at line {} column {}", e.line(), e.column());
    let message = text.strip_suffix(&suffix).unwrap_or(&text);
    Error::input_hint(
        at(file, e.line(), e.column()),
        format!("not a gradaudit report: {message}"),
        HINT,
    )
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
                let before = self.baseline.stat(&row.name, rule.stat);
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn line_column_counts_from_one() {
        let text = "{\n  \"a\": 1,\n  \"b\": 2\n}";
        assert_eq!(line_column(text, 0), (1, 1));
        assert_eq!(line_column(text, text.find("\"b\"").unwrap()), (3, 3));
    }

    #[test]
    fn json_errors_give_the_position_once() {
        let e = Baseline::from_json(
            "{\n  \"tool\": {\"schema\": \"gradaudit.audit/1\"},\n  \"input\": 7\n}",
            "b.json",
        )
        .unwrap_err()
        .to_string();
        assert!(e.starts_with("b.json, line 3, column "), "{e}");
        assert!(
            !e.contains(" at line "),
            "the position is not repeated: {e}"
        );
    }

    #[test]
    fn missing_and_unknown_schemas_are_refused() {
        for (text, wanted) in [
            ("{}", "no tool.schema"),
            ("{\"tool\": {\"schema\": 1}}", "no tool.schema"),
            (
                "{\"tool\": {\"schema\": \"gradaudit.audit/2\"}}",
                "'gradaudit.audit/2'",
            ),
            (
                "{\"tool\": {\"schema\": \"gradaudit.gate/1\"}, \"audit\": {\"tool\": {\"schema\": \"x\"}}}",
                "'x'",
            ),
        ] {
            let e = Baseline::from_json(text, "b.json").unwrap_err().to_string();
            assert!(e.contains(wanted), "{text}: {e}");
        }
    }
}
