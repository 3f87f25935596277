//! The gradient noise scale (McCandlish, Kaplan, Amodei et al. 2018, "An empirical model of
//! large-batch training", eq. 2.9): B_simple = tr(Sigma) / |G|^2, Sigma the covariance of one
//! sample's gradient and G the true gradient. Here a sample is an episode: tr(Sigma) = N V_k
//! (V_k the variance trace of the mean over N episodes) and |G|^2 is the reference's signal,
//! so B_simple = N V_k / signal episodes; times the mean episode length, in steps.
//!
//! Identities (tested to 1e-12 in tests/cli/significance.rs):
//! - episodes_for_snr = N V_k / (signal / target - bias_sq) is B_simple at target 1 for an
//!   unbiased estimator (bias_sq = 0): ceil(B_simple) episodes reach snr 1, as McCandlish et
//!   al. read B_simple as the batch where noise and signal are of equal size;
//! - two independent half batches of n = N/2 episodes have gradients G + e_A, G + e_B with
//!   E|e|^2 = tr(Sigma) / n, so E[g_A . g_B] = |G|^2 and E|g_A|^2 = |G|^2 (1 + B_simple / n):
//!   the expected half-batch cosine is about 1 / (1 + 2 B_simple / N) (a ratio of
//!   expectations, close when |g_A| concentrates, i.e. for many effective dimensions).
//!
//! The interval: per bootstrap replicate b, the replicate's own closed-form figures give
//! B*_b = (qbar_k,b - |g_k,b|^2) / S*_b, S*_b = |g_ref,b|^2 - (qbar_ref,b - |g_ref,b|^2) / N,
//! with qbar the weighted mean of per-episode |g_i|^2 (contrib.rs moment columns). S*_b can be
//! zero or negative, so the BCa interval ([`super::intervals`], acceleration from the episode
//! jackknife) is formed for the reciprocal 1 / B (finite whenever the variance is positive)
//! and mapped back; a lower end of 1 / B at or below 0 leaves B's upper end unbounded.

use super::intervals;
use serde::Serialize;

/// B_simple in episodes from the reported variance and signal; None without a positive finite
/// signal or a finite variance.
pub fn episodes(n: usize, variance: f64, signal: f64) -> Option<f64> {
    let b = n as f64 * variance / signal;
    (signal > 0.0 && signal.is_finite() && b.is_finite()).then_some(b)
}

/// 1 / B_simple from one mean row's closed-form figures: `g` and `q` (mean of |g_i|^2) of the
/// estimator and of the reference, `n` episodes per batch.
pub fn reciprocal(n: usize, g: &[f64], q: f64, g_ref: &[f64], q_ref: f64) -> f64 {
    let sq = |v: &[f64]| v.iter().map(|x| x * x).sum::<f64>();
    let per_episode = q - sq(g);
    let signal = sq(g_ref) - (q_ref - sq(g_ref)) / n as f64;
    signal / per_episode
}

/// An interval for B_simple whose upper end may be unbounded.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ScaleInterval {
    pub low: f64,
    /// None: the data do not exclude a zero signal, so any batch size may be too small.
    pub high: Option<f64>,
}

impl ScaleInterval {
    pub fn scaled(self, by: f64) -> ScaleInterval {
        ScaleInterval {
            low: self.low * by,
            high: self.high.map(|h| h * by),
        }
    }
}

/// The BCa interval of B_simple from the replicates and jackknife values of 1 / B_simple.
pub fn interval(
    reciprocals: Vec<f64>,
    estimate: f64,
    jackknife: &[f64],
    confidence: f64,
) -> Option<ScaleInterval> {
    let iv = intervals::bca(reciprocals, estimate, jackknife, confidence)?;
    if iv.high <= 0.0 {
        return None;
    }
    Some(ScaleInterval {
        low: 1.0 / iv.high,
        high: (iv.low > 0.0).then(|| 1.0 / iv.low),
    })
}

/// The bias-corrected (BC) interval of B_simple from replicates of 1 / B_simple alone: BCa
/// with zero acceleration (a constant jackknife gives a = 0, Efron and Tibshirani 1993,
/// sec. 14.3), for resamplers that keep no per-episode rows.
pub fn interval_bc(reciprocals: Vec<f64>, estimate: f64, confidence: f64) -> Option<ScaleInterval> {
    interval(reciprocals, estimate, &[0.0, 0.0], confidence)
}

#[cfg(test)]
mod tests {
    use super::*;

    // reciprocal against the definition: g = (1, 1), q = 6 -> N V = 6 - 2 = 4; g_ref = (2, 0),
    // q_ref = 8, N = 4 -> signal = 4 - (8 - 4) / 4 = 3; 1 / B = 3 / 4.
    #[test]
    fn reciprocal_by_hand() {
        assert_eq!(reciprocal(4, &[1.0, 1.0], 6.0, &[2.0, 0.0], 8.0), 0.75);
        assert_eq!(episodes(10, 0.3, 1.5), Some(2.0));
        assert_eq!(episodes(10, 0.3, 0.0), None);
        let iv = ScaleInterval {
            low: 1.0,
            high: None,
        };
        assert_eq!(iv.scaled(3.0).low, 3.0);
    }
}
