//! The sweep's MSE figure at each grid point: the grid's points as [`stats::mse`] draws, from
//! the replicates' mean rows and each leave-one-episode-out mean, with the reference at entry
//! 0 of the plan, and the influence columns resampled with the replicates' own counts.

use super::SweepConfig;
use crate::contrib::Plan;
use crate::error::Result;
use crate::resample;
use crate::stats::Interval;
use crate::stats::mse::{self, Draws, Parts};
use ndarray::{Array2, ArrayView2};

/// The MSE parts of point k for one mean row of a batch of n episodes.
fn parts(plan: &Plan, k: usize, row: &[f64], n: usize) -> Parts {
    let d = plan.d;
    let (mut gk, mut gr) = (vec![0.0; d], vec![0.0; d]);
    plan.gradient(k, row, &mut gk);
    plan.gradient(0, row, &mut gr);
    let moments = plan.moments(k, row).expect("sweep plans carry moments");
    Parts::new(&gk, &gr, moments, n)
}

/// Point k's draws (None where a figure overflowed). The batch size n stays fixed in the
/// leave-one-out samples: it is a parameter of the figure, not of the data.
pub(super) fn draws(
    plan: &Plan,
    k: usize,
    replicates: &Array2<f64>,
    contrib: ArrayView2<f64>,
) -> Option<Draws> {
    let n = contrib.nrows();
    let total = contrib.sum_axis(ndarray::Axis(0)).to_vec();
    let at = |sum: &[f64], count: f64| {
        let mean: Vec<f64> = sum.iter().map(|x| x / count).collect();
        parts(plan, k, &mean, n)
    };
    let reps = replicates
        .outer_iter()
        .map(|row| parts(plan, k, row.as_slice().expect("contiguous rows"), n));
    let jack = contrib.outer_iter().map(|row| {
        let loo: Vec<f64> = total.iter().zip(row).map(|(t, x)| t - x).collect();
        at(&loo, n as f64 - 1.0)
    });
    Draws::new(at(&total, n as f64), reps, jack)
}

/// Each point's (bootstrap standard error, interval) of its MSE; refuses influence columns
/// over the memory budget.
pub(super) fn spreads(
    draws: &[Option<Draws>],
    contrib: ArrayView2<f64>,
    cfg: &SweepConfig,
) -> Result<Vec<(Option<f64>, Option<Interval>)>> {
    let n = contrib.nrows();
    let columns = mse::COLUMNS * draws.iter().flatten().count();
    let b = cfg.audit.resamples as u128;
    cfg.audit.budget.check(
        crate::limits::bytes(n as u128 + b, 8 * columns as u128)
            .saturating_add(resample::scratch_bytes(n)),
        || format!("the MSE intervals: {n} episodes x {columns} influence columns"),
        "sweep fewer grid points, use fewer --resamples, or raise --max-memory",
    )?;
    let seed = cfg.audit.seed;
    let rows = cfg.audit.resamples;
    Ok(mse::spreads(draws, cfg.audit.confidence, |u| {
        resample::weighted_means(u, rows, |b, w| {
            resample::bootstrap_counts(seed, b as u64, w)
        })
    }))
}
