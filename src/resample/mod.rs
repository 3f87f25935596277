//! Resampling whole episodes: the multinomial bootstrap here, the streamed Poisson(1) bootstrap
//! whose sums merge across shards in [`poisson`]. Replicate b's weights come from an RNG keyed by (seed, stream, b)
//! alone, and replicates are computed in fixed-size blocks, each one matrix product of its
//! weights with the contribution matrix. The block size never depends on the thread count, so
//! results are bit-identical for any number of threads.

use ndarray::{Array2, ArrayView2, Axis, s};
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use std::ops::Range;

pub mod poisson;

/// Replicates per matrix product: large enough to amortise packing, small enough to keep the
/// weight block (BLOCK x N) in cache-friendly size.
const BLOCK: usize = 32;

/// Independent random streams of one run.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(u64)]
pub enum Stream {
    Bootstrap = 1,
    HalfSplit = 2,
    /// Random projections of a large policy's scores (policy/projection.rs).
    Projection = 3,
    /// Poisson(1) weights keyed by episode id (poisson.rs).
    PoissonBootstrap = 4,
    /// Half splits keyed by episode id (poisson.rs).
    PoissonHalves = 5,
}

/// The RNG of draw `index` in `stream` for a run seeded with `seed`.
pub fn rng(seed: u64, stream: Stream, index: u64) -> ChaCha8Rng {
    let mut key = [0u8; 32];
    key[..8].copy_from_slice(&seed.to_le_bytes());
    key[8..16].copy_from_slice(&(stream as u64).to_le_bytes());
    key[16..24].copy_from_slice(&index.to_le_bytes());
    ChaCha8Rng::from_seed(key)
}

/// Multinomial bootstrap counts for replicate `b`: n draws with replacement from n episodes
/// (Efron and Tibshirani 1993, ch. 6). `out[i]` is how often episode i was drawn.
pub fn bootstrap_counts(seed: u64, b: u64, out: &mut [f64]) {
    let n = out.len();
    out.fill(0.0);
    let mut r = rng(seed, Stream::Bootstrap, b);
    for _ in 0..n {
        out[r.random_range(0..n)] += 1.0;
    }
}

/// Split number `s`: a random half of the n episodes gets weight 1 in `first`, the rest weight
/// 1 in `second` (first has floor(n/2) episodes).
pub fn half_split(seed: u64, s: u64, first: &mut [f64], second: &mut [f64]) {
    let n = first.len();
    let mut order: Vec<usize> = (0..n).collect();
    let mut r = rng(seed, Stream::HalfSplit, s);
    for i in (1..n).rev() {
        order.swap(i, r.random_range(0..=i));
    }
    first.fill(0.0);
    second.fill(1.0);
    for &i in &order[..n / 2] {
        first[i] = 1.0;
        second[i] = 0.0;
    }
}

/// Bytes that resampling `n` episodes holds besides its output rows: one weight block
/// (BLOCK x n) per worker thread, and a half split's permutation and two weight vectors. For
/// memory budgets, checked before [`weighted_means`] allocates them.
pub fn scratch_bytes(n: usize) -> u128 {
    let threads = rayon::current_num_threads().max(1) as u128;
    crate::limits::bytes(threads, 8 * (BLOCK as u128 + 3)).saturating_mul(n as u128)
}

/// Weighted mean rows: row r of the result is sum_i w_ri c_i / sum_i w_ri, where the weights of
/// row r are written by `weights(r, &mut buf)`. Rows whose weights sum to zero are left zero.
pub fn weighted_means<F>(contrib: ArrayView2<f64>, rows: usize, weights: F) -> Array2<f64>
where
    F: Fn(usize, &mut [f64]) + Sync,
{
    let (n, width) = contrib.dim();
    let mut out = Array2::<f64>::zeros((rows, width));
    out.axis_chunks_iter_mut(Axis(0), BLOCK)
        .into_par_iter()
        .enumerate()
        .for_each(|(block, mut chunk)| {
            let m = chunk.nrows();
            let mut w = Array2::<f64>::zeros((m, n));
            for (j, mut row) in w.axis_iter_mut(Axis(0)).enumerate() {
                let slice = row
                    .as_slice_mut()
                    .expect("rows of a fresh array are contiguous");
                weights(block * BLOCK + j, slice);
            }
            ndarray::linalg::general_mat_mul(1.0, &w, &contrib, 0.0, &mut chunk);
            for (j, mut row) in chunk.axis_iter_mut(Axis(0)).enumerate() {
                let total: f64 = w.slice(s![j, ..]).sum();
                if total > 0.0 {
                    row.mapv_inplace(|x| x / total);
                }
            }
        });
    out
}

/// Replicates per block of [`weighted_gradients`]: larger than [`BLOCK`] because each block
/// packs the contribution columns afresh for its matrix product; fixed, so results do not
/// depend on the thread count.
const GRADIENT_BLOCK: usize = 128;

/// Gradients of weighted mean rows, computed without holding the mean rows: for each block of
/// rows, the weighted means of only the columns `cols` are formed (one matrix product), and
/// `grad(means, out_row)` turns each block row of those columns into a d-vector, row r of the
/// result. Returns the gradients (rows x d) and how many calls of `grad` returned true.
pub fn weighted_gradients<W, G>(
    contrib: ArrayView2<f64>,
    rows: usize,
    cols: Range<usize>,
    d: usize,
    weights: W,
    grad: G,
) -> (Array2<f64>, usize)
where
    W: Fn(usize, &mut [f64]) + Sync,
    G: Fn(&[f64], &mut [f64]) -> bool + Sync,
{
    let n = contrib.nrows();
    let sub = contrib.slice(s![.., cols.clone()]);
    let mut out = Array2::<f64>::zeros((rows, d));
    let flagged = out
        .axis_chunks_iter_mut(Axis(0), GRADIENT_BLOCK)
        .into_par_iter()
        .enumerate()
        .map(|(block, mut chunk)| {
            let m = chunk.nrows();
            let mut w = Array2::<f64>::zeros((m, n));
            for (j, row) in w.outer_iter_mut().enumerate() {
                let row = row
                    .into_slice()
                    .expect("rows of a fresh array are contiguous");
                weights(block * GRADIENT_BLOCK + j, row);
            }
            let mut mean = Array2::<f64>::zeros((m, cols.len()));
            ndarray::linalg::general_mat_mul(1.0, &w, &sub, 0.0, &mut mean);
            let mut flagged = 0;
            for (j, (mut row, o)) in mean
                .outer_iter_mut()
                .zip(chunk.outer_iter_mut())
                .enumerate()
            {
                let total: f64 = w.slice(s![j, ..]).sum();
                if total > 0.0 {
                    row.mapv_inplace(|x| x / total);
                }
                let row = row
                    .into_slice()
                    .expect("rows of a fresh array are contiguous");
                let o = o
                    .into_slice()
                    .expect("rows of a fresh array are contiguous");
                flagged += usize::from(grad(row, o));
            }
            flagged
        })
        .sum();
    (out, flagged)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counts_sum_to_n_and_depend_only_on_seed_and_index() {
        let mut a = vec![0.0; 50];
        let mut b = vec![0.0; 50];
        bootstrap_counts(7, 3, &mut a);
        bootstrap_counts(7, 3, &mut b);
        assert_eq!(a, b);
        assert_eq!(a.iter().sum::<f64>(), 50.0);
        bootstrap_counts(7, 4, &mut b);
        assert_ne!(a, b);
    }

    #[test]
    fn halves_partition_the_episodes() {
        let (mut f, mut s) = (vec![0.0; 11], vec![0.0; 11]);
        half_split(1, 0, &mut f, &mut s);
        assert_eq!(f.iter().sum::<f64>(), 5.0);
        assert!(f.iter().zip(&s).all(|(a, b)| a + b == 1.0));
    }

    #[test]
    fn weighted_gradients_match_the_gradients_of_weighted_means() {
        let c = Array2::from_shape_fn((9, 5), |(i, j)| ((i * 5 + j) as f64 * 0.37).sin());
        let weights = |r: usize, w: &mut [f64]| bootstrap_counts(2, r as u64, w);
        // A "gradient" of columns 1..4: their values doubled, flagged when the first is > 0.
        let rows = 300; // more than two blocks
        let full = weighted_means(c.view(), rows, weights);
        let (got, flagged) = weighted_gradients(c.view(), rows, 1..4, 3, weights, |m, o| {
            for j in 0..3 {
                o[j] = 2.0 * m[j];
            }
            m[0] > 0.0
        });
        for r in 0..rows {
            for j in 0..3 {
                assert_eq!(got[[r, j]], 2.0 * full[[r, 1 + j]]);
            }
        }
        let want = (0..rows).filter(|&r| full[[r, 1]] > 0.0).count();
        assert_eq!(flagged, want);
        assert!(flagged > 0 && flagged < rows);
    }

    #[test]
    fn weighted_means_match_a_direct_sum() {
        let c = Array2::from_shape_fn((7, 3), |(i, j)| (i * 3 + j) as f64 * 0.5 - 2.0);
        let got = weighted_means(c.view(), 70, |r, w| bootstrap_counts(5, r as u64, w));
        let mut w = vec![0.0; 7];
        for r in [0, 31, 32, 69] {
            bootstrap_counts(5, r as u64, &mut w);
            for j in 0..3 {
                let want: f64 = (0..7).map(|i| w[i] * c[[i, j]]).sum::<f64>() / 7.0;
                assert!((got[[r, j]] - want).abs() < 1e-12);
            }
        }
    }
}

/// Checks of the resampler against published bootstrap results.
#[cfg(test)]
mod published {
    use super::*;

    fn correlation(x: &[f64], y: &[f64], w: &[f64]) -> f64 {
        let sw: f64 = w.iter().sum();
        let mx = x.iter().zip(w).map(|(a, w)| a * w).sum::<f64>() / sw;
        let my = y.iter().zip(w).map(|(a, w)| a * w).sum::<f64>() / sw;
        let (mut sxy, mut sxx, mut syy) = (0.0, 0.0, 0.0);
        for i in 0..x.len() {
            sxy += w[i] * (x[i] - mx) * (y[i] - my);
            sxx += w[i] * (x[i] - mx).powi(2);
            syy += w[i] * (y[i] - my).powi(2);
        }
        sxy / (sxx * syy).sqrt()
    }

    // Law school data, 15 schools (LSAT, GPA): Efron and Tibshirani (1993), "An Introduction to
    // the Bootstrap", Table 3.1; sample correlation 0.776, and bootstrap standard errors of the
    // correlation in their Table 6.1 settling near 0.132 for B = 3200 (values from memory of
    // the book). A bootstrap SE computed from B replicates has Monte-Carlo relative standard
    // deviation of roughly sqrt((kurtosis - 1) / (4B)); the correlation's bootstrap
    // distribution is skewed with kurtosis well under 10, so at B = 4000 that is under 2.5%
    // (0.003). We allow 0.012 (four such deviations plus the book's own Monte-Carlo error).
    #[test]
    fn law_school_correlation_standard_error() {
        let lsat = [
            576.0, 635.0, 558.0, 578.0, 666.0, 580.0, 555.0, 661.0, 651.0, 605.0, 653.0, 575.0,
            545.0, 572.0, 594.0,
        ];
        let gpa = [
            3.39, 3.30, 2.81, 3.03, 3.44, 3.07, 3.00, 3.43, 3.36, 3.13, 3.12, 2.74, 2.76, 2.88,
            2.96,
        ];
        let ones = [1.0; 15];
        assert!((correlation(&lsat, &gpa, &ones) - 0.776).abs() < 0.0005);
        let b_count = 4000;
        let mut w = [0.0; 15];
        let reps: Vec<f64> = (0..b_count)
            .map(|b| {
                bootstrap_counts(11, b, &mut w);
                correlation(&lsat, &gpa, &w)
            })
            .collect();
        let mean = reps.iter().sum::<f64>() / b_count as f64;
        let se =
            (reps.iter().map(|r| (r - mean).powi(2)).sum::<f64>() / (b_count as f64 - 1.0)).sqrt();
        assert!((se - 0.132).abs() < 0.012, "bootstrap SE {se}");
    }

    // Efron and Tibshirani (1993), section 6.2 / Problem 6.5 (from memory): for the sample
    // mean, the ideal bootstrap variance is (N-1)/N * s^2 / N, with s^2 the sample variance.
    // With B = 20000 replicates the Monte-Carlo relative error of a variance estimate is about
    // sqrt(2/B) = 1%; we allow 5%.
    #[test]
    fn bootstrap_variance_of_a_mean_converges_to_the_plug_in_value() {
        let x: Vec<f64> = (0..40)
            .map(|i| ((i * 37 % 17) as f64).powf(1.3) - 4.0)
            .collect();
        let n = x.len() as f64;
        let m = x.iter().sum::<f64>() / n;
        let s2 = x.iter().map(|v| (v - m).powi(2)).sum::<f64>() / (n - 1.0);
        let want = (n - 1.0) / n * s2 / n;
        let c = ndarray::Array2::from_shape_vec((40, 1), x.clone()).unwrap();
        let reps = weighted_means(c.view(), 20_000, |b, w| bootstrap_counts(3, b as u64, w));
        let col = reps.column(0);
        let mean = col.sum() / 20_000.0;
        let var = col.iter().map(|r| (r - mean).powi(2)).sum::<f64>() / 19_999.0;
        assert!(
            (var / want - 1.0).abs() < 0.05,
            "bootstrap {var} vs plug-in {want}"
        );
    }
}
