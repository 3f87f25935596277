//! `crosscheck`: checks a training stack's own logged advantages or value targets against the
//! reference computation of the estimator it claims to use, and, when they differ, names the
//! known fault that explains the difference.
//!
//! Pipeline: the episodes of the log (with the logged column carried as `Episode::logged`) are
//! held in memory, in file order; [`reference`] recomputes each step's value with the audit's
//! own scans; [`tolerance`] sets each step's allowed difference from the column's precision
//! and the magnitudes summed; the agreement figures follow. When steps differ beyond
//! tolerance, every fault of the catalogue ([`variants`], and the gamma/lambda fit in [`fit`])
//! recomputes the column the way the faulty code would, and a variant *explains* the column
//! when every step lies within tolerance of it and it differs from the reference somewhere.
//!
//! Memory: the check needs whole streams of the log (faults that carry a trace across
//! episodes in file order cannot be evaluated episode by episode), so it holds about 36
//! numbers per step; the budget (--max-memory) is checked as episodes arrive.

pub mod fit;
pub mod reference;
pub mod tolerance;
pub mod variants;

#[cfg(test)]
mod tests;

use crate::episode::{End, Episode};
use crate::error::{Error, Position, Result};
use crate::estimator::Estimator;
use crate::log::LogReader;
use crate::report::crosscheck::{
    Agreement, ColumnReport, CrosscheckReport, EpisodeCount, Input, Row, VariantResult,
};
use crate::report::finite;
use tolerance::{Precision, Rule};

/// The estimator the training stack claims its column follows.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Claim {
    /// GAE(lambda).
    Gae(f64),
    /// n-step advantages with window n.
    NStep(usize),
    /// The discounted return, bootstrapped with V_T at truncation (A_t = R_t - V_t).
    Return,
}

/// A claim with its discount.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Claimed {
    pub claim: Claim,
    pub gamma: f64,
}

impl Claimed {
    /// From an estimator name: `gae:L`, `nstep:N` or `rtg_discounted` (the discounted return).
    pub fn parse(text: &str, gamma: f64) -> std::result::Result<Claimed, String> {
        if !(0.0..=1.0).contains(&gamma) {
            return Err(format!("gamma {gamma} must lie in [0, 1]"));
        }
        let claim = match Estimator::parse(text)? {
            Estimator::Gae(l) => Claim::Gae(l),
            Estimator::NStep(n) => Claim::NStep(n),
            Estimator::RtgDiscounted => Claim::Return,
            other => {
                return Err(format!(
                    "'{other}' is not a computation crosscheck checks; give gae:L, nstep:N or \
                     rtg_discounted (the discounted return)"
                ));
            }
        };
        Ok(Claimed { claim, gamma })
    }

    /// The claim with another discount and, for GAE, another lambda.
    pub fn with(self, gamma: f64, lambda: Option<f64>) -> Claimed {
        let claim = match (self.claim, lambda) {
            (Claim::Gae(_), Some(l)) => Claim::Gae(l),
            (c, _) => c,
        };
        Claimed { claim, gamma }
    }

    pub fn lambda(self) -> Option<f64> {
        match self.claim {
            Claim::Gae(l) => Some(l),
            _ => None,
        }
    }

    /// The factor of the backward recursion: gamma lambda (GAE), gamma (returns, n-step).
    pub fn decay(self) -> f64 {
        match self.claim {
            Claim::Gae(l) => self.gamma * l,
            Claim::NStep(_) | Claim::Return => self.gamma,
        }
    }

    pub fn name(self) -> String {
        match self.claim {
            Claim::Gae(l) => Estimator::Gae(l).to_string(),
            Claim::NStep(n) => Estimator::NStep(n).to_string(),
            Claim::Return => Estimator::RtgDiscounted.to_string(),
        }
    }

    fn needs_values(self) -> bool {
        !matches!(self.claim, Claim::Return)
    }
}

/// Which column is checked.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    /// Advantages A_t.
    Advantage,
    /// Value targets (returns) A_t + V_t.
    Return,
}

impl Kind {
    pub fn key(self) -> &'static str {
        match self {
            Kind::Advantage => "advantage",
            Kind::Return => "return",
        }
    }
}

/// What to check.
#[derive(Debug, Clone, PartialEq)]
pub struct CheckConfig {
    pub claim: Claimed,
    /// Header of the logged advantage column.
    pub advantage: Option<String>,
    /// Header of the logged value-target column.
    pub ret: Option<String>,
    /// One absolute tolerance for every step instead of the data-derived one.
    pub tolerance: Option<f64>,
    pub budget: crate::limits::Budget,
}

impl CheckConfig {
    /// The columns to check, in report order.
    pub fn columns(&self) -> Vec<(Kind, String)> {
        let mut out = Vec::new();
        if let Some(a) = &self.advantage {
            out.push((Kind::Advantage, a.clone()));
        }
        if let Some(r) = &self.ret {
            out.push((Kind::Return, r.clone()));
        }
        out
    }
}

/// The log held for the check: its episodes in file order (by first line), each step's
/// position in the flat step arrays, and the reader's summary.
pub struct Batch {
    pub file: String,
    pub episodes: Vec<Episode>,
    /// Flat offset of each episode's first step.
    pub offsets: Vec<usize>,
    pub values: Vec<Vec<f64>>,
    pub steps: usize,
}

impl Batch {
    /// Builds a batch from episodes (any order): sorted by first line, stable.
    pub fn new(file: &str, mut episodes: Vec<Episode>) -> Batch {
        episodes.sort_by_key(|e| e.first_line);
        let mut offsets = Vec::with_capacity(episodes.len());
        let mut steps = 0;
        for e in &episodes {
            offsets.push(steps);
            steps += e.len();
        }
        let values = episodes.iter().map(reference::values).collect();
        Batch {
            file: file.to_string(),
            episodes,
            offsets,
            values,
            steps,
        }
    }

    /// The source line of step t of episode e (first line + t for episodes built in memory).
    pub fn line(&self, e: usize, t: usize) -> u64 {
        let ep = &self.episodes[e];
        ep.lines.get(t).copied().unwrap_or(ep.first_line + t as u64)
    }

    /// (episode, step) of every flat index.
    pub fn locate(&self) -> Vec<(usize, usize)> {
        let mut out = Vec::with_capacity(self.steps);
        for (e, ep) in self.episodes.iter().enumerate() {
            out.extend((0..ep.len()).map(|t| (e, t)));
        }
        out
    }

    /// Concatenates a per-episode computation into a flat column.
    pub fn flat(&self, mut f: impl FnMut(usize, &Episode, &[f64]) -> Vec<f64>) -> Vec<f64> {
        let mut out = Vec::with_capacity(self.steps);
        for (e, ep) in self.episodes.iter().enumerate() {
            out.extend(f(e, ep, &self.values[e]));
        }
        out
    }
}

/// Reads every episode of the log, keeping what the check needs.
pub fn read(reader: LogReader, cfg: &CheckConfig) -> Result<(Batch, Input)> {
    let file = reader.file().to_string();
    let mut reader = reader;
    let mut episodes = Vec::new();
    let mut held: u128 = 0;
    // Numbers held per step while checking: the episode's arrays and the logged columns, the
    // reference, tolerance and magnitudes of the column checked, and the catalogue's
    // candidate columns (measured: about 280 bytes a step, 195 MB for 703,000 steps).
    let width = 36 + cfg.columns().len() as u128;
    while let Some(mut ep) = reader.next_episode()? {
        if cfg.claim.needs_values() && ep.values.is_none() {
            return Err(Error::input_hint(
                Position {
                    file: file.clone(),
                    line: Some(1),
                    column: None,
                },
                format!(
                    "{} needs the value column, which the log lacks",
                    cfg.claim.name()
                ),
                "name it with --col value=HEADER, or claim rtg_discounted",
            ));
        }
        // Scores, observations and actions play no part in the check.
        (ep.scores, ep.obs, ep.act) = (Vec::new(), Vec::new(), Vec::new());
        held += width * 8 * ep.len() as u128;
        cfg.budget.check(
            held,
            || {
                format!(
                    "the steps held by crosscheck ({} episodes so far)",
                    episodes.len() + 1
                )
            },
            "check a smaller log (or a part of it), or raise --max-memory",
        )?;
        episodes.push(ep);
    }
    let input = Input {
        file: file.clone(),
        rows: reader.rows(),
        episodes: episodes.len() as u64,
        steps: episodes.iter().map(|e| e.len() as u64).sum(),
        terminated: episodes.iter().filter(|e| e.end == End::Terminated).count() as u64,
        truncated: episodes.iter().filter(|e| e.end != End::Terminated).count() as u64,
        environments: environments(&episodes),
        warnings: reader.warnings().clone(),
    };
    Ok((Batch::new(&file, episodes), input))
}

/// Distinct environment values (0 when the log has no environment column).
fn environments(episodes: &[Episode]) -> usize {
    let mut envs: Vec<&str> = episodes.iter().filter_map(|e| e.env.as_deref()).collect();
    envs.sort_unstable();
    envs.dedup();
    envs.len()
}

/// The column being checked: logged values, reference, tolerance, flat.
pub struct Column {
    pub kind: Kind,
    pub header: String,
    pub logged: Vec<f64>,
    pub reference: Vec<f64>,
    pub tol: Vec<f64>,
    pub rule: Rule,
    /// The precision of the column and of its inputs.
    pub precision: (Precision, Precision),
    /// (M_t, M2_t) of the reference, for variants' tolerances.
    pub magnitudes: (Vec<f64>, Vec<f64>),
}

impl Column {
    /// The reference, magnitudes and tolerances of column `header` of kind `kind`.
    pub fn new(batch: &Batch, cfg: &CheckConfig, kind: Kind, header: &str) -> Column {
        let logged = batch.flat(|_, ep, _| {
            ep.logged_column(header)
                .expect("the reader carries every logged column")
        });
        let reference = batch.flat(|_, ep, v| reference::column(&cfg.claim, kind, ep, v));
        let (mut m, mut m2) = (Vec::new(), Vec::new());
        for (e, ep) in batch.episodes.iter().enumerate() {
            let (a, b) = reference::magnitudes(&cfg.claim, ep, &batch.values[e]);
            m.extend(a);
            m2.extend(b);
        }
        let precision = (tolerance::precision(&logged), input_precision(batch));
        let rule = match cfg.tolerance {
            Some(t) => Rule::Fixed(t),
            None => Rule::from_data(precision.0, precision.1),
        };
        let tol = (0..logged.len())
            .map(|i| rule.at(m[i], m2[i], logged[i]))
            .collect();
        Column {
            kind,
            header: header.to_string(),
            logged,
            reference,
            tol,
            rule,
            precision,
            magnitudes: (m, m2),
        }
    }
}

impl Column {
    /// Whether step i differs beyond tolerance. A step whose reference or tolerance overflowed
    /// f64 cannot be checked and counts as differing (see [`Column::unchecked`]).
    pub fn differs(&self, i: usize) -> bool {
        let d = (self.logged[i] - self.reference[i]).abs();
        self.unchecked(i) || d > self.tol[i]
    }

    /// The reference or the tolerance of step i is not a finite number.
    pub fn unchecked(&self, i: usize) -> bool {
        !(self.reference[i].is_finite() && self.tol[i].is_finite())
    }
}

/// The precision of the inputs: rewards, values and bootstrap values.
fn input_precision(batch: &Batch) -> Precision {
    let tails: Vec<f64> = batch.episodes.iter().map(|e| e.tail_value()).collect();
    let all = batch
        .episodes
        .iter()
        .flat_map(|e| e.rewards.iter().chain(e.values.iter().flatten()))
        .chain(&tails);
    tolerance::precision(all)
}

/// A row of the report for flat step i.
pub fn row(batch: &Batch, at: &[(usize, usize)], col: &Column, i: usize) -> Row {
    let (e, t) = at[i];
    Row {
        line: batch.line(e, t),
        episode: batch.episodes[e].id.clone(),
        step: t,
        logged: col.logged[i],
        reference: finite(col.reference[i]),
        difference: finite(col.logged[i] - col.reference[i]),
        tolerance: finite(col.tol[i]),
    }
}

/// Agreement figures of a column against its reference.
pub fn agreement(batch: &Batch, at: &[(usize, usize)], col: &Column) -> Agreement {
    let n = col.logged.len();
    let mut max_abs: f64 = 0.0;
    let mut max_rel: Option<f64> = None;
    let (mut differing, mut unchecked) = (0, 0);
    let mut first: Option<(u64, usize)> = None;
    let mut per_episode = vec![0u64; batch.episodes.len()];
    for i in 0..n {
        // f64::max ignores NaN: an overflowed step makes the maxima undefined instead.
        let d = (col.logged[i] - col.reference[i]).abs();
        max_abs = if d.is_nan() {
            f64::INFINITY
        } else {
            max_abs.max(d)
        };
        if col.reference[i] != 0.0 {
            let r = d / col.reference[i].abs();
            let r = if r.is_nan() { f64::INFINITY } else { r };
            max_rel = Some(max_rel.map_or(r, |m: f64| m.max(r)));
        }
        unchecked += u64::from(col.unchecked(i));
        if col.differs(i) {
            differing += 1;
            per_episode[at[i].0] += 1;
            // The first differing step in file order (lowest line), not in episode order.
            let line = batch.line(at[i].0, at[i].1);
            if first.is_none_or(|(l, _)| line < l) {
                first = Some((line, i));
            }
        }
    }
    Agreement {
        max_abs_error: finite(max_abs),
        max_rel_error: max_rel.and_then(finite),
        steps_differing: differing,
        unchecked_steps: unchecked,
        share_differing: (n > 0).then(|| differing as f64 / n as f64),
        episodes_differing: per_episode.iter().filter(|c| **c > 0).count() as u64,
        first_difference: first.map(|(_, i)| row(batch, at, col, i)),
        episodes: most_differing(batch, &per_episode),
    }
}

/// The episodes with the most differing steps (at most 10), ties by first line.
fn most_differing(batch: &Batch, per_episode: &[u64]) -> Vec<EpisodeCount> {
    let mut episodes: Vec<EpisodeCount> = per_episode
        .iter()
        .enumerate()
        .filter(|(_, c)| **c > 0)
        .map(|(e, c)| EpisodeCount {
            episode: batch.episodes[e].id.clone(),
            first_line: batch.episodes[e].first_line,
            steps: batch.episodes[e].len() as u64,
            differing: *c,
        })
        .collect();
    episodes.sort_by(|a, b| {
        b.differing
            .cmp(&a.differing)
            .then(a.first_line.cmp(&b.first_line))
    });
    episodes.truncate(10);
    episodes
}

/// The rows that differ most relative to their tolerance (at most `k`).
pub fn worst_rows(batch: &Batch, at: &[(usize, usize)], col: &Column, k: usize) -> Vec<Row> {
    let mut idx: Vec<usize> = (0..col.logged.len()).filter(|&i| col.differs(i)).collect();
    // Unchecked steps (NaN ratio) first, then by how far beyond tolerance.
    let ratio = |i: usize| {
        let r = (col.logged[i] - col.reference[i]).abs() / col.tol[i];
        if r.is_nan() { f64::INFINITY } else { r }
    };
    idx.sort_by(|&a, &b| ratio(b).total_cmp(&ratio(a)).then(a.cmp(&b)));
    idx.truncate(k);
    idx.into_iter().map(|i| row(batch, at, col, i)).collect()
}

/// Checks one column: agreement, then (when it differs) the catalogue of faults.
pub fn check_column(batch: &Batch, cfg: &CheckConfig, kind: Kind, header: &str) -> ColumnReport {
    let col = Column::new(batch, cfg, kind, header);
    let at = batch.locate();
    let agreement = agreement(batch, &at, &col);
    let (variants, explained_by, worst) = if agreement.steps_differing == 0 {
        (Vec::new(), Vec::new(), Vec::new())
    } else {
        let variants: Vec<VariantResult> = variants::evaluate(batch, cfg, &col, &at);
        let explained: Vec<String> = variants
            .iter()
            .filter(|v| v.explains)
            .map(|v| v.name.to_string())
            .collect();
        let worst = if explained.is_empty() {
            worst_rows(batch, &at, &col, 5)
        } else {
            Vec::new()
        };
        (variants, explained, worst)
    };
    let status = if agreement.steps_differing == 0 {
        "agrees"
    } else if explained_by.is_empty() {
        "unexplained"
    } else {
        "explained"
    };
    let t = &col.tol;
    ColumnReport {
        column: header.to_string(),
        kind: kind.key(),
        status,
        steps: col.logged.len() as u64,
        tolerance: tolerance::Tolerance {
            source: if cfg.tolerance.is_some() {
                "flag"
            } else {
                "data"
            },
            unit: col.rule.unit(),
            column_precision: col.precision.0.describe(),
            input_precision: col.precision.1.describe(),
            min: finite(t.iter().copied().fold(f64::INFINITY, f64::min)),
            max: finite(t.iter().copied().fold(0.0, f64::max)),
        },
        agreement,
        variants,
        explained_by,
        worst_rows: worst,
    }
}

/// Runs the whole check on a log.
pub fn run(reader: LogReader, cfg: &CheckConfig) -> Result<CrosscheckReport> {
    let (batch, input) = read(reader, cfg)?;
    Ok(check(batch, input, cfg))
}

/// Checks every configured column of a batch.
pub fn check(batch: Batch, input: Input, cfg: &CheckConfig) -> CrosscheckReport {
    let columns: Vec<ColumnReport> = cfg
        .columns()
        .iter()
        .map(|(kind, h)| check_column(&batch, cfg, *kind, h))
        .collect();
    CrosscheckReport::new(input, cfg, columns)
}
