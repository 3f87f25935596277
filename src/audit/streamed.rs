//! The audit with the streamed Poisson(1) bootstrap (`--resampling poisson`): each episode's
//! contribution row is added to the running replicate sums as it ends (resample/poisson.rs), so
//! the memory held is O((1 + B + 2S) x width) plus 16 bytes of id hash per episode, whatever
//! the number of episodes. A [`Partial`] is everything a log (or one shard of it) leaves: the
//! sums, the sorted id hashes, the input counts, the warnings and the critic's exact sums;
//! partials of disjoint shards add up to the partial of their union (shard/), and
//! [`finish`] turns one into the report.

use super::{
    AuditConfig, Layout, Prepared, check_episodes, few_episodes_warning, pass, significance,
};
use crate::critic::ExplainedVariance;
use crate::error::Result;
use crate::report::{AuditReport, InputSummary};
use crate::resample::poisson::{PoissonSums, id_hash};
use crate::stats::{self, StatsConfig};
use crate::warnings::Warnings;

/// The mergeable state of a Poisson audit of some episodes.
#[derive(Debug, Clone)]
pub struct Partial {
    pub sums: PoissonSums,
    /// The 128-bit id hashes of the episodes, sorted.
    pub hashes: Vec<u128>,
    /// The input summary; its critic figures are recomputed from `recorded` when partials merge.
    pub input: InputSummary,
    pub warnings: Warnings,
    /// Exact sums behind the recorded values' explained variance.
    pub recorded: ExplainedVariance,
}

/// How the noise scale's interval is formed here (the multinomial audit's is BCa).
const BC_NOTE: &str = "BC interval: the Poisson sums keep no per-episode rows for the acceleration";

/// Bytes held per episode: its id hash.
const PER_EPISODE: u128 = 16;

/// Reads every episode into the Poisson sums. Fails when the sums (with the id hashes so far)
/// would exceed the memory budget.
pub fn accumulate(
    reader: crate::log::LogReader,
    prep: &Prepared,
    cfg: &AuditConfig,
) -> Result<Partial> {
    let width = prep.plan.width();
    let fixed = PoissonSums::bytes(cfg.resamples, cfg.splits, width);
    let check = |n: u128| {
        cfg.budget.check(
            fixed.saturating_add(n.saturating_mul(PER_EPISODE)),
            || {
                format!(
                    "--resamples {} and --splits {}: Poisson sums of {} rows x {width} summary \
                     columns, and {n} episode id hashes",
                    cfg.resamples,
                    cfg.splits,
                    1 + cfg.resamples + 2 * cfg.splits
                )
            },
            "use fewer --resamples or --splits, audit fewer estimators, or raise --max-memory",
        )
    };
    check(0)?;
    let mut sums = PoissonSums::new(cfg.seed, cfg.resamples, cfg.splits, width);
    let mut hashes = Vec::new();
    let pass = pass(reader, &prep.plan, cfg, &prep.scores, |key, row, _| {
        let h = id_hash(key);
        sums.push(h, row);
        hashes.push(h);
        if hashes.len() % 4096 == 0 {
            check(hashes.len() as u128)?;
        }
        Ok(())
    })?;
    sums.flush();
    hashes.sort_unstable();
    Ok(Partial {
        sums,
        hashes,
        input: pass.input,
        warnings: pass.warnings,
        recorded: pass.recorded,
    })
}

/// The statistics of a partial (of a whole log, or of merged shards), handed to `report`
/// with the input summary and warnings. Fails with fewer than 2 episodes.
pub fn finish(part: &mut Partial, layout: &Layout, cfg: &AuditConfig) -> Result<AuditReport> {
    let plan = layout.plan;
    let n = part.hashes.len();
    check_episodes(n, &part.input.file)?;
    let mut warnings = part.warnings.clone();
    few_episodes_warning(n, &mut warnings);
    let means = part.sums.means();
    let (reps, halves) = part.sums.replicate_rows();
    let source = stats::FromRows {
        plan,
        replicates: means.slice(ndarray::s![reps, ..]),
        halves: means.slice(ndarray::s![halves, ..]),
    };
    let scfg = StatsConfig {
        episodes: n,
        confidence: cfg.confidence,
        target_snr: cfg.target_snr,
        per_coord: layout.per_coord(),
        bias_level: cfg.bias_level,
        multiplicity: cfg.multiplicity,
    };
    let point = means.row(0).to_vec();
    let st = stats::summarise_with(plan, layout.reference, &point, &source, &scfg);
    let scale = |k: usize| {
        let rows = (point.as_slice(), source.replicates);
        let iv =
            significance::interval_from_rows(plan, rows, n, (k, layout.reference), cfg.confidence);
        (iv, Some(BC_NOTE))
    };
    Ok(super::report(
        layout,
        cfg,
        (part.input.clone(), warnings),
        st,
        &scale,
    ))
}

#[cfg(test)]
mod tests;
