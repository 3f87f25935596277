//! Policy files (`gradaudit.policy/1`, JSON): a parametric policy whose score vectors
//! s_t = grad_theta log pi(a_t | s_t) gradaudit computes from a log's obs and act columns, for
//! logs that record states and actions but no scores. Three families, the trade's standard
//! parametric policies:
//!
//! * `gaussian_linear`: a ~ N(W phi(s) + c, diag(sigma^2)); theta = (W row-major, c, and
//!   log sigma when learned).
//! * `softmax_linear`: pi(a | s) proportional to exp(theta_a . phi(s)) over K actions;
//!   theta = theta row-major (action a, feature j).
//! * `bernoulli_logistic`: pi(1 | s) = sigmoid(w . phi(s) + c); theta = (w, c).
//!
//! phi(s) is the listed obs columns, plus a constant 1 last when `constant_feature` is true.

pub mod clipping;
pub mod family;
#[doc(hidden)]
pub mod network_stub;
pub mod projection;

use crate::error::{Error, Position, Result};
use crate::log::Schema;
pub use family::Family;
use serde::Deserialize;

pub const POLICY_SCHEMA: &str = "gradaudit.policy/1";

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct Wire {
    schema: String,
    family: String,
    features: Vec<String>,
    #[serde(default)]
    constant_feature: bool,
    #[serde(default)]
    actions: Option<Vec<String>>,
    #[serde(default)]
    action: Option<String>,
    #[serde(rename = "W", default)]
    w_matrix: Option<Vec<Vec<f64>>>,
    #[serde(default)]
    c: Option<serde_json::Value>,
    #[serde(default)]
    log_sigma: Option<Vec<f64>>,
    #[serde(default)]
    sigma: Option<Vec<f64>>,
    #[serde(default)]
    learn_log_sigma: Option<bool>,
    #[serde(default)]
    theta: Option<Vec<Vec<f64>>>,
    #[serde(default)]
    w: Option<Vec<f64>>,
    /// Free text (where the file came from); ignored.
    #[serde(default)]
    note: Option<String>,
}

/// A validated policy bound to a log's columns.
#[derive(Debug, Clone, PartialEq)]
pub struct Policy {
    pub family: Family,
    /// Positions of the feature columns within the episode's obs vector.
    features: Vec<usize>,
    constant_feature: bool,
    /// Positions of the action columns within the episode's act vector.
    actions: Vec<usize>,
    /// Names of the gradient components, in order.
    pub parameters: Vec<String>,
}

fn bad(file: &str, message: impl Into<String>) -> Error {
    Error::input_hint(
        Position {
            file: file.to_string(),
            ..Default::default()
        },
        message,
        "see the README section 'Policy files' for the format",
    )
}

impl Policy {
    pub fn load(path: &str, schema: &Schema) -> Result<Policy> {
        let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
        Policy::from_json(&text, path, schema)
    }

    /// Parses and validates a policy file against the log's header; `file` names it.
    pub fn from_json(text: &str, file: &str, schema: &Schema) -> Result<Policy> {
        let w: Wire = serde_json::from_str(text).map_err(|e| {
            Error::input_hint(
                Position {
                    file: file.to_string(),
                    line: Some(e.line() as u64),
                    column: None,
                },
                format!("invalid policy file: {e}"),
                "see the README section 'Policy files' for the format",
            )
        })?;
        let _ = &w.note;
        if w.schema != POLICY_SCHEMA {
            return Err(bad(
                file,
                format!("schema is '{}', expected '{POLICY_SCHEMA}'", w.schema),
            ));
        }
        if w.features.is_empty() && !w.constant_feature {
            return Err(bad(
                file,
                "the policy has no features (list obs columns, or set constant_feature)",
            ));
        }
        let find = |name: &str, cols: &[usize], kind: &str| -> Result<usize> {
            cols.iter()
                .position(|&c| schema.headers[c] == name)
                .ok_or_else(|| bad(file, format!("{kind} column '{name}' named by the policy is not among the log's {kind} columns")))
        };
        let features: Vec<usize> = w
            .features
            .iter()
            .map(|f| find(f, &schema.obs, "obs"))
            .collect::<Result<_>>()?;
        let p = features.len() + usize::from(w.constant_feature);
        let finite = |xs: &[f64], what: &str| -> Result<()> {
            if xs.iter().all(|x| x.is_finite()) {
                Ok(())
            } else {
                Err(bad(file, format!("{what} holds a non-finite number")))
            }
        };
        let matrix = |m: &Option<Vec<Vec<f64>>>,
                      what: &str,
                      rows: Option<usize>|
         -> Result<Vec<Vec<f64>>> {
            let m = m
                .clone()
                .ok_or_else(|| bad(file, format!("the policy needs \"{what}\"")))?;
            if let Some(r) = rows
                && m.len() != r
            {
                return Err(bad(
                    file,
                    format!("\"{what}\" has {} rows, expected {r}", m.len()),
                ));
            }
            if m.is_empty() {
                return Err(bad(file, format!("\"{what}\" is empty")));
            }
            for (i, row) in m.iter().enumerate() {
                if row.len() != p {
                    return Err(bad(
                        file,
                        format!(
                            "\"{what}\" row {i} has {} entries, expected {p} (one per feature{})",
                            row.len(),
                            if w.constant_feature {
                                ", constant last"
                            } else {
                                ""
                            }
                        ),
                    ));
                }
                finite(row, what)?;
            }
            Ok(m)
        };
        let (family, actions, parameters) = match w.family.as_str() {
            "gaussian_linear" => {
                let acts = w
                    .actions
                    .clone()
                    .ok_or_else(|| bad(file, "gaussian_linear needs \"actions\""))?;
                let actions: Vec<usize> = acts
                    .iter()
                    .map(|a| find(a, &schema.act, "act"))
                    .collect::<Result<_>>()?;
                let m = actions.len();
                let wm = matrix(&w.w_matrix, "W", Some(m))?;
                let c: Vec<f64> = match &w.c {
                    Some(v) => serde_json::from_value(v.clone()).map_err(|_| {
                        bad(file, "\"c\" must be a list of numbers, one per action")
                    })?,
                    None => vec![0.0; m],
                };
                if c.len() != m {
                    return Err(bad(
                        file,
                        format!("\"c\" has {} entries, expected {m}", c.len()),
                    ));
                }
                finite(&c, "c")?;
                let log_sigma = match (&w.log_sigma, &w.sigma) {
                    (Some(l), None) => {
                        finite(l, "log_sigma")?;
                        l.clone()
                    }
                    (None, Some(s)) => {
                        if let Some(x) = s.iter().find(|x| !(**x > 0.0 && x.is_finite())) {
                            return Err(bad(
                                file,
                                format!(
                                    "standard deviation {x} in \"sigma\" must be positive and finite"
                                ),
                            ));
                        }
                        s.iter().map(|x| x.ln()).collect()
                    }
                    _ => return Err(bad(file, "give exactly one of \"log_sigma\" and \"sigma\"")),
                };
                if log_sigma.len() != m {
                    return Err(bad(
                        file,
                        format!(
                            "the standard deviations have {} entries, expected {m}",
                            log_sigma.len()
                        ),
                    ));
                }
                let learn = w.learn_log_sigma.unwrap_or(true);
                let mut params = Vec::new();
                for i in 0..m {
                    for j in 0..p {
                        params.push(format!("W[{i},{j}]"));
                    }
                }
                params.extend((0..m).map(|i| format!("c[{i}]")));
                if learn {
                    params.extend((0..m).map(|i| format!("log_sigma[{i}]")));
                }
                (
                    Family::Gaussian {
                        w: wm,
                        c,
                        log_sigma,
                        learn_log_sigma: learn,
                    },
                    actions,
                    params,
                )
            }
            "softmax_linear" => {
                let a = w.action.clone().ok_or_else(|| {
                    bad(
                        file,
                        "softmax_linear needs \"action\" (one column of action indices 0..K-1)",
                    )
                })?;
                let actions = vec![find(&a, &schema.act, "act")?];
                let theta = matrix(&w.theta, "theta", None)?;
                if theta.len() < 2 {
                    return Err(bad(
                        file,
                        "softmax_linear needs at least 2 actions (rows of \"theta\")",
                    ));
                }
                let mut params = Vec::new();
                for a in 0..theta.len() {
                    for j in 0..p {
                        params.push(format!("theta[{a},{j}]"));
                    }
                }
                (Family::Softmax { theta }, actions, params)
            }
            "bernoulli_logistic" => {
                let a = w.action.clone().ok_or_else(|| {
                    bad(file, "bernoulli_logistic needs \"action\" (one 0/1 column)")
                })?;
                let actions = vec![find(&a, &schema.act, "act")?];
                let wv =
                    w.w.clone()
                        .ok_or_else(|| bad(file, "bernoulli_logistic needs \"w\""))?;
                if wv.len() != p {
                    return Err(bad(
                        file,
                        format!("\"w\" has {} entries, expected {p}", wv.len()),
                    ));
                }
                finite(&wv, "w")?;
                let c: f64 = match &w.c {
                    Some(v) => serde_json::from_value(v.clone())
                        .map_err(|_| bad(file, "\"c\" must be a number"))?,
                    None => 0.0,
                };
                if !c.is_finite() {
                    return Err(bad(file, "\"c\" must be finite"));
                }
                let mut params: Vec<String> = (0..p).map(|j| format!("w[{j}]")).collect();
                params.push("c".into());
                (Family::Bernoulli { w: wv, c }, actions, params)
            }
            other => {
                return Err(bad(
                    file,
                    format!(
                        "unknown policy family '{other}'; known: gaussian_linear, softmax_linear, bernoulli_logistic"
                    ),
                ));
            }
        };
        Ok(Policy {
            family,
            features,
            constant_feature: w.constant_feature,
            actions,
            parameters,
        })
    }

    /// Gradient dimension.
    pub fn dim(&self) -> usize {
        self.parameters.len()
    }

    /// phi(s_t) of step t of an episode.
    pub fn features_of(&self, obs: &[f64], obs_dim: usize, t: usize, out: &mut Vec<f64>) {
        out.clear();
        out.extend(self.features.iter().map(|&j| obs[t * obs_dim + j]));
        if self.constant_feature {
            out.push(1.0);
        }
    }

    /// Replaces the episode's scores by the policy's; errors name the offending row.
    pub fn score_episode(
        &self,
        ep: &mut crate::episode::Episode,
        file: &str,
        first_line: u64,
    ) -> Result<()> {
        let d = self.dim();
        let mut scores = Vec::with_capacity(ep.len() * d);
        let (mut phi, mut act, mut s) = (Vec::new(), Vec::new(), vec![0.0; d]);
        for t in 0..ep.len() {
            self.features_of(&ep.obs, ep.obs_dim, t, &mut phi);
            act.clear();
            act.extend(self.actions.iter().map(|&j| ep.act[t * ep.act_dim + j]));
            self.family.score(&phi, &act, &mut s).map_err(|why| {
                Error::input(
                    Position {
                        file: file.to_string(),
                        line: None,
                        column: None,
                    },
                    format!(
                        "episode '{}' (starting at line {first_line}), step {t}: {why}",
                        ep.id
                    ),
                )
            })?;
            scores.extend_from_slice(&s);
        }
        ep.scores = scores;
        ep.score_dim = d;
        Ok(())
    }
}

#[cfg(test)]
mod tests;
