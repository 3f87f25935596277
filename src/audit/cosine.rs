//! The interval of `cosine_half`: a confidence interval for the expected cosine between the
//! gradients of two independent batches of N/2 episodes, from the episode jackknife.
//!
//! The point figure T is the mean, over S random half splits, of the cosine between the two
//! halves' gradients; over the data, each split's cosine has exactly the expectation wanted
//! (disjoint halves of independent episodes are independent batches), and so has T. The spread
//! of the S split cosines is not T's sampling error: the splits share the same episodes, so it
//! leaves out how T moves from log to log (as a 95% confidence interval it covered the truth
//! in 85.5% to 100% of 400 simulated logs, depending on the regime; now 93.2% to 100%:
//! src/audit/coverage.rs, README "Coverage of the intervals").
//! Instead:
//! - jackknife: with the splits held fixed, T_(i) is T with episode i left out of the half that
//!   holds it (that half's gradient is recomputed from its summed contribution rows minus
//!   episode i's, so batch-dependent baselines are re-estimated too), and
//!   se_J^2 = (N - 1) / N sum_i (T_(i) - mean T_(.))^2 (Efron and Tibshirani 1993, eq. 11.5);
//!   the splits themselves are a random choice, which adds the variance of the S split
//!   cosines over S: se^2 = se_J^2 + s_split^2 / S;
//! - the interval is normal on Fisher's z = atanh(T): tanh(atanh(T) +- z_q se / (1 - T^2))
//!   (the delta method for atanh), which keeps both ends inside (-1, 1) and lets the interval
//!   lean away from the bound when T is near +-1, as a cosine's sampling distribution does.
//!
//! Cost: min(S, 32) N times the estimator's column count, once per estimator (the jackknife
//! runs over the first 32 splits; the split variance term is estimated from them too and
//! divided by the S splits the point averages); the per-split values are
//! computed in parallel and summed in split order, so the result does not depend on the
//! thread count.

use crate::contrib::Plan;
use crate::resample;
use crate::stats::{Interval, normal};
use ndarray::{ArrayView2, s};
use rayon::prelude::*;

/// Splits the jackknife runs over (the first ones of the point figure's): the influence of an
/// episode on the mean cosine is estimated from 32 splits nearly as well as from 200, at a
/// sixth of the cost (on a 5,000-episode log with d = 32, all 200 splits made the audit 1.3 s
/// slower).
const JACKKNIFE_SPLITS: usize = 32;

/// The jackknife interval of estimator k's cosine_half `estimate` over the same `splits`
/// half splits as the point figure (seed and split numbers as in `resample_all`); None with
/// fewer than 4 episodes or when a leave-one-out cosine is undefined (a zero half gradient).
pub fn interval(
    plan: &Plan,
    contrib: ArrayView2<f64>,
    k: usize,
    (seed, splits): (u64, usize),
    estimate: f64,
    confidence: f64,
) -> Option<Interval> {
    let n = contrib.nrows();
    if n < 4 || splits == 0 || !estimate.is_finite() {
        return None;
    }
    let used = splits.min(JACKKNIFE_SPLITS);
    let per_split: Vec<(f64, Vec<f64>)> = (0..used)
        .into_par_iter()
        .map(|s| leave_one_out(plan, contrib, k, seed, s))
        .collect();
    let mut jack = vec![0.0; n];
    for (_, values) in &per_split {
        jack.iter_mut().zip(values).for_each(|(j, v)| *j += v);
    }
    jack.iter_mut().for_each(|j| *j /= used as f64);
    if jack.iter().any(|j| !j.is_finite()) {
        return None;
    }
    let m = jack.iter().sum::<f64>() / n as f64;
    let ss: f64 = jack.iter().map(|j| (j - m) * (j - m)).sum();
    // The jackknife holds the splits fixed; the choice of S splits adds the split cosines'
    // own variance over S (the Monte-Carlo error of averaging S of them).
    let whole: Vec<f64> = per_split.iter().map(|(c, _)| *c).collect();
    let wm = whole.iter().sum::<f64>() / used as f64;
    let split_var =
        whole.iter().map(|c| (c - wm) * (c - wm)).sum::<f64>() / (used.max(2) - 1) as f64;
    let se = ((n as f64 - 1.0) / n as f64 * ss + split_var / splits as f64).sqrt();
    if !se.is_finite() {
        return None;
    }
    Some(fisher(estimate.clamp(-1.0, 1.0), se, confidence))
}

/// tanh(atanh(t) +- z_q se / (1 - t^2)); the point itself when |t| = 1 (every split agreed
/// exactly) or se = 0.
fn fisher(t: f64, se: f64, confidence: f64) -> Interval {
    if t.abs() >= 1.0 || se == 0.0 {
        return Interval { low: t, high: t };
    }
    let zq = normal::quantile(1.0 - (1.0 - confidence) / 2.0);
    let (z, sz) = (t.atanh(), se / (1.0 - t * t));
    Interval {
        low: (z - zq * sz).tanh(),
        high: (z + zq * sz).tanh(),
    }
}

/// For split s: the cosine between its halves, and the cosine when each episode in turn is
/// left out of its half (NaN where a half gradient is zero).
fn leave_one_out(
    plan: &Plan,
    contrib: ArrayView2<f64>,
    k: usize,
    seed: u64,
    s: usize,
) -> (f64, Vec<f64>) {
    let n = contrib.nrows();
    let cols = plan.columns(k);
    let (mut first, mut second) = (vec![0.0; n], vec![0.0; n]);
    resample::half_split(seed, s as u64, &mut first, &mut second);
    let side = |i: usize| usize::from(first[i] == 0.0);
    let mut sums = [vec![0.0; cols.len()], vec![0.0; cols.len()]];
    let mut counts = [0.0; 2];
    for (i, row) in contrib.outer_iter().enumerate() {
        let h = side(i);
        counts[h] += 1.0;
        let row = row.slice(s![cols.clone()]);
        sums[h].iter_mut().zip(row).for_each(|(a, x)| *a += x);
    }
    // One mean buffer and one gradient buffer for all N leave-one-out gradients of the split.
    let (mut mean, mut out) = (vec![0.0; cols.len()], vec![0.0; plan.d]);
    let mut grad = |sum: &mut dyn Iterator<Item = f64>, count: f64| {
        mean.iter_mut().zip(sum).for_each(|(m, x)| *m = x / count);
        plan.gradient_from_columns(k, &mean, &mut out);
        out.clone()
    };
    let whole = [
        grad(&mut sums[0].iter().copied(), counts[0]),
        grad(&mut sums[1].iter().copied(), counts[1]),
    ];
    let mut loo_grad = |i: usize, row: ndarray::ArrayView1<f64>| {
        let h = side(i);
        let row = row.slice(s![cols.clone()]);
        let mut loo = sums[h].iter().zip(row).map(|(a, x)| a - x);
        mean.iter_mut()
            .zip(&mut loo)
            .for_each(|(m, x)| *m = x / (counts[h] - 1.0));
        plan.gradient_from_columns(k, &mean, &mut out);
        cosine(&out, &whole[1 - h])
    };
    let loo = contrib
        .outer_iter()
        .enumerate()
        .map(|(i, row)| loo_grad(i, row))
        .collect();
    (cosine(&whole[0], &whole[1]), loo)
}

fn cosine(a: &[f64], b: &[f64]) -> f64 {
    let dot: f64 = a.iter().zip(b).map(|(x, y)| x * y).sum();
    let na = a.iter().map(|x| x * x).sum::<f64>().sqrt();
    let nb = b.iter().map(|x| x * x).sum::<f64>().sqrt();
    (dot / (na * nb)).clamp(-1.0, 1.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    // The delta method for atanh: d atanh(t) / dt = 1 / (1 - t^2), so at t = 0 the interval is
    // t +- z_q se to first order (tanh(x) = x - x^3 / 3 + ...), and at t = 0.9 it leans away
    // from 1 (the upper end is nearer t than the lower one).
    #[test]
    fn fisher_interval_by_hand() {
        let iv = fisher(0.0, 0.001, 0.95);
        assert!((iv.high - 1.959964 * 0.001).abs() < 1e-8, "{iv:?}");
        assert!((iv.low + iv.high).abs() < 1e-15);
        let lean = fisher(0.9, 0.05, 0.95);
        assert!(
            lean.high < 1.0 && lean.high - 0.9 < 0.9 - lean.low,
            "{lean:?}"
        );
        assert_eq!(
            fisher(1.0, 0.1, 0.95),
            Interval {
                low: 1.0,
                high: 1.0
            }
        );
    }
}
