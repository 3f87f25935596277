//! The clipped-action check. A score grad log pi(a_t | s_t) needs the action that was sampled;
//! many training stacks log the action after clipping it to the actuator's limits instead. For
//! a continuous policy an exact hit on a bound has probability zero (a quantised log makes it
//! about density x quantum, far below a percent), so a noticeable share of logged actions
//! sitting exactly on a bound means the log most likely holds clipped actions, whose scores are
//! wrong: they are evaluated at the bound, not at the sample, and bias every gradient.

use crate::episode::Episode;
use crate::error::{Error, Position, Result};
use crate::log::Schema;
use crate::warnings::Warnings;

/// Share of steps with an action component exactly on a bound above which we warn.
pub const CLIPPED_SHARE: f64 = 0.01;

/// The check for a policy description's `action_bounds` (one [low, high] per entry of its
/// `actions` list), or None when it gives none. The description has already been validated
/// as a policy, so its action names are columns of the log.
pub fn from_description(path: &str, schema: &Schema) -> Result<Option<ClipCheck>> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    let v: serde_json::Value =
        serde_json::from_str(&text).map_err(|e| bad(path, format!("invalid JSON: {e}")))?;
    let Some(bounds) = v.get("action_bounds") else {
        return Ok(None);
    };
    let bounds: Vec<[f64; 2]> = serde_json::from_value(bounds.clone()).map_err(|_| {
        bad(
            path,
            "\"action_bounds\" must be a list of [low, high] pairs",
        )
    })?;
    let names: Vec<String> = v
        .get("actions")
        .and_then(|a| serde_json::from_value(a.clone()).ok())
        .ok_or_else(|| {
            bad(
                path,
                "\"action_bounds\" needs the \"actions\" list it bounds",
            )
        })?;
    if names.len() != bounds.len() {
        return Err(bad(
            path,
            format!(
                "\"action_bounds\" has {} pairs for {} actions",
                bounds.len(),
                names.len()
            ),
        ));
    }
    let mut out = Vec::new();
    for (name, [lo, hi]) in names.into_iter().zip(bounds) {
        if !(lo.is_finite() && hi.is_finite() && lo < hi) {
            return Err(bad(
                path,
                format!("action bounds [{lo}, {hi}] of '{name}' must be finite with low < high"),
            ));
        }
        let pos = schema
            .act
            .iter()
            .position(|&c| schema.headers[c] == name)
            .ok_or_else(|| {
                bad(
                    path,
                    format!("action '{name}' is not an act column of the log"),
                )
            })?;
        out.push((pos, name, lo, hi));
    }
    Ok(Some(ClipCheck::new(out)))
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

/// Counts, per action component, the steps whose logged action equals a bound.
#[derive(Debug, Clone, PartialEq)]
pub struct ClipCheck {
    /// Position in the episode's act vector, name, and bounds of each bounded component.
    bounds: Vec<(usize, String, f64, f64)>,
    hits: Vec<u64>,
    steps: u64,
    /// Episode id and step of the first hit.
    first: Option<String>,
}

impl ClipCheck {
    /// `bounds`: (act position, column name, low, high) of each component with limits.
    pub fn new(bounds: Vec<(usize, String, f64, f64)>) -> ClipCheck {
        let n = bounds.len();
        ClipCheck {
            bounds,
            hits: vec![0; n],
            steps: 0,
            first: None,
        }
    }

    pub fn push(&mut self, ep: &Episode) {
        for t in 0..ep.len() {
            let act = &ep.act[t * ep.act_dim..(t + 1) * ep.act_dim];
            for (c, (pos, _, lo, hi)) in self.bounds.iter().enumerate() {
                let a = act[*pos];
                if a == *lo || a == *hi {
                    self.hits[c] += 1;
                    if self.first.is_none() {
                        self.first = Some(format!(
                            "episode '{}' (starting at line {}), step {t}",
                            ep.id, ep.first_line
                        ));
                    }
                }
            }
        }
        self.steps += ep.len() as u64;
    }

    /// Adds the warning, counted once per step and component on a bound, when some
    /// component's share reaches [`CLIPPED_SHARE`].
    pub fn warn(&self, warnings: &mut Warnings) {
        if self.steps == 0 {
            return;
        }
        let shares: Vec<(usize, f64)> = self
            .hits
            .iter()
            .enumerate()
            .map(|(c, &h)| (c, h as f64 / self.steps as f64))
            .filter(|(_, s)| *s >= CLIPPED_SHARE)
            .collect();
        if shares.is_empty() {
            return;
        }
        let listed: Vec<String> = shares
            .iter()
            .map(|&(c, s)| {
                let (_, name, lo, hi) = &self.bounds[c];
                format!("{name} {:.1}% at {lo} or {hi}", 100.0 * s)
            })
            .collect();
        let total: u64 = shares.iter().map(|&(c, _)| self.hits[c]).sum();
        warnings.add_many(
            "clipped_actions",
            format!(
                "logged actions sit exactly on the policy's action bounds ({}): the log may hold \
                 actions clipped to the actuator limits rather than the sampled ones, and the \
                 scores of those steps are then wrong (log the action before clipping)",
                listed.join(", ")
            ),
            self.first.clone(),
            total,
        );
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::episode::{End, Episode};

    fn episode(acts: &[f64]) -> Episode {
        Episode {
            id: "e".into(),
            key: b"e".to_vec(),
            first_line: 2,
            lines: Vec::new(),
            logged: Vec::new(),
            logged_names: Vec::new().into(),
            rewards: vec![0.0; acts.len()],
            values: None,
            q: None,
            logp: None,
            score_dim: 0,
            scores: Vec::new(),
            obs_dim: 0,
            obs: Vec::new(),
            act_dim: 1,
            act: acts.to_vec(),
            end: End::Terminated,
            env: None,
        }
    }

    #[test]
    fn warns_on_a_share_of_exact_bound_hits_only() {
        let mut c = ClipCheck::new(vec![(0, "act_0".into(), -1.0, 1.0)]);
        // 1 hit in 200 steps: 0.5%, below the share.
        let mut acts: Vec<f64> = (0..200).map(|i| (i as f64 / 200.0) - 0.5).collect();
        acts[7] = 1.0;
        c.push(&episode(&acts));
        let mut w = Warnings::default();
        c.warn(&mut w);
        assert_eq!(w.count("clipped_actions"), 0);
        // 3 more hits in another 100 steps: 4 of 300 = 1.3%.
        let mut more = vec![0.25; 100];
        more[1] = -1.0;
        more[2] = 1.0;
        more[3] = 1.0;
        c.push(&episode(&more));
        c.warn(&mut w);
        assert_eq!(w.count("clipped_actions"), 4);
        let line = &w.lines()[0];
        assert!(line.contains("act_0 1.3% at -1 or 1"), "{line}");
        assert!(line.contains("step 7"), "{line}");
    }
}
