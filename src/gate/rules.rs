//! The rules file (`gradaudit.rules/1`, JSON) and `--require` flags: what a gate checks.

use super::Stat;
use crate::error::{Error, Position, Result};
use crate::estimator::Estimator;
use serde::{Deserialize, Serialize};

/// Where on the bootstrap distribution a bound must hold.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum At {
    /// The point estimate.
    #[default]
    Point,
    /// The pessimistic end of the bootstrap interval (low end for a minimum, high for a
    /// maximum), so that the gate does not flap on noise.
    Interval,
}

/// A one-sided bound.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Bound {
    Min(f64),
    Max(f64),
}

impl Bound {
    /// Positive when `x` satisfies the bound.
    pub fn margin(self, x: f64) -> f64 {
        match self {
            Bound::Min(m) => x - m,
            Bound::Max(m) => m - x,
        }
    }

    pub fn value(self) -> f64 {
        match self {
            Bound::Min(m) | Bound::Max(m) => m,
        }
    }
}

/// One rule: a bound on one statistic of one estimator (or of every audited one, `*`).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Rule {
    pub estimator: String,
    pub stat: Stat,
    pub bound: Bound,
    pub at: At,
    /// An undefined statistic passes instead of failing.
    pub allow_undefined: bool,
}

impl Rule {
    pub fn describe(&self) -> String {
        let (op, v) = match self.bound {
            Bound::Min(v) => (">=", v),
            Bound::Max(v) => ("<=", v),
        };
        let at = match self.at {
            At::Point => "",
            At::Interval => " (interval)",
        };
        format!("{} {op} {v}{at}", self.stat.key())
    }

    /// Parses `ESTIMATOR:STAT>=VALUE` or `ESTIMATOR:STAT<=VALUE`, with an optional suffix
    /// `@interval` and/or `?` (allow undefined), e.g. `gae:0.95:snr>=2@interval`.
    pub fn parse_flag(text: &str) -> Result<Rule, String> {
        let mut body = text.trim();
        let mut allow_undefined = false;
        if let Some(b) = body.strip_suffix('?') {
            body = b;
            allow_undefined = true;
        }
        let mut at = At::Point;
        if let Some(b) = body.strip_suffix("@interval") {
            body = b;
            at = At::Interval;
        } else if let Some(b) = body.strip_suffix("@point") {
            body = b;
        }
        let (lhs, op, rhs) = if let Some((l, r)) = body.split_once(">=") {
            (l, ">=", r)
        } else if let Some((l, r)) = body.split_once("<=") {
            (l, "<=", r)
        } else {
            return Err(format!(
                "'{text}': expected ESTIMATOR:STAT>=VALUE or ESTIMATOR:STAT<=VALUE, e.g. \
                 gae:0.95:snr>=2"
            ));
        };
        let (est, stat) = lhs.rsplit_once(':').ok_or_else(|| {
            format!("'{text}': name the estimator and the statistic, ESTIMATOR:STAT")
        })?;
        let value: f64 = rhs
            .trim()
            .parse()
            .ok()
            .filter(|v: &f64| v.is_finite())
            .ok_or_else(|| format!("'{text}': '{rhs}' is not a finite number"))?;
        let rule = Rule {
            estimator: checked_estimator(est.trim())?,
            stat: Stat::parse(stat.trim())?,
            bound: if op == ">=" {
                Bound::Min(value)
            } else {
                Bound::Max(value)
            },
            at,
            allow_undefined,
        };
        Ok(rule)
    }
}

fn checked_estimator(name: &str) -> Result<String, String> {
    if name == "*" {
        return Ok(name.to_string());
    }
    Estimator::parse(name).map(|e| e.to_string())
}

/// A regression bound: `stat` may not get worse than the baseline by more than `tolerance`
/// percent.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RegressionRule {
    #[serde(default = "star")]
    pub estimator: String,
    pub stat: Stat,
    /// Allowed worsening in percent of the baseline value.
    pub tolerance_pct: f64,
}

fn star() -> String {
    "*".into()
}

impl RegressionRule {
    /// Parses `STAT:PCT` or `ESTIMATOR:STAT:PCT`, e.g. `variance:25` or `gae:0.95:mse:10`.
    pub fn parse_flag(text: &str) -> Result<RegressionRule, String> {
        let (lhs, pct) = text
            .rsplit_once(':')
            .ok_or_else(|| format!("'{text}': expected STAT:PCT or ESTIMATOR:STAT:PCT"))?;
        let tolerance_pct: f64 = pct
            .trim_end_matches('%')
            .parse()
            .ok()
            .filter(|v: &f64| v.is_finite() && *v >= 0.0)
            .ok_or_else(|| format!("'{text}': '{pct}' is not a percentage >= 0"))?;
        let (estimator, stat) = match lhs.rsplit_once(':') {
            Some((e, s)) => (checked_estimator(e)?, s),
            None => ("*".to_string(), lhs),
        };
        Ok(RegressionRule {
            estimator,
            stat: Stat::parse(stat)?,
            tolerance_pct,
        })
    }
}

/// One entry of the rules file: exactly one of `min` and `max`.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct RuleEntry {
    #[serde(default = "star")]
    estimator: String,
    stat: Stat,
    min: Option<f64>,
    max: Option<f64>,
    #[serde(default)]
    at: At,
    #[serde(default)]
    allow_undefined: bool,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct RulesFile {
    schema: String,
    #[serde(default)]
    rules: Vec<RuleEntry>,
    #[serde(default)]
    regressions: Vec<RegressionRule>,
}

/// Everything a gate checks.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct RuleSet {
    pub rules: Vec<Rule>,
    pub regressions: Vec<RegressionRule>,
}

pub const RULES_SCHEMA: &str = "gradaudit.rules/1";

impl RuleSet {
    /// Parses a rules file's text; `file` names it in messages.
    pub fn from_json(text: &str, file: &str) -> Result<RuleSet> {
        let at = |line: usize, column: usize| Position {
            file: file.to_string(),
            line: Some(line as u64),
            column: (column > 0).then(|| (column, String::from("json"))),
        };
        let parsed: RulesFile = serde_json::from_str(text).map_err(|e| {
            Error::input_hint(
                at(e.line(), e.column()),
                format!("invalid rules file: {e}"),
                "see the README section 'Rules file' for the format",
            )
        })?;
        if parsed.schema != RULES_SCHEMA {
            return Err(Error::input(
                at(1, 0),
                format!("schema is '{}', expected '{RULES_SCHEMA}'", parsed.schema),
            ));
        }
        let mut rules = Vec::new();
        for (i, e) in parsed.rules.into_iter().enumerate() {
            let where_ = format!("rules[{i}]");
            let bound = match (e.min, e.max) {
                (Some(v), None) => Bound::Min(v),
                (None, Some(v)) => Bound::Max(v),
                _ => {
                    return Err(Error::usage(format!(
                        "{file}: {where_}: give exactly one of \"min\" and \"max\""
                    )));
                }
            };
            if !bound.value().is_finite() {
                return Err(Error::usage(format!(
                    "{file}: {where_}: the bound must be finite"
                )));
            }
            let estimator = checked_estimator(&e.estimator)
                .map_err(|m| Error::usage(format!("{file}: {where_}: {m}")))?;
            rules.push(Rule {
                estimator,
                stat: e.stat,
                bound,
                at: e.at,
                allow_undefined: e.allow_undefined,
            });
        }
        let mut regressions = parsed.regressions;
        for (i, r) in regressions.iter_mut().enumerate() {
            r.estimator = checked_estimator(&r.estimator)
                .map_err(|m| Error::usage(format!("{file}: regressions[{i}]: {m}")))?;
            if !(r.tolerance_pct.is_finite() && r.tolerance_pct >= 0.0) {
                return Err(Error::usage(format!(
                    "{file}: regressions[{i}]: tolerance_pct must be a number >= 0"
                )));
            }
        }
        Ok(RuleSet { rules, regressions })
    }

    /// Reads and parses a rules file.
    pub fn load(path: &str) -> Result<RuleSet> {
        let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
        RuleSet::from_json(&text, path)
    }

    /// Estimators named by a rule (not `*`), which the audit must include.
    pub fn named_estimators(&self) -> Vec<Estimator> {
        let mut out: Vec<Estimator> = Vec::new();
        let names = self
            .rules
            .iter()
            .map(|r| r.estimator.as_str())
            .chain(self.regressions.iter().map(|r| r.estimator.as_str()));
        for name in names.filter(|n| *n != "*") {
            if let Ok(e) = Estimator::parse(name)
                && !out.contains(&e)
            {
                out.push(e);
            }
        }
        out
    }
}
