//! Policy files (`gradaudit.policy/1`, JSON): a parametric policy whose score vectors
//! s_t = grad_theta log pi(a_t | s_t) gradaudit computes from a log's obs and act columns, for
//! logs that record states and actions but no scores. The linear families, the trade's
//! standard parametric policies:
//!
//! * `gaussian_linear`: a ~ N(W phi(s) + c, diag(sigma^2)); theta = (W row-major, c, and
//!   log sigma when learned).
//! * `softmax_linear`: pi(a | s) proportional to exp(theta_a . phi(s)) over K actions;
//!   theta = theta row-major (action a, feature j).
//! * `bernoulli_logistic`: pi(1 | s) = sigmoid(w . phi(s) + c); theta = (w, c).
//!
//! phi(s) is the listed obs columns, plus a constant 1 last when `constant_feature` is true.
//!
//! And `mlp`: a multilayer perceptron actor whose tensors come from a safetensors file (see
//! network.rs for the math, spec.rs for the description). Rooms: description.rs (the shared
//! fields and messages), linear.rs + family.rs (linear families), spec.rs, weights.rs,
//! network.rs, activation.rs, heads.rs (networks), summary.rs (what `inspect` shows).

pub mod activation;
pub mod clipping;
pub mod description;
pub mod family;
pub mod heads;
pub mod linear;
pub mod network;
pub mod projection;
pub mod spec;
pub mod summary;
pub mod weights;

use crate::episode::Episode;
use crate::error::{Error, Position, Result};
use crate::log::Schema;
use description::Ctx;
pub use description::POLICY_SCHEMA;
pub use family::Family;
use ndarray::Array2;
pub use network::{GroupGrad, Network, StepColumn, StepError, ThetaGroup};

/// The model behind a policy: a linear family or a network.
#[derive(Debug, Clone, PartialEq)]
pub enum Model {
    Linear(Family),
    Network(Box<Network>),
}

/// What a family's parser hands back, before the columns are named for messages.
pub struct Built {
    pub model: Model,
    pub features: Vec<usize>,
    pub constant_feature: bool,
    pub actions: Vec<usize>,
    pub parameters: Vec<String>,
}

/// A validated policy bound to a log's columns.
#[derive(Debug, Clone, PartialEq)]
pub struct Policy {
    pub model: Model,
    /// Positions of the feature columns within the episode's obs vector.
    features: Vec<usize>,
    constant_feature: bool,
    /// Positions of the action columns within the episode's act vector.
    actions: Vec<usize>,
    /// 1-based header position and name of each feature and action column, for messages.
    feature_cols: Vec<(usize, String)>,
    action_cols: Vec<(usize, String)>,
    /// Names of the gradient components, in order.
    pub parameters: Vec<String>,
}

/// The columns `idx` of a row-major T x dim array, as a T x idx.len() matrix.
pub fn gather(flat: &[f64], dim: usize, idx: &[usize]) -> Array2<f64> {
    let t = flat.len().checked_div(dim).unwrap_or(0);
    Array2::from_shape_fn((t, idx.len()), |(r, k)| flat[r * dim + idx[k]])
}

impl Policy {
    pub fn load(path: &str, schema: &Schema) -> Result<Policy> {
        let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
        Policy::from_json(&text, path, schema)
    }

    /// Parses and validates a policy file against the log's header; `file` names it.
    pub fn from_json(text: &str, file: &str, schema: &Schema) -> Result<Policy> {
        let ctx = Ctx { file, schema };
        let family = ctx.family(text)?;
        let built = match family.as_str() {
            "gaussian_linear" | "softmax_linear" | "bernoulli_logistic" => {
                linear::build(ctx, text)?
            }
            "mlp" => spec::build(ctx, text)?,
            "mlp_value" => {
                return Err(ctx.bad(
                    "an mlp_value description is a value network, not a policy; give an mlp \
                     actor to --policy",
                ));
            }
            other => {
                return Err(ctx.bad(format!(
                    "unknown policy family '{other}'; known: {}",
                    description::FAMILIES
                )));
            }
        };
        let named = |cols: &[usize], idx: &[usize]| -> Vec<(usize, String)> {
            idx.iter()
                .map(|&j| (cols[j] + 1, schema.headers[cols[j]].clone()))
                .collect()
        };
        Ok(Policy {
            feature_cols: named(&schema.obs, &built.features),
            action_cols: named(&schema.act, &built.actions),
            model: built.model,
            features: built.features,
            constant_feature: built.constant_feature,
            actions: built.actions,
            parameters: built.parameters,
        })
    }

    /// Gradient dimension.
    pub fn dim(&self) -> usize {
        self.parameters.len()
    }

    /// The network, when the policy is one.
    pub fn network(&self) -> Option<&Network> {
        match &self.model {
            Model::Network(n) => Some(n),
            Model::Linear(_) => None,
        }
    }

    /// phi(s_t) of step t of an episode.
    pub fn features_of(&self, obs: &[f64], obs_dim: usize, t: usize, out: &mut Vec<f64>) {
        out.clear();
        out.extend(self.features.iter().map(|&j| obs[t * obs_dim + j]));
        if self.constant_feature {
            out.push(1.0);
        }
    }

    /// The episode's inputs for a network: T x n_obs listed obs columns, T x n_act actions.
    pub fn inputs(&self, ep: &Episode) -> (Array2<f64>, Array2<f64>) {
        (
            gather(&ep.obs, ep.obs_dim, &self.features),
            gather(&ep.act, ep.act_dim, &self.actions),
        )
    }

    /// An error at a step of `ep` in the log `file`, naming the step's own line and the
    /// column at fault when known.
    pub fn step_error(&self, ep: &Episode, file: &str, e: StepError) -> Error {
        let column = e.column.and_then(|c| match c {
            StepColumn::Obs(k) => self.feature_cols.get(k).cloned(),
            StepColumn::Act(k) => self.action_cols.get(k).cloned(),
        });
        let (line, message) = match ep.lines.get(e.step) {
            Some(&l) => (
                Some(l),
                format!("episode '{}', step {}: {}", ep.id, e.step, e.message),
            ),
            None => (
                None,
                format!(
                    "episode '{}' (starting at line {}), step {}: {}",
                    ep.id, ep.first_line, e.step, e.message
                ),
            ),
        };
        let at = Position {
            file: file.to_string(),
            line,
            column,
        };
        Error::input(at, message)
    }

    /// A network policy's factored per-step gradients for one episode (see
    /// `Network::score_factors`), with errors placed at the row's line and column; None for a
    /// linear policy.
    pub fn score_factors_episode(
        &self,
        ep: &Episode,
        file: &str,
    ) -> Option<Result<Vec<GroupGrad>>> {
        let net = self.network()?;
        let (obs, act) = self.inputs(ep);
        Some(
            net.score_factors(obs.view(), act.view())
                .map_err(|e| self.step_error(ep, file, e)),
        )
    }

    /// Replaces the episode's scores by the policy's; errors name the offending row and column.
    /// (`_first_line` is kept for callers; the episode's own step lines are used.)
    pub fn score_episode(&self, ep: &mut Episode, file: &str, _first_line: u64) -> Result<()> {
        let d = self.dim();
        let scores = match &self.model {
            Model::Linear(family) => self.linear_scores(family, ep, file)?,
            Model::Network(net) => {
                let (obs, act) = self.inputs(ep);
                net.scores(obs.view(), act.view())
                    .map_err(|e| self.step_error(ep, file, e))?
                    .into_raw_vec_and_offset()
                    .0
            }
        };
        ep.scores = scores;
        ep.score_dim = d;
        Ok(())
    }

    fn linear_scores(&self, family: &Family, ep: &Episode, file: &str) -> Result<Vec<f64>> {
        let d = self.dim();
        let mut scores = Vec::with_capacity(ep.len() * d);
        let (mut phi, mut act, mut s) = (Vec::new(), Vec::new(), vec![0.0; d]);
        for t in 0..ep.len() {
            self.features_of(&ep.obs, ep.obs_dim, t, &mut phi);
            act.clear();
            act.extend(self.actions.iter().map(|&j| ep.act[t * ep.act_dim + j]));
            family.score(&phi, &act, &mut s).map_err(|why| {
                // The families fail only on a discrete action, their one action column.
                let e = StepError {
                    step: t,
                    column: Some(StepColumn::Act(0)),
                    message: why,
                };
                self.step_error(ep, file, e)
            })?;
            scores.extend_from_slice(&s);
        }
        Ok(scores)
    }
}

#[cfg(test)]
mod tests;
#[cfg(test)]
mod tests_network;
