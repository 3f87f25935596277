//! The audit's significance figures beside the table (report/significance.rs): the bias
//! test's summary, the gradient noise scale of the reference and of the chosen estimator with
//! its BCa interval (stats/noise.rs), and the user's baseline against the minimum-variance one.

use super::{AuditConfig, Collected, Resampler};
use crate::contrib::Plan;
use crate::report::EstimatorRow;
use crate::report::InputSummary;
use crate::report::significance::{BaselineGap, NoiseScale, Significance};
use crate::resample;
use crate::stats::{ReplicateGradients, noise};

/// The bias test's summary over the rows.
pub fn significance(rows: &[EstimatorRow], distinct: usize, cfg: &AuditConfig) -> Significance {
    Significance {
        null: "bootstrap_centred_paired",
        multiplicity: cfg.multiplicity,
        controls: cfg.multiplicity.describe(),
        level: cfg.bias_level,
        tested: rows.iter().filter(|r| r.bias_p_adjusted.is_some()).count(),
        distinct_tests: distinct,
        detected: rows.iter().filter(|r| r.bias_detected).count(),
    }
}

/// A resampler's interval of estimator k's B_simple, with a note on how it was formed when that
/// needs saying.
pub type ScaleIntervals<'a> =
    dyn Fn(usize) -> (Option<noise::ScaleInterval>, Option<&'static str>) + 'a;

/// B_simple for the reference and for the lowest-MSE estimator (once if they are the same).
///
/// `interval(k)` is the resampler's interval of estimator k's B_simple ([`interval`] for the
/// multinomial bootstrap, [`interval_from_rows`] for the Poisson one and merged shards), with
/// the note to print beside it.
pub fn noise_scales(
    plan: &Plan,
    reference: usize,
    input: &InputSummary,
    rows: &[EstimatorRow],
    best: Option<&str>,
    interval: &ScaleIntervals,
) -> Vec<NoiseScale> {
    let name = |k: usize| plan.estimators[k].to_string();
    let mut which = vec![(reference, "reference")];
    let chosen = best.and_then(|b| (0..plan.estimators.len()).find(|&k| name(k) == b));
    if let Some(k) = chosen.filter(|&k| k != reference) {
        which.push((k, "chosen"));
    }
    let per_step = input.steps as f64 / input.episodes.max(1) as f64;
    which
        .into_iter()
        .map(|(k, role)| {
            let point = rows
                .iter()
                .find(|r| r.name == name(k))
                .and_then(|r| r.noise_scale);
            let (interval, note) = match point {
                None => (None, Some("the signal is zero or undefined".to_string())),
                Some(_) if plan.moments(k, &vec![0.0; plan.width()]).is_none() => (
                    None,
                    Some("interval computed for per-episode estimators only".to_string()),
                ),
                Some(_) => match interval(k) {
                    (Some(iv), note) => (Some(iv), note.map(str::to_string)),
                    (None, _) => (None, Some("interval undefined".to_string())),
                },
            };
            NoiseScale {
                estimator: name(k),
                role,
                episodes: point,
                episodes_interval: interval,
                steps: point.map(|p| p * per_step),
                steps_interval: interval.map(|iv| iv.scaled(per_step)),
                note,
            }
        })
        .collect()
}

/// The BCa interval of B_simple for per-episode estimator k (see stats/noise.rs), from the
/// multinomial bootstrap and the episode jackknife.
pub fn interval(
    data: &Collected,
    plan: &Plan,
    k: usize,
    reference: usize,
    cfg: &AuditConfig,
) -> Option<noise::ScaleInterval> {
    let contrib = data.contrib.view();
    let n = contrib.nrows();
    let start = plan.moment_start()?;
    let source = Resampler::of(plan, contrib, cfg);
    let (gk, _) = source.bootstrap(k);
    let (gr, _) = source.bootstrap(reference);
    let cols = [start + 2 * k, start + 2 * reference];
    let moments = resampled_columns(contrib, &cols, cfg);
    let reps: Vec<f64> = (0..cfg.resamples)
        .map(|b| {
            let (gk, gr) = (gk.row(b).to_vec(), gr.row(b).to_vec());
            noise::reciprocal(n, &gk, moments[[b, 0]], &gr, moments[[b, 1]])
        })
        .collect();
    let total: Vec<f64> = contrib.sum_axis(ndarray::Axis(0)).to_vec();
    let (ck, cr) = (plan.columns(k), plan.columns(reference));
    let at = |mean: &[f64]| {
        noise::reciprocal(
            n,
            &mean[ck.clone()],
            mean[cols[0]],
            &mean[cr.clone()],
            mean[cols[1]],
        )
    };
    let estimate = at(&total.iter().map(|x| x / n as f64).collect::<Vec<_>>());
    let jack: Vec<f64> = leave_one_out(contrib, &total).map(|m| at(&m)).collect();
    noise::interval(reps, estimate, &jack, cfg.confidence)
}

/// The mean row of the episodes with episode i left out, for each i in order (the episode
/// jackknife), from the column sums `total`.
fn leave_one_out<'a>(
    contrib: ndarray::ArrayView2<'a, f64>,
    total: &'a [f64],
) -> impl Iterator<Item = Vec<f64>> + 'a {
    let count = contrib.nrows() as f64 - 1.0;
    contrib.into_outer_iter().map(move |row| {
        total
            .iter()
            .zip(row)
            .map(|(t, x)| (t - x) / count)
            .collect()
    })
}

/// The replicates' weighted means of the columns `cols` (a B x cols.len() matrix), with the
/// bootstrap's own counts: one weighted-mean pass over the span of the columns.
fn resampled_columns(
    contrib: ndarray::ArrayView2<f64>,
    cols: &[usize],
    cfg: &AuditConfig,
) -> ndarray::Array2<f64> {
    let seed = cfg.seed;
    let lo = *cols.iter().min().expect("at least one column");
    let hi = *cols.iter().max().expect("at least one column") + 1;
    let (means, _) = resample::weighted_gradients(
        contrib,
        cfg.resamples,
        lo..hi,
        cols.len(),
        |b, w| resample::bootstrap_counts(seed, b as u64, w),
        |mean, out| {
            for (o, &c) in out.iter_mut().zip(cols) {
                *o = mean[c - lo];
            }
            false
        },
    );
    means
}

/// Per-episode estimator k's MSE and bias_sq draws against the reference (stats/mse.rs), from
/// the multinomial bootstrap's replicate gradients and moments and the episode jackknife; None
/// for a batch-dependent estimator (no per-episode moments), each None where its figure
/// overflowed.
///
/// `gr` holds the reference's replicate gradients (`Resampler::bootstrap(reference)`), formed
/// once for every estimator.
pub fn interval_draws(
    data: &Collected,
    plan: &Plan,
    (k, reference): (usize, usize),
    gr: &ndarray::Array2<f64>,
    cfg: &AuditConfig,
) -> Option<[Option<crate::stats::mse::Draws>; 2]> {
    use crate::stats::mse::{Draws, Figure, Parts};
    let start = plan.moment_start()?;
    plan.moments(k, &vec![0.0; plan.width()])?;
    let contrib = data.contrib.view();
    let n = contrib.nrows();
    let source = Resampler::of(plan, contrib, cfg);
    let (gk, _) = source.bootstrap(k);
    let cols = [start + 2 * k, start + 2 * k + 1];
    let moments = resampled_columns(contrib, &cols, cfg);
    let reps: Vec<Parts> = (0..cfg.resamples)
        .map(|b| {
            let m = (moments[[b, 0]], moments[[b, 1]]);
            Parts::new(&gk.row(b).to_vec(), &gr.row(b).to_vec(), m, n)
        })
        .collect();
    let (ck, cr) = (plan.columns(k), plan.columns(reference));
    let at = |mean: &[f64]| {
        Parts::new(
            &mean[ck.clone()],
            &mean[cr.clone()],
            (mean[cols[0]], mean[cols[1]]),
            n,
        )
    };
    let total: Vec<f64> = contrib.sum_axis(ndarray::Axis(0)).to_vec();
    let whole = at(&total.iter().map(|x| x / n as f64).collect::<Vec<_>>());
    let jack: Vec<Parts> = leave_one_out(contrib, &total).map(|m| at(&m)).collect();
    Some([Figure::Mse, Figure::BiasSq].map(|f| Draws::new(f, &whole, &reps, &jack)))
}

/// The interval of B_simple for per-episode estimator k from replicate mean rows (the Poisson
/// bootstrap's, of one pass or of merged shards): bias-corrected (BC) but without the
/// acceleration, since the streamed sums keep no per-episode rows for a jackknife (its third
/// moments cannot be recovered from sums of rows). `n` is the episode count (a Poisson
/// replicate's weight sum differs from it by about sqrt(n), a second-order difference here).
pub fn interval_from_rows(
    plan: &Plan,
    (point, replicates): (&[f64], ndarray::ArrayView2<f64>),
    n: usize,
    (k, reference): (usize, usize),
    confidence: f64,
) -> Option<noise::ScaleInterval> {
    let start = plan.moment_start()?;
    let (ck, cr) = (plan.columns(k), plan.columns(reference));
    let (qk, qr) = (start + 2 * k, start + 2 * reference);
    let at = |mean: &[f64]| {
        noise::reciprocal(n, &mean[ck.clone()], mean[qk], &mean[cr.clone()], mean[qr])
    };
    let reps: Vec<f64> = replicates
        .outer_iter()
        .map(|row| at(row.as_slice().expect("mean rows are contiguous")))
        .collect();
    noise::interval_bc(reps, at(point), confidence)
}

/// The user's baseline (the critic's value_baseline, else mean_baseline) against the
/// minimum-variance baseline audited (the time-dependent one, else the constant one).
pub fn baseline_gap(rows: &[EstimatorRow]) -> Option<BaselineGap> {
    let find = |names: &[&str]| {
        names
            .iter()
            .find_map(|n| rows.iter().find(|r| r.name == *n && r.variance.is_some()))
    };
    let user = find(&["value_baseline", "mean_baseline"])?;
    let best = find(&["minvar_rtg", "minvar_total"])?;
    let (u, o) = (user.variance?, best.variance?);
    (o > 0.0).then(|| BaselineGap {
        baseline: user.name.clone(),
        optimal: best.name.clone(),
        baseline_variance: u,
        optimal_variance: o,
        ratio: u / o,
    })
}
