//! Where each episode's score vectors come from, and their computation ahead of the audit's
//! single pass: the log's score columns, a policy file (linear family or network), and
//! optionally their random projection (policy/projection.rs) when the policy is large.
//!
//! Computing scores from a network is the expensive part of a run, so episodes are read in
//! batches (bounded in bytes) and scored in parallel; each episode's scores depend on that
//! episode alone, so the result is identical for any thread count, and episodes leave in file
//! order.

use super::{AuditConfig, ScoresFrom};
use crate::episode::Episode;
use crate::error::{Error, Result};
use crate::log::LogReader;
use crate::policy::Policy;
use crate::policy::clipping::ClipCheck;
use crate::policy::projection::{GroupGrad, Projection, ThetaGroup};
use rayon::prelude::*;
use std::collections::VecDeque;

/// The score vectors of a run: their dimension, names, the policy that computes them and the
/// projection applied to them.
pub struct Scores {
    /// Dimension of the audited score vectors (K when projected).
    pub dim: usize,
    pub names: Vec<String>,
    pub policy: Option<Policy>,
    pub projection: Option<Projection>,
    /// Action bounds of the policy description, for the clipped-action check.
    pub clip: Option<ClipCheck>,
}

fn missing_scores(reader: &LogReader) -> Error {
    Error::usage(format!(
        "{}: the log has no score columns, and gradients need the score vector \
         grad log pi(a_t | s_t) of every step; log them as score_0..score_{{d-1}} (or name \
         their prefix with --score-prefix), or give --policy FILE to compute them from the \
         obs and act columns",
        reader.file()
    ))
}

/// Where the score vectors come from: the log's score columns or a policy file.
pub fn scores(reader: &LogReader, cfg: &AuditConfig) -> Result<Scores> {
    let schema = reader.schema();
    let logged = schema.score_dim();
    let policy = match (&cfg.policy, logged, cfg.scores_from) {
        (None, 0, _) => return Err(missing_scores(reader)),
        (None, _, Some(ScoresFrom::Policy)) => {
            return Err(Error::usage("--scores-from policy needs --policy FILE"));
        }
        (None, _, _) | (Some(_), _, Some(ScoresFrom::Columns)) => None,
        (Some(_), d, None) if d > 0 => {
            return Err(Error::usage(format!(
                "{}: the log has {d} score columns and a policy file was given; say which \
                 scores to use with --scores-from policy or --scores-from columns",
                reader.file()
            )));
        }
        (Some(path), _, _) => Some((path, Policy::load(path, schema)?)),
    };
    let (full_dim, names, groups) = match &policy {
        Some((_, p)) => (
            p.dim(),
            p.parameters.clone(),
            p.network()
                .map_or_else(|| vec![plain_group(p.dim())], |n| n.theta_groups().to_vec()),
        ),
        None => (
            logged,
            schema
                .scores
                .iter()
                .map(|&c| schema.headers[c].clone())
                .collect(),
            vec![plain_group(logged)],
        ),
    };
    let k = projection_size(cfg, full_dim, policy.is_some())?;
    let clip = match &policy {
        Some((path, _)) => crate::policy::clipping::from_description(path, schema)?,
        None => None,
    };
    let policy = policy.map(|(_, p)| p);
    Ok(match k {
        None => Scores {
            dim: full_dim,
            names,
            policy,
            projection: None,
            clip,
        },
        Some(k) => Scores {
            dim: k,
            names: (0..k).map(|j| format!("projection_{j}")).collect(),
            policy,
            projection: Some(Projection::new(&groups, k, cfg.seed)),
            clip,
        },
    })
}

fn plain_group(d: usize) -> ThetaGroup {
    ThetaGroup {
        name: "scores".into(),
        shape: vec![d],
        size: d,
    }
}

/// The number of projections to use, or None for exact scores. `auto` projects scores that
/// gradaudit computes from a policy; logged score columns only on an explicit `--project K`.
fn projection_size(cfg: &AuditConfig, d: usize, from_policy: bool) -> Result<Option<usize>> {
    use crate::policy::projection::ProjectMode;
    match (cfg.sketch, cfg.project) {
        (Some(_), ProjectMode::K(_)) => Err(Error::usage(
            "--score-sketch says the score columns already are projections; do not combine it \
             with --project K",
        )),
        (Some(_), _) => Ok(None),
        (None, ProjectMode::Auto) if !from_policy => Ok(None),
        (None, mode) => Ok(mode.k_for(d)),
    }
}

/// Steps x floats an episode batch may hold before it is scored (about 64 MB of f64).
const BATCH_FLOATS: usize = 8 << 20;

/// Reads episodes in batches and computes their scores in parallel, handing them out in file
/// order.
pub struct Scorer<'a> {
    scores: &'a Scores,
    queue: VecDeque<Episode>,
    done: bool,
    /// The batch's bytes on the budget's ledger, and the floats a batch may hold.
    charge: Option<crate::limits::Charge>,
    batch_floats: usize,
}

impl<'a> Scorer<'a> {
    pub fn new(scores: &'a Scores) -> Scorer<'a> {
        Scorer {
            scores,
            queue: VecDeque::new(),
            done: false,
            charge: None,
            batch_floats: BATCH_FLOATS,
        }
    }

    /// Charges the batches to `budget`'s ledger; a batch takes at most an eighth of it.
    pub fn with_budget(mut self, budget: &crate::limits::Budget) -> Scorer<'a> {
        self.batch_floats = BATCH_FLOATS.min((budget.bytes / 64) as usize).max(1);
        self.charge = Some(budget.charge(crate::limits::Holder::Scoring));
        self
    }

    /// The next episode with its scores, or None at the end of the log.
    pub fn next(&mut self, reader: &mut LogReader) -> Result<Option<Episode>> {
        if self.queue.is_empty() && !self.done {
            self.fill(reader)?;
        }
        Ok(self.queue.pop_front())
    }

    fn fill(&mut self, reader: &mut LogReader) -> Result<()> {
        let s = self.scores;
        let computed = s.policy.is_some() || s.projection.is_some();
        let schema = reader.schema();
        let per_step = schema
            .score_dim()
            .max(s.policy.as_ref().map_or(0, Policy::dim))
            + schema.obs.len()
            + schema.act.len()
            + 1;
        let mut batch = Vec::new();
        let mut floats = 0;
        // The last batch has been handed out (and its episodes dropped by the caller).
        if let Some(c) = &mut self.charge {
            c.force(0);
        }
        loop {
            match reader.next_episode()? {
                None => {
                    self.done = true;
                    break;
                }
                Some(ep) => {
                    floats += ep.len() * per_step;
                    batch.push(ep);
                    if !computed || floats >= self.batch_floats {
                        break;
                    }
                    if let Some(c) = &mut self.charge {
                        let n = batch.len();
                        c.set(
                            8 * floats as u64,
                            || format!("{n} episodes read ahead to compute their scores"),
                            "raise --max-memory",
                        )?;
                    }
                }
            }
        }
        if computed {
            let file = reader.file().to_string();
            let results: Vec<Result<()>> = groups(&mut batch)
                .into_par_iter()
                .map(|group| score_group(s, group, &file))
                .collect();
            // The first failure in file order, whatever thread found it.
            results.into_iter().collect::<Result<Vec<()>>>()?;
        }
        self.queue.extend(batch);
        Ok(())
    }
}

/// Steps scored by one call of the network: short episodes are stacked until this many rows,
/// so that each matrix product amortises packing the weights. Larger groups measured worse on
/// a 2 x 64 actor (1,024 rows: 3x the system time, from page faults of the bigger temporaries).
const GROUP_ROWS: usize = 256;

/// Consecutive runs of episodes of about [`GROUP_ROWS`] steps (at least one episode each). The
/// grouping depends on the episode lengths only, not on the thread count.
fn groups(batch: &mut [Episode]) -> Vec<&mut [Episode]> {
    let mut out = Vec::new();
    let mut rest = batch;
    while !rest.is_empty() {
        let (mut n, mut rows) = (0, 0);
        while n < rest.len() && (n == 0 || rows + rest[n].len() <= GROUP_ROWS) {
            rows += rest[n].len();
            n += 1;
        }
        let (head, tail) = rest.split_at_mut(n);
        out.push(head);
        rest = tail;
    }
    out
}

/// Scores a group of episodes: one network call over their stacked steps when a network's
/// scores are projected (each step's score depends on its own row only), else episode by
/// episode.
fn score_group(s: &Scores, group: &mut [Episode], file: &str) -> Result<()> {
    let (Some(proj), Some(p)) = (&s.projection, &s.policy) else {
        return group.iter_mut().try_for_each(|ep| score_one(s, ep, file));
    };
    let Some(net) = p.network() else {
        return group.iter_mut().try_for_each(|ep| score_one(s, ep, file));
    };
    let inputs: Vec<_> = group.iter().map(|ep| p.inputs(ep)).collect();
    let obs: Vec<_> = inputs.iter().map(|(o, _)| o.view()).collect();
    let act: Vec<_> = inputs.iter().map(|(_, a)| a.view()).collect();
    let obs = ndarray::concatenate(ndarray::Axis(0), &obs).expect("same obs width");
    let act = ndarray::concatenate(ndarray::Axis(0), &act).expect("same act width");
    let factors = net.score_factors(obs.view(), act.view()).map_err(|mut e| {
        // Back from a row of the stack to its episode and step.
        let mut i = 0;
        while e.step >= group[i].len() {
            e.step -= group[i].len();
            i += 1;
        }
        p.step_error(&group[i], file, e)
    })?;
    let projected = proj.project(&factors);
    let mut row = 0;
    for ep in group.iter_mut() {
        let t = ep.len();
        ep.scores = projected
            .slice(ndarray::s![row..row + t, ..])
            .iter()
            .copied()
            .collect();
        ep.score_dim = proj.k();
        row += t;
    }
    Ok(())
}

/// Computes (and projects) one episode's scores in place.
fn score_one(s: &Scores, ep: &mut Episode, file: &str) -> Result<()> {
    let Some(proj) = &s.projection else {
        if let Some(p) = &s.policy {
            p.score_episode(ep, file, ep.first_line)?;
        }
        return Ok(());
    };
    let projected = match &s.policy {
        Some(p) => match p.network() {
            Some(net) => {
                let (obs, act) = p.inputs(ep);
                let factors = net
                    .score_factors(obs.view(), act.view())
                    .map_err(|e| p.step_error(ep, file, e))?;
                proj.project(&factors)
            }
            None => {
                p.score_episode(ep, file, ep.first_line)?;
                project_dense(proj, ep)
            }
        },
        None => project_dense(proj, ep),
    };
    ep.score_dim = proj.k();
    ep.scores = projected.into_raw_vec_and_offset().0;
    Ok(())
}

/// Projects an episode's dense T x d scores (one plain group).
fn project_dense(proj: &Projection, ep: &Episode) -> ndarray::Array2<f64> {
    let scores = ndarray::Array2::from_shape_vec((ep.len(), ep.score_dim), ep.scores.clone())
        .expect("T x d scores");
    proj.project(&[GroupGrad::Full(scores)])
}
