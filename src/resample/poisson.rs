//! The Poisson(1) bootstrap, streamed: every episode gets an independent Poisson(1) weight in
//! each replicate (Chamandy, Muralidharan, Najmi and Naidu 2012, "Estimating uncertainty for
//! massive data streams", Google technical report), so each replicate's weighted sums of the
//! contribution rows can be accumulated as episodes finish and added across shards. Memory is
//! O(rows x width) (rows = 1 + B + 2S), whatever the number of episodes.
//!
//! Weights are keyed, not drawn in sequence: episode i's weight in replicate b is the b-th
//! output word of ChaCha8 keyed by (seed, stream, h_i), h_i the 128-bit [`id_hash`] of its id,
//! turned into a Poisson(1) count by the inverse CDF. So a weight depends only on the seed,
//! the replicate and the id: not on file order, thread count or which shard the episode is in.
//! Half splits likewise: episode i is in the first half of split s when bit s of the keyed
//! stream (seed, HalfSplit-by-hash, h_i) is 1 (halves of random size, about N/2 each).
//!
//! # Sums
//! Row r accumulates `sum_i w_ri c_i` and `sum_i w_ri`. Episodes are buffered in blocks of
//! [`BLOCK`]; a block's sums are one matrix product W (rows x block) C (block x width), added to
//! the running sums with Knuth's error-free TWO-SUM (TAOCP vol. 2, 4.2.2, Theorem B) into a
//! (hi, lo) pair. The running sums thus carry about twice f64's precision, and the rounding
//! of a block's own product (relative 2^-53 per term) is the only error left: the figures of
//! a log summed in any order or split into any shards agree to about 1e-15 relative, far
//! below the resampling noise.
//!
//! Row 0 has weight 1 for every episode: its mean is the full-sample mean row.

use super::Stream;
use ndarray::{Array2, ArrayView2, Axis, linalg::general_mat_mul, s};
use rand::Rng;
use rayon::prelude::*;

/// Episodes per block of the accumulation (the inner dimension of its matrix product).
pub const BLOCK: usize = 64;

/// Rows per parallel task when a block is added to the sums: fixed, so the result does not
/// depend on the thread count.
const ROW_CHUNK: usize = 128;

/// Largest Poisson(1) count the inverse CDF returns: P(X > 20) = 2e-20, below the 2^-64
/// resolution of the uniform word.
const MAX_COUNT: usize = 20;

/// The inverse-CDF thresholds of Poisson(1): `u < T[k]` (u a uniform 64-bit word) gives k.
fn thresholds() -> [u64; MAX_COUNT] {
    let mut out = [u64::MAX; MAX_COUNT];
    let (mut p, mut cdf) = ((-1.0f64).exp(), 0.0);
    for (k, t) in out.iter_mut().enumerate() {
        cdf += p;
        p /= (k + 1) as f64;
        // 2^64 * cdf, saturated: the last thresholds round to u64::MAX.
        *t = (cdf * 18_446_744_073_709_551_616.0).min(u64::MAX as f64) as u64;
    }
    out
}

/// A Poisson(1) count from a uniform 64-bit word.
fn poisson_count(u: u64, t: &[u64; MAX_COUNT]) -> f64 {
    t.iter().position(|&x| u < x).unwrap_or(MAX_COUNT) as f64
}

/// Episode `hash`'s Poisson(1) weights in replicates 0..out.len().
pub fn poisson_weights(seed: u64, hash: u128, out: &mut [f64]) {
    let t = thresholds();
    let mut r = keyed(seed, Stream::PoissonBootstrap, hash);
    for w in out.iter_mut() {
        *w = poisson_count(r.next_u64(), &t);
    }
}

/// Whether episode `hash` is in the first half of split s, for s in 0..out.len().
pub fn half_membership(seed: u64, hash: u128, out: &mut [bool]) {
    let mut r = keyed(seed, Stream::PoissonHalves, hash);
    for chunk in out.chunks_mut(64) {
        let word = r.next_u64();
        for (s, o) in chunk.iter_mut().enumerate() {
            *o = (word >> s) & 1 == 1;
        }
    }
}

/// ChaCha8 keyed by (seed, stream, hash): `super::rng`'s key with the id's hash in its last 16 bytes.
fn keyed(seed: u64, stream: Stream, hash: u128) -> rand_chacha::ChaCha8Rng {
    use rand::SeedableRng;
    let mut key = [0u8; 32];
    key[..8].copy_from_slice(&seed.to_le_bytes());
    key[8..16].copy_from_slice(&(stream as u64).to_le_bytes());
    key[16..].copy_from_slice(&hash.to_le_bytes());
    // The multinomial streams (super::rng) key an index in bytes 16..24; these streams have
    // their own stream numbers, so the two never share a key.
    rand_chacha::ChaCha8Rng::from_seed(key)
}

/// A stable 128-bit hash of an episode id: SipHash-2-4 (Aumasson and Bernstein 2012) of the
/// id's bytes under two fixed keys. Unlike `std`'s `DefaultHasher`, whose algorithm may change
/// between Rust releases, this is fixed by the shard format, so shards written by different
/// builds agree.
pub fn id_hash(id: &[u8]) -> u128 {
    const K0: (u64, u64) = (0x6772_6164_6175_6469, 0x7420_6964_2068_6173); // "gradaudit id has"
    const K1: (u64, u64) = (0x6820_7365_636f_6e64, 0x2068_616c_6620_2020); // "h second half   "
    (u128::from(siphash24(K0, id)) << 64) | u128::from(siphash24(K1, id))
}

/// SipHash-2-4 of `msg` under the key (k0, k1), as in the paper's reference code.
pub fn siphash24((k0, k1): (u64, u64), msg: &[u8]) -> u64 {
    let mut v = [
        k0 ^ 0x736f_6d65_7073_6575,
        k1 ^ 0x646f_7261_6e64_6f6d,
        k0 ^ 0x6c79_6765_6e65_7261,
        k1 ^ 0x7465_6462_7974_6573,
    ];
    fn round(v: &mut [u64; 4]) {
        v[0] = v[0].wrapping_add(v[1]);
        v[1] = v[1].rotate_left(13) ^ v[0];
        v[0] = v[0].rotate_left(32);
        v[2] = v[2].wrapping_add(v[3]);
        v[3] = v[3].rotate_left(16) ^ v[2];
        v[0] = v[0].wrapping_add(v[3]);
        v[3] = v[3].rotate_left(21) ^ v[0];
        v[2] = v[2].wrapping_add(v[1]);
        v[1] = v[1].rotate_left(17) ^ v[2];
        v[2] = v[2].rotate_left(32);
    }
    let compress = |m: u64, v: &mut [u64; 4]| {
        v[3] ^= m;
        round(v);
        round(v);
        v[0] ^= m;
    };
    let mut chunks = msg.chunks_exact(8);
    for c in &mut chunks {
        compress(u64::from_le_bytes(c.try_into().expect("8 bytes")), &mut v);
    }
    let rest = chunks.remainder();
    let mut last = [0u8; 8];
    last[..rest.len()].copy_from_slice(rest);
    let m = u64::from_le_bytes(last) | ((msg.len() as u64 & 0xff) << 56);
    compress(m, &mut v);
    v[2] ^= 0xff;
    for _ in 0..4 {
        round(&mut v);
    }
    v[0] ^ v[1] ^ v[2] ^ v[3]
}

/// Running weighted sums of contribution rows under the point weights, B Poisson replicates and
/// S hash half splits (rows: 0 the point, 1..=B the replicates, then the halves of split s in
/// rows 1 + B + 2s and 2 + B + 2s).
#[derive(Debug, Clone, PartialEq)]
pub struct PoissonSums {
    pub seed: u64,
    pub resamples: usize,
    pub splits: usize,
    pub width: usize,
    /// Sums of w c (rows x width) as hi + lo.
    pub hi: Array2<f64>,
    pub lo: Array2<f64>,
    /// Sums of w per row, exact (small integers).
    pub weight: Vec<f64>,
    pending: Vec<f64>,
    pending_hashes: Vec<u128>,
}

impl PoissonSums {
    pub fn new(seed: u64, resamples: usize, splits: usize, width: usize) -> PoissonSums {
        let rows = 1 + resamples + 2 * splits;
        PoissonSums {
            seed,
            resamples,
            splits,
            width,
            hi: Array2::zeros((rows, width)),
            lo: Array2::zeros((rows, width)),
            weight: vec![0.0; rows],
            pending: Vec::with_capacity(BLOCK * width),
            pending_hashes: Vec::with_capacity(BLOCK),
        }
    }

    /// Sums read back from a shard file (hi, lo: rows x width; weight: rows). None when the
    /// shapes do not fit `resamples` and `splits`.
    pub fn from_parts(
        seed: u64,
        (resamples, splits): (usize, usize),
        hi: Array2<f64>,
        lo: Array2<f64>,
        weight: Vec<f64>,
    ) -> Option<PoissonSums> {
        let rows = 1 + resamples + 2 * splits;
        let width = hi.ncols();
        (hi.nrows() == rows && lo.dim() == hi.dim() && weight.len() == rows).then(|| PoissonSums {
            seed,
            resamples,
            splits,
            width,
            hi,
            lo,
            weight,
            pending: Vec::new(),
            pending_hashes: Vec::new(),
        })
    }

    /// Rows of the sums.
    pub fn rows(&self) -> usize {
        self.weight.len()
    }

    /// Bytes held for `rows` x `width` sums and one block, for memory budgets.
    pub fn bytes(resamples: usize, splits: usize, width: usize) -> u128 {
        let rows = (1 + resamples + 2 * splits) as u128;
        let w = width as u128;
        8 * (2 * rows * w + rows + BLOCK as u128 * (w + rows) + ROW_CHUNK as u128 * w)
    }

    /// Adds one episode's contribution row, keyed by its id's [`id_hash`].
    pub fn push(&mut self, hash: u128, row: &[f64]) {
        debug_assert_eq!(row.len(), self.width);
        self.pending.extend_from_slice(row);
        self.pending_hashes.push(hash);
        if self.pending_hashes.len() == BLOCK {
            self.flush();
        }
    }

    /// Adds the buffered episodes to the sums.
    pub fn flush(&mut self) {
        let m = self.pending_hashes.len();
        if m == 0 {
            return;
        }
        let w = self.block_weights();
        let c = ArrayView2::from_shape((m, self.width), &self.pending).expect("m x width");
        for (total, col) in self.weight.iter_mut().zip(w.outer_iter()) {
            *total += col.sum();
        }
        let width = self.width;
        self.hi
            .axis_chunks_iter_mut(Axis(0), ROW_CHUNK)
            .into_par_iter()
            .zip(self.lo.axis_chunks_iter_mut(Axis(0), ROW_CHUNK))
            .enumerate()
            .for_each(|(chunk, (mut hi, mut lo))| {
                let start = chunk * ROW_CHUNK;
                let wk = w.slice(s![start..start + hi.nrows(), ..]);
                let mut part = Array2::<f64>::zeros((hi.nrows(), width));
                general_mat_mul(1.0, &wk, &c, 0.0, &mut part);
                ndarray::Zip::from(&mut hi)
                    .and(&mut lo)
                    .and(&part)
                    .for_each(|h, l, &x| two_sum_into(h, l, x));
            });
        self.pending.clear();
        self.pending_hashes.clear();
    }

    /// The weights of the buffered episodes: rows x m.
    fn block_weights(&self) -> Array2<f64> {
        let m = self.pending_hashes.len();
        let (b, s) = (self.resamples, self.splits);
        let mut w = Array2::<f64>::zeros((self.rows(), m));
        let mut reps = vec![0.0; b];
        let mut first = vec![false; s];
        for (i, &h) in self.pending_hashes.iter().enumerate() {
            poisson_weights(self.seed, h, &mut reps);
            half_membership(self.seed, h, &mut first);
            w[[0, i]] = 1.0;
            for (r, x) in reps.iter().enumerate() {
                w[[1 + r, i]] = *x;
            }
            for (k, f) in first.iter().enumerate() {
                let row = 1 + b + 2 * k + usize::from(!*f);
                w[[row, i]] = 1.0;
            }
        }
        w
    }

    /// Adds another accumulator's sums (both flushed first); it must have the same shape.
    pub fn merge(&mut self, other: &mut PoissonSums) {
        assert_eq!(self.hi.dim(), other.hi.dim(), "same rows and width");
        self.flush();
        other.flush();
        ndarray::Zip::from(&mut self.hi)
            .and(&mut self.lo)
            .and(&other.hi)
            .and(&other.lo)
            .for_each(|h, l, &oh, &ol| {
                two_sum_into(h, l, oh);
                *l += ol;
            });
        for (a, b) in self.weight.iter_mut().zip(&other.weight) {
            *a += b;
        }
    }

    /// Weighted mean rows (rows whose weights sum to zero are left zero), all rows: the point
    /// in row 0, then the replicates and the halves (see [`PoissonSums::replicate_rows`]).
    pub fn means(&mut self) -> Array2<f64> {
        self.flush();
        let mut mean = &self.hi + &self.lo;
        for (mut row, &w) in mean.outer_iter_mut().zip(&self.weight) {
            if w > 0.0 {
                row.mapv_inplace(|x| x / w);
            } else {
                row.fill(0.0);
            }
        }
        mean
    }

    /// The rows of the replicates and of the halves in [`PoissonSums::means`].
    pub fn replicate_rows(&self) -> (std::ops::Range<usize>, std::ops::Range<usize>) {
        let b = self.resamples;
        (1..1 + b, 1 + b..self.rows())
    }
}

/// hi + lo += x with an error-free transformation: hi takes the rounded sum, lo gathers the
/// rounding errors (TWO-SUM).
fn two_sum_into(hi: &mut f64, lo: &mut f64, x: f64) {
    let s = *hi + x;
    let bp = s - *hi;
    let err = (*hi - (s - bp)) + (x - bp);
    *hi = s;
    *lo += err;
}

#[cfg(test)]
mod tests;
