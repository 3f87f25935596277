//! Checks of the Poisson resampler against published values and closed forms.

use super::*;
use crate::resample::{bootstrap_counts, weighted_means};

// SipHash-2-4 of the 15 bytes 00..0e under the key 00..0f: a129ca6149be45e5 (Aumasson and
// Bernstein 2012, "SipHash: a fast short-input PRF", Appendix A, the reference vector). Also
// the empty message and a full 8-byte block from the same paper's vector table (the first and
// the ninth entries of vectors.h in the reference code: 726fdb47dd0e0e31, 93f5f5799a932462).
#[test]
fn siphash_matches_the_reference_vectors() {
    let key = (0x0706_0504_0302_0100, 0x0f0e_0d0c_0b0a_0908);
    let msg: Vec<u8> = (0u8..15).collect();
    assert_eq!(siphash24(key, &msg), 0xa129_ca61_49be_45e5);
    assert_eq!(siphash24(key, &[]), 0x726f_db47_dd0e_0e31);
    assert_eq!(siphash24(key, &msg[..8]), 0x93f5_f579_9a93_2462);
}

// Poisson(1): P(X = k) = e^-1 / k!. Over 200,000 keyed draws the frequencies of 0, 1, 2, 3
// agree with it within 5 binomial standard errors, and the mean and variance are both 1
// (their standard errors here are sqrt(1/n) = 0.0022 and about sqrt(3/n) = 0.004).
#[test]
fn weights_follow_poisson_one() {
    let n = 200_000;
    let mut counts = [0usize; 8];
    let mut w = vec![0.0; 100];
    let (mut sum, mut sq) = (0.0, 0.0);
    for e in 0..n / 100 {
        poisson_weights(9, id_hash(format!("ep{e}").as_bytes()), &mut w);
        for &x in &w {
            counts[(x as usize).min(7)] += 1;
            sum += x;
            sq += x * x;
        }
    }
    let nf = n as f64;
    let mut fact = 1.0;
    for (k, &c) in counts.iter().enumerate().take(4) {
        if k > 0 {
            fact *= k as f64;
        }
        let p = (-1.0f64).exp() / fact;
        let se = (p * (1.0 - p) / nf).sqrt();
        assert!(
            (c as f64 / nf - p).abs() < 5.0 * se,
            "P({k}) {} vs {p}",
            c as f64 / nf
        );
    }
    let mean = sum / nf;
    assert!((mean - 1.0).abs() < 0.011, "mean {mean}");
    assert!((sq / nf - mean * mean - 1.0).abs() < 0.02);
}

#[test]
fn weights_depend_only_on_seed_replicate_and_id() {
    let (mut a, mut b) = (vec![0.0; 300], vec![0.0; 40]);
    poisson_weights(3, id_hash(b"17"), &mut a);
    poisson_weights(3, id_hash(b"17"), &mut b);
    // The first 40 replicates are the same however many are drawn: word b is replicate b.
    assert_eq!(&a[..40], &b[..]);
    poisson_weights(4, id_hash(b"17"), &mut b);
    assert_ne!(&a[..40], &b[..]);
    poisson_weights(3, id_hash(b"18"), &mut b);
    assert_ne!(&a[..40], &b[..]);
}

fn rows(n: usize, width: usize) -> Vec<(u128, Vec<f64>)> {
    (0..n)
        .map(|i| {
            let row = (0..width)
                .map(|j| ((i * 7 + j * 3) as f64 * 0.61).sin() * 10f64.powi((j % 3) as i32))
                .collect();
            (id_hash(format!("{i}").as_bytes()), row)
        })
        .collect()
}

// Any split of the episodes into shards, in any order, gives the sums of one pass to 1e-13 of
// the terms' magnitude (the (hi, lo) accumulation leaves only the rounding of each block's
// product, relative to the terms summed, not to a sum that cancels).
#[test]
fn sums_of_shards_equal_the_sums_of_the_whole() {
    let data = rows(301, 5);
    let mut whole = PoissonSums::new(1, 50, 7, 5);
    for (h, r) in &data {
        whole.push(*h, r);
    }
    let want = whole.means();
    for k in [2usize, 7] {
        let mut parts: Vec<PoissonSums> = (0..k).map(|_| PoissonSums::new(1, 50, 7, 5)).collect();
        // Reverse order and a scattered assignment.
        for (i, (h, r)) in data.iter().enumerate().rev() {
            parts[(i * 31 + i / 3) % k].push(*h, r);
        }
        let mut total = parts.remove(0);
        for mut p in parts {
            total.merge(&mut p);
        }
        let got = total.means();
        for j in 0..5 {
            let scale = data.iter().map(|(_, r)| r[j].abs()).fold(0.0, f64::max);
            for (g, w) in got.column(j).iter().zip(want.column(j)) {
                assert!((g - w).abs() <= 1e-13 * scale, "{g} vs {w}");
            }
        }
        assert_eq!(total.weight, whole.weight);
    }
}

// Every hash split puts each episode in exactly one half; the halves have about N/2 episodes.
#[test]
fn hash_halves_partition_the_episodes() {
    let data = rows(400, 1);
    let mut s = PoissonSums::new(2, 2, 30, 1);
    for (h, r) in &data {
        s.push(*h, r);
    }
    s.flush();
    for split in 0..30 {
        let (a, b) = (s.weight[3 + 2 * split], s.weight[4 + 2 * split]);
        assert_eq!(a + b, 400.0);
        // Binomial(400, 1/2): sd 10; 5 sd.
        assert!((a - 200.0).abs() < 50.0, "half of {a}");
    }
}

// The bootstrap variance of a mean, both schemes against closed forms (Efron and Tibshirani
// 1993, "An Introduction to the Bootstrap", section 6.2 / Problem 6.5, from memory; the
// Poisson case derived here). sigma^2 = (1/n) sum (x_i - xbar)^2 is the plug-in variance.
// - Multinomial: counts M ~ Mult(n, 1/n), Var M_i = 1 - 1/n, Cov(M_i, M_j) = -1/n, so
//   Var*(sum M_i x_i / n) = (1/n^2) [sum x_i^2 (1 - 1/n) - (1/n) sum_{i != j} x_i x_j]
//   = (1/n^2) sum (x_i - xbar)^2 = sigma^2 / n = (n - 1)/n * s^2/n.
// - Poisson: W_i iid Poisson(1), m = sum W_i ~ Poisson(n), and given m the weights are
//   Mult(m, 1/n); so mean* = sum W_i x_i / m has, given m, mean xbar and variance sigma^2 / m,
//   and Var* = sigma^2 E[1/m | m >= 1] = sigma^2 / n (1 + 1/n + O(n^-2)) (the m = 0 replicate,
//   probability e^-n, is left out). E[1/m | m >= 1] is summed exactly below.
// With B = 20,000 replicates a variance estimate has relative Monte-Carlo error about
// sqrt(2/B) = 1% (for a near-normal mean); we allow 5%.
#[test]
fn bootstrap_variance_of_a_mean_matches_both_closed_forms() {
    let n = 40;
    let x: Vec<f64> = (0..n)
        .map(|i| ((i * 37 % 17) as f64).powf(1.3) - 4.0)
        .collect();
    let nf = n as f64;
    let mean = x.iter().sum::<f64>() / nf;
    let sigma2 = x.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / nf;
    let b = 20_000;
    let var_of = |reps: &[f64]| {
        let m = reps.iter().sum::<f64>() / reps.len() as f64;
        reps.iter().map(|r| (r - m).powi(2)).sum::<f64>() / (reps.len() as f64 - 1.0)
    };
    let c = Array2::from_shape_vec((n, 1), x.clone()).unwrap();
    let multi = weighted_means(c.view(), b, |r, w| bootstrap_counts(3, r as u64, w));
    let multi_var = var_of(
        multi
            .column(0)
            .as_slice()
            .unwrap_or(&multi.column(0).to_vec()),
    );
    let mut sums = PoissonSums::new(3, b, 1, 1);
    for (i, v) in x.iter().enumerate() {
        sums.push(id_hash(&(i as u64).to_le_bytes()), &[*v]);
    }
    let means = sums.means();
    let poisson: Vec<f64> = means.slice(s![1..1 + b, 0]).to_vec();
    let poisson_var = var_of(&poisson);
    // E[1/m | m >= 1] for m ~ Poisson(n): sum over m = 1..400 of pmf(m) / m, over 1 - e^-n.
    let (mut pmf, mut inv) = ((-nf).exp(), 0.0);
    for m in 1..400 {
        pmf *= nf / m as f64;
        inv += pmf / m as f64;
    }
    let inv = inv / (1.0 - (-nf).exp());
    let want_multi = sigma2 / nf;
    let want_poisson = sigma2 * inv;
    assert!((inv * nf - 1.0 - 1.0 / nf).abs() < 3.0 / (nf * nf)); // the expansion above
    assert!(
        (multi_var / want_multi - 1.0).abs() < 0.05,
        "{multi_var} vs {want_multi}"
    );
    assert!(
        (poisson_var / want_poisson - 1.0).abs() < 0.05,
        "{poisson_var} vs {want_poisson}"
    );
}
