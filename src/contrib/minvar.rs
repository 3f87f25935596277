//! Sufficient sums of the minimum-variance baselines, so that the baselines are re-estimated
//! inside every resample from weighted means of per-episode sums (like mean_baseline's).
//!
//! Constant per-component baseline for the total-return form (Peters and Schaal 2008, episodic
//! REINFORCE; Greensmith, Bartlett and Baxter 2004, for the general minimum-variance result).
//! Component j of one episode's gradient is g_j = H_j (R - b_j), H_j = sum_t s_tj, R the
//! episode's return. E[H_j] = 0, so E[g_j] = E[H_j R] for any constant b_j and
//! Var(g_j) = E[H_j^2 (R - b_j)^2] - E[H_j R]^2, a parabola in b_j with its minimum at
//!   b_j = E[H_j^2 R] / E[H_j^2].
//! Per episode: [H R | H | H^2 R | H^2] (4 d numbers); under weights w the batch gradient is
//! mean_w(H R)_j - b_j(w) mean_w(H)_j with b_j(w) = mean_w(H^2 R)_j / mean_w(H^2)_j.
//!
//! Time-dependent baseline for reward-to-go in its per-reward form: sum_t s_t sum_{u>=t} r_u =
//! sum_t C_t r_t with C_tj = sum_{u<=t} s_uj, and a baseline per reward time,
//! g_j = sum_t C_tj (r_t - b_tj), unbiased since E[C_tj] = 0. Peters and Schaal's optimal
//! per-time baseline (their G(PO)MDP derivation, which drops the covariances between
//! different times) is b_tj = E[C_tj^2 r_t] / E[C_tj^2]. Times are pooled in bins (every step
//! below 8, then four bins per doubling of t; see [`time_bin`]), b constant within a bin:
//! b_betaj = E[sum_{t in beta} C_tj^2 r_t] / E[sum_{t in beta} C_tj^2], which is the same formula
//! for the pooled terms and still unbiased (b depends on time only). Per episode:
//! [sum_t C_t r_t | for each bin: sum C^2 r, sum C^2, sum C] (d (1 + 3 RTG_BINS) numbers).
//! Episodes of different lengths: the sum runs over the steps an episode has, and where the
//! episode ends depends on its actions (docking, a fall), so E[sum_{t<T} C_t b_t] is not zero
//! by itself. We pad every episode to the longest horizon with zero rewards and its score sum
//! frozen at C_{T-1}: then sum_t C_{min(t, T-1)} b_t has expectation 0 by optional stopping
//! (C is a martingale, min(t, T-1) a bounded stopping time), and the rewards' part is
//! unchanged. The padding adds, per bin after the end, (steps of the bin after T) x C_{T-1}
//! to the C sums and that count x C_{T-1}^2 to the C^2 sums (r = 0 there); bins past every
//! episode get b = 0 and drop out. Without it the demo rover's estimate was biased (bias^2 191,
//! detected at N = 3000).
//! Each bin's baseline is estimated from the batch, so d x (bins used) numbers are fitted on
//! N episodes: like any in-sample fit this adds a bias of order (d x bins) / N, which the
//! audit's bias column measures (few bins keep it small: 20 for a 60-step horizon).
//! Rewards are undiscounted in both, as in `total` and `rtg`, so both are unbiased for the
//! reference's objective. A component whose denominator is zero gets b = 0.

/// Time bins of the time-dependent baseline: 8 single steps, then 4 per doubling up to 2^21
/// steps (later steps share the last bin).
pub const RTG_BINS: usize = 8 + 4 * 18;

/// The first step of bin `bin` (for `bin` = RTG_BINS: 2^21, where the bins end).
pub fn bin_start(bin: usize) -> usize {
    if bin < 8 {
        return bin;
    }
    let (octave, quarter) = (3 + (bin - 8) / 4, (bin - 8) % 4);
    (4 + quarter) << (octave - 2)
}

/// The bin of step t.
pub fn time_bin(t: usize) -> usize {
    if t < 8 {
        return t;
    }
    let octave = (usize::BITS - 1 - t.leading_zeros()) as usize; // floor(log2 t) >= 3
    let quarter = (t >> (octave - 2)) & 3;
    (8 + 4 * (octave - 3) + quarter).min(RTG_BINS - 1)
}

pub fn total_width(d: usize) -> usize {
    4 * d
}

pub fn rtg_width(d: usize) -> usize {
    d * (1 + 3 * RTG_BINS)
}

/// The episode's sums for the constant baseline, into `out` (length 4 d, zeroed).
pub fn contribute_total(rewards: &[f64], scores: &[f64], d: usize, out: &mut [f64]) {
    let ret: f64 = rewards.iter().sum();
    let (hr, rest) = out.split_at_mut(d);
    let (h, rest) = rest.split_at_mut(d);
    let (h2r, h2) = rest.split_at_mut(d);
    for s in scores.chunks_exact(d) {
        h.iter_mut().zip(s).for_each(|(a, x)| *a += x);
    }
    for j in 0..d {
        hr[j] = h[j] * ret;
        h2[j] = h[j] * h[j];
        h2r[j] = h2[j] * ret;
    }
}

/// The episode's sums for the time-dependent baseline, into `out` (length [`rtg_width`],
/// zeroed); `cum` is scratch.
pub fn contribute_rtg(
    rewards: &[f64],
    scores: &[f64],
    d: usize,
    out: &mut [f64],
    cum: &mut Vec<f64>,
) {
    cum.clear();
    cum.resize(d, 0.0);
    let (cr, bins) = out.split_at_mut(d);
    for (t, (r, s)) in rewards.iter().zip(scores.chunks_exact(d)).enumerate() {
        let base = 3 * d * time_bin(t);
        for j in 0..d {
            cum[j] += s[j];
            let c = cum[j];
            cr[j] += c * r;
            bins[base + j] += c * c * r;
            bins[base + d + j] += c * c;
            bins[base + 2 * d + j] += c;
        }
    }
    // Padding after the end (see the module header): r = 0, C frozen.
    let end = rewards.len();
    if end == 0 || end >= bin_start(RTG_BINS) {
        return;
    }
    for bin in time_bin(end)..RTG_BINS {
        let steps = (bin_start(bin + 1) - bin_start(bin).max(end)) as f64;
        let base = 3 * d * bin;
        for j in 0..d {
            let c = cum[j];
            bins[base + d + j] += steps * c * c;
            bins[base + 2 * d + j] += steps * c;
        }
    }
}

/// b_j = num_j / den_j, 0 where den_j is 0.
fn ratio(num: f64, den: f64) -> f64 {
    if den > 0.0 { num / den } else { 0.0 }
}

/// The constant baselines b_j from a weighted mean of the sums.
pub fn total_baselines(cols: &[f64], d: usize) -> Vec<f64> {
    (0..d)
        .map(|j| ratio(cols[2 * d + j], cols[3 * d + j]))
        .collect()
}

/// The batch gradient with the constant baselines, from a weighted mean of the sums.
pub fn gradient_total(cols: &[f64], d: usize, out: &mut [f64]) {
    let b = total_baselines(cols, d);
    for j in 0..d {
        out[j] = cols[j] - b[j] * cols[d + j];
    }
}

/// The batch gradient with the time-dependent baselines, from a weighted mean of the sums.
pub fn gradient_rtg(cols: &[f64], d: usize, out: &mut [f64]) {
    out.copy_from_slice(&cols[..d]);
    for bin in cols[d..].chunks_exact(3 * d) {
        for j in 0..d {
            out[j] -= ratio(bin[j], bin[d + j]) * bin[2 * d + j];
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bins_are_single_steps_then_quarter_octaves() {
        let got: Vec<usize> = [0, 7, 8, 9, 10, 15, 16, 19, 20, 31, 32, 63, 64]
            .map(time_bin)
            .to_vec();
        assert_eq!(got, vec![0, 7, 8, 8, 9, 11, 12, 12, 13, 15, 16, 19, 20]);
        assert_eq!(time_bin(usize::MAX), RTG_BINS - 1);
        assert_eq!(time_bin((1 << 21) - 1), RTG_BINS - 1);
        for bin in 0..RTG_BINS {
            assert_eq!(time_bin(bin_start(bin)), bin);
            assert_eq!(time_bin(bin_start(bin + 1) - 1), bin);
        }
        assert_eq!(bin_start(RTG_BINS), 1 << 21);
    }

    // A single episode, d = 1, steps s = (1, 2), r = (3, 5): C = (1, 3), so
    // sum C r = 3 + 15 = 18 (= rtg: 1 * 8 + 2 * 5); bin 0: (C^2 r, C^2, C) = (3, 1, 1), bin 1:
    // (45, 9, 3); padding: bins 2, 3, ... get one step each up to step 7, then bin 8 (steps
    // 8, 9) two, with C frozen at 3: (0, 9, 3) and (0, 18, 6). With that one episode as the
    // batch, b_0 = 3, b_1 = 5, later bins 0, and the gradient is 18 - 3 * 1 - 5 * 3 = 0 (one
    // episode: the baseline equals its own rewards). Constant form:
    // H = 3, R = 8: (HR, H, H^2R, H^2) = (24, 3, 72, 9), b = 8, gradient 24 - 8 * 3 = 0.
    #[test]
    fn sums_by_hand() {
        let mut out = vec![0.0; rtg_width(1)];
        contribute_rtg(&[3.0, 5.0], &[1.0, 2.0], 1, &mut out, &mut Vec::new());
        assert_eq!(&out[..7], &[18.0, 3.0, 1.0, 1.0, 45.0, 9.0, 3.0]);
        assert_eq!(&out[7..10], &[0.0, 9.0, 3.0]);
        assert_eq!(&out[1 + 3 * 8..1 + 3 * 9], &[0.0, 18.0, 6.0]);
        let mut g = [1.0];
        gradient_rtg(&out, 1, &mut g);
        assert_eq!(g, [0.0]);
        let mut tot = vec![0.0; 4];
        contribute_total(&[3.0, 5.0], &[1.0, 2.0], 1, &mut tot);
        assert_eq!(tot, vec![24.0, 3.0, 72.0, 9.0]);
        gradient_total(&tot, 1, &mut g);
        assert_eq!(g, [0.0]);
    }
}
