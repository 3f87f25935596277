//! `inspect`: what a user checks before trusting a log. One pass, per-episode lengths and
//! returns only.
//!
//! Order independence: the summaries are computed after sorting (returns) or from a histogram
//! in length order (lengths), and the critic sums are exact (critic/exact.rs), so any row
//! order of the same episodes gives bit-identical figures. Memory: the lengths are a
//! histogram (at most sqrt(2 x steps) distinct values, since distinct lengths sum to at most
//! the steps), the returns 8 bytes per episode for the exact median, checked against the
//! memory budget.

use crate::episode::End;
use crate::error::Result;
use crate::limits::Budget;
use crate::log::{Assignment, LogReader};
use crate::warnings::Warnings;
use serde::Serialize;
use std::collections::BTreeMap;

/// Five-number-style summary of a sample; fields are absent for an empty sample.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Summary {
    pub mean: f64,
    /// Sample standard deviation (n - 1); null with one value.
    pub sd: Option<f64>,
    pub min: f64,
    pub median: f64,
    pub max: f64,
}

impl Summary {
    pub fn of(values: &[f64]) -> Option<Summary> {
        let mut sorted = values.to_vec();
        sorted.sort_by(f64::total_cmp);
        Summary::of_sorted(&sorted)
    }

    /// The summary of sorted data; sums run in sorted order, so the figures depend only on the
    /// multiset of values, not on the order they arrived in.
    pub fn of_sorted(sorted: &[f64]) -> Option<Summary> {
        if sorted.is_empty() {
            return None;
        }
        let n = sorted.len() as f64;
        let mean = sorted.iter().sum::<f64>() / n;
        let sd = (sorted.len() > 1)
            .then(|| (sorted.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt());
        Some(Summary {
            mean,
            sd,
            min: sorted[0],
            median: crate::stats::percentile(sorted, 0.5),
            max: sorted[sorted.len() - 1],
        })
    }

    /// The summary of a histogram of whole numbers (value -> count), exactly as [`Summary::of`]
    /// would give on the expanded data up to the order of its sums (here by value).
    pub fn of_counts(counts: &BTreeMap<u64, u64>) -> Option<Summary> {
        let n: u64 = counts.values().sum();
        if n == 0 {
            return None;
        }
        let total: u128 = counts.iter().map(|(&v, &c)| v as u128 * c as u128).sum();
        let nf = n as f64;
        let mean = total as f64 / nf;
        let sd = (n > 1).then(|| {
            let ss: f64 = counts
                .iter()
                .map(|(&v, &c)| c as f64 * (v as f64 - mean).powi(2))
                .sum();
            (ss / (nf - 1.0)).sqrt()
        });
        // Type-7 median: the values at ranks floor(h) and floor(h) + 1, h = (n - 1) / 2.
        let nth = |rank: u64| -> f64 {
            let mut seen = 0;
            for (&v, &c) in counts {
                seen += c;
                if rank < seen {
                    return v as f64;
                }
            }
            unreachable!("rank < n")
        };
        let h = (n - 1) as f64 * 0.5;
        let lo = h.floor() as u64;
        let (a, b) = (nth(lo), nth((lo + 1).min(n - 1)));
        Some(Summary {
            mean,
            sd,
            min: *counts.keys().next().expect("n > 0") as f64,
            median: a + (h - lo as f64) * (b - a),
            max: *counts.keys().next_back().expect("n > 0") as f64,
        })
    }
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct InspectReport {
    /// The program and the wire schema (`gradaudit.inspect/1`), as in the other commands' JSON.
    pub tool: crate::report::Tool,
    pub file: String,
    pub rows: u64,
    pub episodes: u64,
    pub steps: u64,
    pub terminated: u64,
    pub truncated: u64,
    pub truncated_with_bootstrap: u64,
    pub episode_length: Option<Summary>,
    pub episode_return: Option<Summary>,
    pub score_dim: usize,
    pub obs_dim: usize,
    pub act_dim: usize,
    pub columns: Vec<Assignment>,
    /// How the end flags were read (the convention and the columns that decided it).
    pub end_flags: crate::log::EndFlags,
    /// Where a value network (`--value-net`) takes the bootstrap state of truncated episodes:
    /// the logged next observation, or the last observation; shown for logs with obs columns.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bootstrap_state: Option<String>,
    /// Header columns that got no role and are ignored.
    pub unused_columns: Vec<String>,
    /// Discount of the returns the critic quality refers to.
    pub gamma: f64,
    pub critic: crate::critic::CriticQuality,
    pub warnings: Warnings,
    /// The policy given with --policy, as checked against the log's columns.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub policy: Option<crate::policy::summary::PolicySummary>,
}

pub fn run(
    mut reader: LogReader,
    gamma: f64,
    critic: Option<&crate::critic::Critic>,
    budget: Budget,
) -> Result<InspectReport> {
    let (mut recorded, mut fitted, mut buf) = (
        crate::critic::ExplainedVariance::default(),
        crate::critic::ExplainedVariance::default(),
        Vec::new(),
    );
    let mut lengths: BTreeMap<u64, u64> = BTreeMap::new();
    let mut returns: Vec<f64> = Vec::new();
    let (mut held, mut returns_len) = (budget.charge(crate::limits::Holder::Summaries), 0);
    let (mut terminated, mut truncated, mut boot, mut steps) = (0, 0, 0, 0u64);
    while let Some(mut ep) = reader.next_episode()? {
        recorded.push_episode(&ep, gamma, &mut buf);
        if let Some(c) = critic {
            c.apply(&mut ep);
            fitted.push_episode(&ep, gamma, &mut buf);
        }
        *lengths.entry(ep.len() as u64).or_insert(0) += 1;
        steps += ep.len() as u64;
        // The returns (for the exact median; their vector's capacity, as it grows) and the
        // length histogram (a BTreeMap node of about 16 bytes per distinct length, plus
        // overhead), on the ledger the reader charges too.
        let histogram = 64 * lengths.len() as u64;
        held.reserve(
            &mut returns,
            1,
            histogram,
            || {
                format!(
                    "{}: the returns of {} episodes (kept for the exact median)",
                    reader.file(),
                    returns_len + 1
                )
            },
            "raise --max-memory",
        )?;
        returns.push(ep.total_reward());
        returns_len = returns.len();
        match ep.end {
            End::Terminated => terminated += 1,
            End::Truncated { bootstrap } => {
                truncated += 1;
                boot += u64::from(bootstrap.is_some());
            }
        }
    }
    returns.sort_by(f64::total_cmp);
    let schema = reader.schema();
    let columns = schema.assignments();
    let used: Vec<usize> = columns
        .iter()
        .flat_map(|a| a.columns.iter().copied())
        .collect();
    let unused_columns = (1..=schema.file_columns())
        .filter(|c| !used.contains(c))
        .map(|c| schema.headers[c - 1].clone())
        .collect();
    Ok(InspectReport {
        tool: crate::report::Tool::with_schema("gradaudit.inspect/1"),
        file: reader.file().to_string(),
        rows: reader.rows(),
        episodes: returns.len() as u64,
        steps,
        terminated,
        truncated,
        truncated_with_bootstrap: boot,
        episode_length: Summary::of_counts(&lengths),
        episode_return: Summary::of_sorted(&returns),
        score_dim: schema.scores.len(),
        obs_dim: schema.obs.len(),
        act_dim: schema.act.len(),
        columns,
        end_flags: schema.end_flags(),
        bootstrap_state: (!schema.obs.is_empty() || !schema.next_obs.is_empty())
            .then(|| crate::critic::net::bootstrap_state(schema)),
        unused_columns,
        gamma,
        critic: crate::critic::CriticQuality {
            recorded_explained_variance: schema
                .has(crate::log::Role::Value)
                .then(|| recorded.value())
                .flatten(),
            fitted_explained_variance: fitted.value(),
            fitted_folds: critic.map(|c| c.folds()),
            fitted_features: critic.map(|c| c.features()),
        },
        warnings: {
            let mut w = reader.warnings().clone();
            let hint = crate::critic::net::no_bootstrap_hint(schema, "audit with");
            w.amend(crate::critic::net::NO_BOOTSTRAP, &hint);
            w
        },
        policy: None,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    // The histogram summary against the plain one on the expanded data (same definitions:
    // sample sd with n - 1, type-7 median), for an odd and an even count.
    #[test]
    fn length_histogram_summary_equals_the_summary_of_the_expanded_lengths() {
        for counts in [vec![(3, 2), (5, 1), (10, 3)], vec![(1, 1), (4, 2), (60, 4)]] {
            let map: BTreeMap<u64, u64> = counts.iter().copied().collect();
            let expanded: Vec<f64> = counts
                .iter()
                .flat_map(|&(v, c)| std::iter::repeat_n(v as f64, c as usize))
                .collect();
            let (h, plain) = (
                Summary::of_counts(&map).unwrap(),
                Summary::of(&expanded).unwrap(),
            );
            assert_eq!(
                (h.mean, h.min, h.median, h.max),
                (plain.mean, plain.min, plain.median, plain.max)
            );
            assert!((h.sd.unwrap() - plain.sd.unwrap()).abs() < 1e-13);
        }
        // One episode: no sd; none: no summary.
        let one: BTreeMap<u64, u64> = [(7, 1)].into_iter().collect();
        assert_eq!(Summary::of_counts(&one).unwrap().sd, None);
        assert_eq!(Summary::of_counts(&BTreeMap::new()), None);
    }

    // Sums over sorted values: the same multiset in any order gives the same bits.
    #[test]
    fn return_summary_does_not_depend_on_arrival_order() {
        let xs = [0.1, 1e16, -3.7, 2.2e-9, -1e16, 5.0, 0.3];
        let mut ys = xs;
        ys.reverse();
        ys.swap(1, 4);
        assert_eq!(Summary::of(&xs), Summary::of(&ys));
    }
}
