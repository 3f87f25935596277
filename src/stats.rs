//! Statistics of each estimator's batch gradient from the bootstrap replicates: variance trace,
//! paired squared bias against the reference with the noise floor removed, MSE, SNR, ESS, the
//! half-split cosine, batch-size planning and percentile intervals. Undefined figures are
//! `None` with a note saying why, never NaN.

use crate::contrib::{GradNote, Plan};
use ndarray::{Array3, ArrayView2};

/// Threshold on bias_z for calling a bias detected: about a one-sided 2.3% false-alarm rate
/// under the normal approximation (common practice, no single source).
pub const BIAS_Z: f64 = 2.0;

/// What the statistics need besides the data.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StatsConfig {
    /// Episodes in the log (N).
    pub episodes: usize,
    /// Two-sided confidence level of the percentile intervals, in (0, 1).
    pub confidence: f64,
    /// SNR the planning figure aims for.
    pub target_snr: f64,
    /// Also return the per-coordinate terms of the squared figures ([`PerCoord`], the signal's
    /// `per_coord`); off by default so that a normal audit keeps no d-length vectors.
    pub per_coord: bool,
}

/// The per-coordinate terms of one estimator's squared figures, each of length d: for
/// coordinate j, `variance[j]` is the bootstrap variance of g_kj, `bias_sq[j]` is
/// (g_kj - g_ref,j)^2 minus the bootstrap variance of the paired difference in coordinate j
/// (the noise-floor correction, so it may be negative), and `mse[j] = bias_sq[j] + variance[j]`.
/// Summed over j in index order, `variance` gives the reported variance exactly and `bias_sq`
/// the reported bias_sq exactly unless that was clamped at zero (then the sum is the negative
/// raw estimate); `mse` sums to the reported mse up to rounding under the same proviso.
/// They let figures of random projections of a larger score vector state their own precision
/// from the spread over projections.
#[derive(Debug, Clone, PartialEq)]
pub struct PerCoord {
    pub variance: Vec<f64>,
    pub bias_sq: Vec<f64>,
    pub mse: Vec<f64>,
}

/// A two-sided percentile interval.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct Interval {
    pub low: f64,
    pub high: f64,
}

/// Everything reported for one estimator.
#[derive(Debug, Clone, PartialEq)]
pub struct EstimatorStats {
    pub gradient: Vec<f64>,
    pub gradient_norm: f64,
    pub gradient_norm_interval: Interval,
    pub variance: f64,
    pub bias_sq: f64,
    /// How many null standard deviations ||g_k - g_ref||^2 lies above its no-bias mean.
    /// Bias-corrected percentile interval of bias_sq (see [`sq_norm_interval`]).
    pub bias_sq_interval: Interval,
    pub bias_z: Option<f64>,
    /// bias_z >= [`BIAS_Z`]: the bias is distinguishable from resampling noise.
    pub bias_detected: bool,
    pub bias_norm_interval: Interval,
    pub mse: f64,
    pub snr: Option<f64>,
    pub ess: Option<f64>,
    pub cosine_half: Option<f64>,
    pub cosine_half_interval: Option<Interval>,
    pub episodes_for_snr: Option<u64>,
    /// The bias alone keeps the SNR below the target at any batch size.
    pub bias_limited: bool,
    pub notes: Vec<String>,
    /// Per-coordinate terms of variance, bias_sq and mse, when [`StatsConfig::per_coord`].
    pub per_coord: Option<PerCoord>,
}

/// Statistics shared by all estimators: the reference's signal.
#[derive(Debug, Clone, PartialEq)]
pub struct Signal {
    /// max(0, ||g_ref||^2 - V_ref): the squared norm of the reference gradient, noise removed.
    pub signal: f64,
    pub signal_interval: Interval,
    pub reference_variance: f64,
    /// Per-coordinate terms g_ref,j^2 - V_ref,j of the signal before its clamp at zero (summed
    /// in index order they give the reported signal exactly unless it was clamped), when
    /// [`StatsConfig::per_coord`].
    pub per_coord: Option<Vec<f64>>,
}

/// Computes every estimator's statistics. `point` is the mean contribution row over all
/// episodes, `replicates` one bootstrap mean row per replicate, and `halves` the mean rows of
/// the half splits, paired as rows (2s, 2s + 1).
pub fn summarise(
    plan: &Plan,
    reference: usize,
    point: &[f64],
    replicates: ArrayView2<f64>,
    halves: ArrayView2<f64>,
    cfg: &StatsConfig,
) -> (Vec<EstimatorStats>, Signal) {
    let k_count = plan.estimators.len();
    let d = plan.d;
    let grads = |rows: ArrayView2<f64>| -> (Array3<f64>, Vec<usize>) {
        let mut g = Array3::<f64>::zeros((rows.nrows(), k_count, d));
        let mut constant = vec![0usize; k_count];
        for (r, row) in rows.outer_iter().enumerate() {
            let row = row.to_vec();
            for k in 0..k_count {
                let mut out = vec![0.0; d];
                if plan.gradient(k, &row, &mut out) == GradNote::ConstantReturns {
                    constant[k] += 1;
                }
                for j in 0..d {
                    g[[r, k, j]] = out[j];
                }
            }
        }
        (g, constant)
    };
    let (rep, rep_constant) = grads(replicates);
    let (half, _) = grads(halves);
    let b_count = rep.shape()[0] as f64;
    let mut points = vec![vec![0.0; d]; k_count];
    let mut point_constant = vec![false; k_count];
    for (k, p) in points.iter_mut().enumerate() {
        point_constant[k] = plan.gradient(k, point, p) == GradNote::ConstantReturns;
    }

    // Per-coordinate variances of a set of replicate vectors given by f(b, j).
    let var_coords = |f: &dyn Fn(usize, usize) -> f64| -> Vec<f64> {
        (0..d)
            .map(|j| {
                let mean = (0..rep.shape()[0]).map(|b| f(b, j)).sum::<f64>() / b_count;
                (0..rep.shape()[0])
                    .map(|b| (f(b, j) - mean).powi(2))
                    .sum::<f64>()
                    / (b_count - 1.0)
            })
            .collect()
    };
    let norm = |v: &mut dyn Iterator<Item = f64>| v.map(|x| x * x).sum::<f64>().sqrt();
    let alpha = 1.0 - cfg.confidence;
    let interval = |mut xs: Vec<f64>| -> Interval {
        xs.sort_by(f64::total_cmp);
        Interval {
            low: percentile(&xs, alpha / 2.0),
            high: percentile(&xs, 1.0 - alpha / 2.0),
        }
    };

    let v_ref_coords = var_coords(&|b, j| rep[[b, reference, j]]);
    let v_ref: f64 = v_ref_coords.iter().sum();
    let signal_interval = sq_norm_interval(
        (0..rep.shape()[0])
            .map(|b| (0..d).map(|j| rep[[b, reference, j]].powi(2)).sum())
            .collect(),
        v_ref,
        cfg.confidence,
    );
    let signal_coords: Vec<f64> = points[reference]
        .iter()
        .zip(&v_ref_coords)
        .map(|(g, v)| g * g - v)
        .collect();
    let signal = signal_coords.iter().sum::<f64>().max(0.0);
    let n = cfg.episodes as f64;

    let stats = (0..k_count)
        .map(|k| {
            let mut notes = Vec::new();
            let var_k = var_coords(&|b, j| rep[[b, k, j]]);
            let variance: f64 = var_k.iter().sum();
            let v_diff_coords = var_coords(&|b, j| rep[[b, k, j]] - rep[[b, reference, j]]);
            let v_diff: f64 = v_diff_coords.iter().sum();
            let bias_norms: Vec<f64> = (0..rep.shape()[0])
                .map(|b| norm(&mut (0..d).map(|j| rep[[b, k, j]] - rep[[b, reference, j]])))
                .collect();
            let bias_coords: Vec<f64> = (0..d)
                .map(|j| (points[k][j] - points[reference][j]).powi(2) - v_diff_coords[j])
                .collect();
            // ||g_k - g_ref||^2 - V_diff, summed per coordinate.
            let raw_bias: f64 = bias_coords.iter().sum();
            let bias_sq = raw_bias.max(0.0);
            let bias_sq_interval = sq_norm_interval(
                bias_norms.iter().map(|x| x * x).collect(),
                v_diff,
                cfg.confidence,
            );
            // Under no bias, D = g_k - g_ref is roughly N(0, S) with S the bootstrap covariance
            // of the paired difference, so ||D||^2 has mean tr S and variance 2 tr(S^2) (the
            // moments of a Gaussian quadratic form). bias_z measures the excess in those units.
            let spread = (2.0
                * frobenius_sq(
                    &|b, j| rep[[b, k, j]] - rep[[b, reference, j]],
                    rep.shape()[0],
                    d,
                ))
            .sqrt();
            let bias_z = (k != reference && spread > 0.0).then(|| raw_bias / spread);
            let bias_detected = bias_z.is_some_and(|z| z >= BIAS_Z)
                || (spread == 0.0 && k != reference && bias_sq > 0.0);
            let mse = bias_sq + variance;
            let gradient_norm = norm(&mut points[k].iter().copied());
            let norms: Vec<f64> = (0..rep.shape()[0])
                .map(|b| norm(&mut (0..d).map(|j| rep[[b, k, j]])))
                .collect();

            let (snr, ess) = if mse > 0.0 {
                let snr = if signal > 0.0 {
                    Some(signal / mse)
                } else {
                    notes.push(
                        "snr undefined: the reference gradient is not distinguishable from its \
                         own noise (zero signal)"
                            .to_string(),
                    );
                    None
                };
                (snr, Some(n * v_ref / mse))
            } else {
                notes.push(
                    "snr and ess undefined: this estimator's gradient has zero error (it is \
                     constant across resamples and equal to the reference)"
                        .to_string(),
                );
                (None, None)
            };

            let threshold = signal / cfg.target_snr;
            let bias_limited = signal > 0.0 && threshold <= bias_sq && bias_detected;
            let episodes_for_snr = if signal == 0.0 {
                notes.push("episodes_for_snr undefined: zero signal".to_string());
                None
            } else if bias_limited {
                notes.push(format!(
                    "bias-limited: the squared bias alone ({bias_sq:.3e}) keeps snr below {} \
                     at any batch size",
                    cfg.target_snr
                ));
                None
            } else if threshold <= bias_sq {
                // The point estimate says bias-limited but the bias is not detected: plan as
                // if unbiased, and say so.
                notes.push(format!(
                    "episodes_for_snr assumes no bias: the estimated bias^2 ({bias_sq:.3e}) \
                     would make snr {} unreachable but is not distinguishable from noise",
                    cfg.target_snr
                ));
                Some(((n * variance / threshold).ceil() as u64).max(1))
            } else {
                let need = n * variance / (threshold - bias_sq);
                Some((need.ceil() as u64).max(1))
            };

            let mut cosines = Vec::new();
            for s in 0..half.shape()[0] / 2 {
                let (a, b) = (2 * s, 2 * s + 1);
                let dot: f64 = (0..d).map(|j| half[[a, k, j]] * half[[b, k, j]]).sum();
                let na = norm(&mut (0..d).map(|j| half[[a, k, j]]));
                let nb = norm(&mut (0..d).map(|j| half[[b, k, j]]));
                if na > 0.0 && nb > 0.0 {
                    cosines.push((dot / (na * nb)).clamp(-1.0, 1.0));
                }
            }
            let (cosine_half, cosine_half_interval) = if cosines.is_empty() {
                notes.push("cosine_half undefined: the half-batch gradients are zero".into());
                (None, None)
            } else {
                let mean = cosines.iter().sum::<f64>() / cosines.len() as f64;
                (Some(mean), Some(interval(cosines)))
            };
            if point_constant[k] || rep_constant[k] > 0 {
                notes.push(format!(
                    "returns are constant in {} of {} resamples: whitening has no spread to \
                     divide by, its gradient is taken as zero there",
                    rep_constant[k] + usize::from(point_constant[k]),
                    rep.shape()[0] + 1
                ));
            }
            EstimatorStats {
                gradient: points[k].clone(),
                gradient_norm,
                gradient_norm_interval: interval(norms),
                variance,
                bias_sq,
                bias_sq_interval,
                bias_z,
                bias_detected,
                bias_norm_interval: interval(bias_norms),
                mse,
                snr,
                ess,
                cosine_half,
                cosine_half_interval,
                episodes_for_snr,
                bias_limited,
                notes,
                per_coord: cfg.per_coord.then(|| PerCoord {
                    mse: bias_coords.iter().zip(&var_k).map(|(b, v)| b + v).collect(),
                    variance: var_k,
                    bias_sq: bias_coords,
                }),
            }
        })
        .collect();
    (
        stats,
        Signal {
            signal,
            signal_interval,
            reference_variance: v_ref,
            per_coord: cfg.per_coord.then_some(signal_coords),
        },
    )
}

/// Interval for a noise-corrected squared norm ||g||^2 - V from the replicates' ||g*||^2.
/// The bootstrap mean of ||g*||^2 exceeds ||g||^2 by the variance trace V, so ||g*||^2 - 2V is
/// centred on the point estimate ||g||^2 - V; its percentiles (clamped at 0) are the interval.
pub fn sq_norm_interval(mut sq: Vec<f64>, v: f64, confidence: f64) -> Interval {
    sq.sort_by(f64::total_cmp);
    let alpha = 1.0 - confidence;
    Interval {
        low: (percentile(&sq, alpha / 2.0) - 2.0 * v).max(0.0),
        high: (percentile(&sq, 1.0 - alpha / 2.0) - 2.0 * v).max(0.0),
    }
}

/// Squared Frobenius norm of the sample covariance (B - 1 denominator) of the replicate
/// vectors f(b, .), i.e. tr(S^2).
fn frobenius_sq(f: &dyn Fn(usize, usize) -> f64, b_count: usize, d: usize) -> f64 {
    let mut x = vec![0.0; b_count * d];
    for b in 0..b_count {
        for j in 0..d {
            x[b * d + j] = f(b, j);
        }
    }
    let mut mean = vec![0.0; d];
    for b in 0..b_count {
        for j in 0..d {
            mean[j] += x[b * d + j] / b_count as f64;
        }
    }
    for b in 0..b_count {
        for j in 0..d {
            x[b * d + j] -= mean[j];
        }
    }
    let mut total = 0.0;
    for i in 0..d {
        for j in 0..d {
            let c: f64 = (0..b_count)
                .map(|b| x[b * d + i] * x[b * d + j])
                .sum::<f64>()
                / (b_count as f64 - 1.0);
            total += c * c;
        }
    }
    total
}

/// Linear-interpolation percentile of sorted data (the "type 7" rule of Hyndman and Fan 1996).
pub fn percentile(sorted: &[f64], p: f64) -> f64 {
    if sorted.is_empty() {
        return 0.0;
    }
    let h = (sorted.len() - 1) as f64 * p.clamp(0.0, 1.0);
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(sorted.len() - 1);
    sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
}

#[cfg(test)]
mod tests {
    use super::*;

    // Hyndman and Fan (1996) type 7 is R's default quantile(): quantile(1:5, 0.1) = 1.4.
    #[test]
    fn percentile_type_7() {
        let x = [1.0, 2.0, 3.0, 4.0, 5.0];
        assert!((percentile(&x, 0.1) - 1.4).abs() < 1e-12);
        assert_eq!(percentile(&x, 0.5), 3.0);
        assert_eq!(percentile(&x, 1.0), 5.0);
    }

    use crate::contrib::Plan;
    use crate::estimator::Estimator;
    use ndarray::Array2;

    /// Two per-episode estimators (rtg = reference, total) in d = 3, with replicate rows from
    /// a small deterministic generator, and a point row near their mean.
    fn toy(b_count: usize, spread: f64) -> (Plan, Vec<f64>, Array2<f64>, Array2<f64>) {
        let plan = Plan::new(vec![Estimator::Rtg, Estimator::Total], 0.99, 3);
        let mut state = 12345u64;
        let mut next = move || {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (state >> 11) as f64 / (1u64 << 53) as f64 - 0.5
        };
        let base = [0.4, -0.2, 0.1, 0.5, -0.1, 0.3];
        let reps = Array2::from_shape_fn((b_count, 6), |(_, c)| base[c] + spread * next());
        let halves = Array2::from_shape_fn((8, 6), |(_, c)| base[c] + spread * next());
        (plan, base.to_vec(), reps, halves)
    }

    fn config(per_coord: bool) -> StatsConfig {
        StatsConfig {
            episodes: 50,
            confidence: 0.9,
            target_snr: 1.0,
            per_coord,
        }
    }

    // The per-coordinate terms against their definitions: the sample variance with the B - 1
    // denominator of column j, and (g_kj - g_ref,j)^2 minus the paired difference's variance.
    #[test]
    fn per_coordinate_terms_sum_to_the_reported_figures() {
        let (plan, point, reps, halves) = toy(40, 0.2);
        let (stats, signal) =
            summarise(&plan, 0, &point, reps.view(), halves.view(), &config(true));
        let sample_var = |col: &dyn Fn(usize) -> f64| {
            let m = (0..40).map(col).sum::<f64>() / 40.0;
            (0..40).map(|b| (col(b) - m).powi(2)).sum::<f64>() / 39.0
        };
        let total = &stats[1];
        let pc = total.per_coord.as_ref().expect("requested");
        for j in 0..3 {
            let v = sample_var(&|b| reps[[b, 3 + j]]);
            assert!((pc.variance[j] - v).abs() < 1e-15, "variance[{j}]");
            let vd = sample_var(&|b| reps[[b, 3 + j]] - reps[[b, j]]);
            let want = (point[3 + j] - point[j]).powi(2) - vd;
            assert!((pc.bias_sq[j] - want).abs() < 1e-15, "bias_sq[{j}]");
            assert!((pc.mse[j] - want - v).abs() < 1e-15, "mse[{j}]");
        }
        assert_eq!(pc.variance.iter().sum::<f64>(), total.variance);
        assert!(total.bias_sq > 0.0, "this toy's bias is not clamped");
        assert_eq!(pc.bias_sq.iter().sum::<f64>(), total.bias_sq);
        assert!((pc.mse.iter().sum::<f64>() - total.mse).abs() < 1e-14);
        let sc = signal.per_coord.as_ref().expect("requested");
        let v_ref: f64 = (0..3).map(|j| sample_var(&|b| reps[[b, j]])).sum();
        assert!((signal.reference_variance - v_ref).abs() < 1e-15);
        assert!(signal.signal > 0.0);
        assert_eq!(sc.iter().sum::<f64>(), signal.signal);
        for (j, c) in sc.iter().enumerate() {
            let vr = sample_var(&|b| reps[[b, j]]);
            assert!((c - (point[j] * point[j] - vr)).abs() < 1e-15);
        }
        let (plain, plain_signal) =
            summarise(&plan, 0, &point, reps.view(), halves.view(), &config(false));
        assert!(plain.iter().all(|s| s.per_coord.is_none()));
        assert!(plain_signal.per_coord.is_none());
        assert_eq!(plain[1].mse, total.mse);
    }
}
