//! Resampling whole episodes. Replicate b's weights come from an RNG keyed by (seed, stream, b)
//! alone, and replicates are computed in fixed-size blocks, each one matrix product of its
//! weights with the contribution matrix. The block size never depends on the thread count, so
//! results are bit-identical for any number of threads.

use ndarray::{Array2, ArrayView2, Axis, s};
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

/// Replicates per matrix product: large enough to amortise packing, small enough to keep the
/// weight block (BLOCK x N) in cache-friendly size.
const BLOCK: usize = 32;

/// Independent random streams of one run.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(u64)]
pub enum Stream {
    Bootstrap = 1,
    HalfSplit = 2,
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
