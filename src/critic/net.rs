//! A value network as the critic (`--value-net FILE`): V(s_t) = f(s_t) for an `mlp_value`
//! description (policy/spec.rs: its trunk's last layer has one output), for logs without a value
//! column, or to replace the one they have.
//!
//! The bootstrap value of a truncated episode, V(s_T), needs the state after the last step.
//! The log's rows hold the state each action was taken in, s_0 .. s_{T-1}, and no next
//! observation, so V(s_T) is approximated by V(s_{T-1}), the network at the last logged
//! observation; the report says so (`value_net.bootstrap`). Terminated episodes need no
//! bootstrap value (V_T = 0).

use crate::episode::{End, Episode};
use crate::error::Result;
use crate::log::Schema;
use crate::policy::spec::ValueNet;
use serde::Serialize;

/// How the bootstrap value of truncated episodes is obtained.
pub const BOOTSTRAP_FROM: &str = "last_observation";

/// A loaded value network.
#[derive(Debug, Clone, PartialEq)]
pub struct ValueCritic {
    net: ValueNet,
    file: String,
}

/// What the report says about the value network.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ValueNetSummary {
    pub file: String,
    /// 1 - Var(G - V) / Var(G) of its values against the discounted returns.
    pub explained_variance: Option<f64>,
    /// Where V(s_T) of truncated episodes comes from: `last_observation` (V(s_{T-1})).
    pub bootstrap: String,
    pub note: String,
}

impl ValueCritic {
    pub fn load(path: &str, schema: &Schema) -> Result<ValueCritic> {
        Ok(ValueCritic {
            net: ValueNet::load(path, schema)?,
            file: path.to_string(),
        })
    }

    pub fn from_json(text: &str, file: &str, schema: &Schema) -> Result<ValueCritic> {
        Ok(ValueCritic {
            net: ValueNet::from_json(text, file, schema)?,
            file: file.to_string(),
        })
    }

    /// Replaces the episode's values by the network's, and a truncated end's bootstrap value
    /// by the network at the last logged observation.
    pub fn apply(&self, ep: &mut Episode) {
        let values = self.net.values(ep).to_vec();
        if let (End::Truncated { .. }, Some(&last)) = (ep.end, values.last()) {
            ep.end = End::Truncated {
                bootstrap: Some(last),
            };
        }
        ep.values = Some(values);
    }

    pub fn summary(&self) -> ValueNetSummary {
        ValueNetSummary {
            file: self.file.clone(),
            explained_variance: None,
            bootstrap: BOOTSTRAP_FROM.to_string(),
            note: "V(s_t) from the value network; the log holds no next observation, so \
                   truncated episodes bootstrap with V at their last logged observation \
                   (V(s_{T-1}) for V(s_T))"
                .to_string(),
        }
    }
}
