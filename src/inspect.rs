//! `inspect`: what a user checks before trusting a log. One pass, per-episode lengths and
//! returns only.

use crate::episode::End;
use crate::error::Result;
use crate::log::{Assignment, LogReader};
use crate::warnings::Warnings;
use serde::Serialize;

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
        if values.is_empty() {
            return None;
        }
        let n = values.len() as f64;
        let mean = values.iter().sum::<f64>() / n;
        let sd = (values.len() > 1)
            .then(|| (values.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt());
        let mut sorted = values.to_vec();
        sorted.sort_by(f64::total_cmp);
        Some(Summary {
            mean,
            sd,
            min: sorted[0],
            median: crate::stats::percentile(&sorted, 0.5),
            max: sorted[sorted.len() - 1],
        })
    }
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct InspectReport {
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
) -> Result<InspectReport> {
    let (mut recorded, mut fitted, mut buf) = (
        crate::critic::ExplainedVariance::default(),
        crate::critic::ExplainedVariance::default(),
        Vec::new(),
    );
    let mut lengths = Vec::new();
    let mut returns = Vec::new();
    let (mut terminated, mut truncated, mut boot) = (0, 0, 0);
    while let Some(mut ep) = reader.next_episode()? {
        recorded.push_episode(&ep, gamma, &mut buf);
        if let Some(c) = critic {
            c.apply(&mut ep);
            fitted.push_episode(&ep, gamma, &mut buf);
        }
        lengths.push(ep.len() as f64);
        returns.push(ep.total_reward());
        match ep.end {
            End::Terminated => terminated += 1,
            End::Truncated { bootstrap } => {
                truncated += 1;
                boot += u64::from(bootstrap.is_some());
            }
        }
    }
    let schema = reader.schema();
    let columns = schema.assignments();
    let used: Vec<usize> = columns
        .iter()
        .flat_map(|a| a.columns.iter().copied())
        .collect();
    let unused_columns = (1..=schema.headers.len())
        .filter(|c| !used.contains(c))
        .map(|c| schema.headers[c - 1].clone())
        .collect();
    Ok(InspectReport {
        file: reader.file().to_string(),
        rows: reader.rows(),
        episodes: lengths.len() as u64,
        steps: lengths.iter().sum::<f64>() as u64,
        terminated,
        truncated,
        truncated_with_bootstrap: boot,
        episode_length: Summary::of(&lengths),
        episode_return: Summary::of(&returns),
        score_dim: schema.scores.len(),
        obs_dim: schema.obs.len(),
        act_dim: schema.act.len(),
        columns,
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
        warnings: reader.warnings().clone(),
        policy: None,
    })
}
