//! A value network as the critic (`--value-net FILE`): V(s_t) = f(s_t) for an `mlp_value`
//! description (policy/spec.rs: its trunk's last layer has one output), for logs without a value
//! column, or to replace the one they have.
//!
//! The bootstrap value of a truncated episode, V(s_T), needs the state after the last step.
//! When the log has next-observation columns (`next_obs_*`, a `next_obs` list column, or
//! `--col next_obs=NAME`), V(s_T) is the network at the last row's next observation, which
//! is s_T itself. Otherwise the rows hold only the states actions were taken in,
//! s_0 .. s_{T-1}, so V(s_T) is approximated by V(s_{T-1}), the network at the last logged
//! observation. The report says which (`value_net.bootstrap`). Terminated episodes need no
//! bootstrap value (V_T = 0).

use crate::episode::{End, Episode};
use crate::error::Result;
use crate::log::Schema;
use crate::policy::spec::ValueNet;
use serde::Serialize;

/// Where the bootstrap value of truncated episodes is taken: the logged next observation.
pub const FROM_NEXT_OBS: &str = "logged_next_observation";
/// ... or, when the log has none, the last logged observation.
pub const FROM_LAST_OBS: &str = "last_observation";

/// A loaded value network.
#[derive(Debug, Clone, PartialEq)]
pub struct ValueCritic {
    net: ValueNet,
    file: String,
    /// The headers of the log's next-observation elements (empty: the log has none).
    next_obs: Vec<String>,
}

/// What the report says about the value network.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ValueNetSummary {
    pub file: String,
    /// 1 - Var(G - V) / Var(G) of its values against the discounted returns.
    pub explained_variance: Option<f64>,
    /// Where V(s_T) of truncated episodes comes from: `logged_next_observation` (the last
    /// row's next-observation columns) or `last_observation` (V(s_{T-1}), without them).
    pub bootstrap: String,
    pub note: String,
}

impl ValueCritic {
    pub fn load(path: &str, schema: &Schema) -> Result<ValueCritic> {
        Ok(ValueCritic {
            net: ValueNet::load(path, schema)?,
            file: path.to_string(),
            next_obs: next_obs_headers(schema),
        })
    }

    pub fn from_json(text: &str, file: &str, schema: &Schema) -> Result<ValueCritic> {
        Ok(ValueCritic {
            net: ValueNet::from_json(text, file, schema)?,
            file: file.to_string(),
            next_obs: next_obs_headers(schema),
        })
    }

    /// Replaces the episode's values by the network's, and a truncated end's bootstrap value
    /// by the network at the logged next observation, or without one at the last logged
    /// observation.
    pub fn apply(&self, ep: &mut Episode) {
        let values = self.net.values(ep).to_vec();
        if let End::Truncated { .. } = ep.end {
            let bootstrap = match &ep.next_obs {
                Some(next) => Some(self.net.value_at(next)),
                None => values.last().copied(),
            };
            ep.end = End::Truncated { bootstrap };
        }
        ep.values = Some(values);
    }

    pub fn summary(&self) -> ValueNetSummary {
        let (bootstrap, note) = match self.next_obs.as_slice() {
            [] => (
                FROM_LAST_OBS,
                "V(s_t) from the value network; the log has no next-observation columns, so \
                 truncated episodes bootstrap with V at their last logged observation \
                 (V(s_{T-1}) for V(s_T))"
                    .to_string(),
            ),
            cols => (
                FROM_NEXT_OBS,
                format!(
                    "V(s_t) from the value network; truncated episodes bootstrap with V at the \
                     next observation logged on their last row ({})",
                    span(cols)
                ),
            ),
        };
        ValueNetSummary {
            file: self.file.clone(),
            explained_variance: None,
            bootstrap: bootstrap.to_string(),
            note,
        }
    }
}

/// The headers of a log's next-observation elements.
fn next_obs_headers(schema: &Schema) -> Vec<String> {
    schema
        .next_obs
        .iter()
        .map(|&c| schema.headers[c].clone())
        .collect()
}

/// A few headers in words: all of up to three, else the first and the last.
pub fn span(cols: &[String]) -> String {
    match cols {
        [a, _, _, _, ..] => format!("{} .. {}", a, cols[cols.len() - 1]),
        _ => cols.join(", "),
    }
}

/// The code of the reader's warning about truncated ends without a bootstrap value.
pub const NO_BOOTSTRAP: &str = "truncated_without_bootstrap";

/// What the `truncated_without_bootstrap` warning adds when the run has no critic of its own:
/// the two options that give every truncated end a bootstrap value, `--value-net` (which needs
/// obs columns) and `--fit-value`. `how` says how to pass them (`"pass"` in an audit, `"audit
/// with"` in inspect).
pub fn no_bootstrap_hint(schema: &Schema, how: &str) -> String {
    if schema.obs.is_empty() {
        return format!(
            "; to bootstrap truncated episodes, {how} --fit-value (a cross-fitted ridge fit of \
             V; on time alone, as the log has no obs columns; reads the log twice), or add obs \
             columns for --value-net FILE"
        );
    }
    let at = match next_obs_headers(schema).as_slice() {
        [] => "its last logged observation, as the log has no next-observation columns".into(),
        cols => format!("the logged next observation ({})", span(cols)),
    };
    format!(
        "; to bootstrap truncated episodes, {how} --value-net FILE (a value network's V at \
         {at}) or --fit-value (a cross-fitted ridge fit of V on obs and time; reads the log twice)"
    )
}

/// Where a log's truncated episodes take their bootstrap state, in words (inspect).
pub fn bootstrap_state(schema: &Schema) -> String {
    match next_obs_headers(schema).as_slice() {
        [] => "last observation (the log has no next-observation columns)".to_string(),
        cols => format!("logged next observation ({})", span(cols)),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::episode::Layout;
    use crate::log::ColumnSpec;

    /// A value network of one identity layer on obs_0, obs_1: V(s) = w . s + b.
    const W: [f64; 2] = [0.5, -2.0];
    const B: f64 = 0.25;

    fn critic(headers: &[&str]) -> ValueCritic {
        let schema = Schema::resolve(
            &ColumnSpec::default(),
            headers.iter().map(|h| h.to_string()).collect(),
            "log.csv",
        )
        .unwrap();
        let desc = serde_json::json!({
            "schema": "gradaudit.policy/1",
            "family": "mlp_value",
            "features": ["obs_0", "obs_1"],
            "tensors": {"v.w": [W], "v.b": [B]},
            "layers": [{"weight": "v.w", "bias": "v.b", "activation": "identity"}],
        });
        ValueCritic::from_json(&desc.to_string(), "v.json", &schema).unwrap()
    }

    fn episode(next_obs: Option<Vec<f64>>, end: End) -> Episode {
        let mut ep = Episode::new(
            "e".into(),
            2,
            &Layout {
                obs_dim: 2,
                next_obs_dim: next_obs.as_ref().map_or(0, Vec::len),
                ..Layout::default()
            },
        );
        ep.rewards = vec![1.0, 0.0];
        ep.obs = vec![1.0, 2.0, -3.0, 0.5];
        ep.next_obs = next_obs;
        ep.end = end;
        ep
    }

    // Source: the closed form V(s) = w . s + b of a network with no hidden layer. With the
    // logged next observation s_T = (4, -1) the bootstrap is 0.5 * 4 - 2 * (-1) + 0.25 = 4.25;
    // without it, V at the last observation (-3, 0.5) = -1.5 - 1 + 0.25 = -2.25.
    #[test]
    fn truncated_episodes_bootstrap_at_the_logged_next_observation_if_any() {
        let with = critic(&[
            "episode",
            "reward",
            "obs_0",
            "obs_1",
            "next_obs_0",
            "next_obs_1",
        ]);
        let truncated = End::Truncated { bootstrap: None };
        let mut ep = episode(Some(vec![4.0, -1.0]), truncated);
        with.apply(&mut ep);
        assert_eq!(
            ep.end,
            End::Truncated {
                bootstrap: Some(4.25)
            }
        );
        assert_eq!(ep.values, Some(vec![0.5 - 4.0 + 0.25, -2.25]));
        assert_eq!(with.summary().bootstrap, FROM_NEXT_OBS);
        assert!(with.summary().note.contains("next_obs_0, next_obs_1"));

        let without = critic(&["episode", "reward", "obs_0", "obs_1"]);
        let mut ep = episode(None, truncated);
        without.apply(&mut ep);
        assert_eq!(
            ep.end,
            End::Truncated {
                bootstrap: Some(-2.25)
            }
        );
        assert_eq!(without.summary().bootstrap, FROM_LAST_OBS);

        // A terminated episode keeps V_T = 0 whatever the log holds.
        let mut ep = episode(Some(vec![4.0, -1.0]), End::Terminated);
        with.apply(&mut ep);
        assert_eq!(ep.end, End::Terminated);
    }
}
