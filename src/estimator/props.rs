//! Property tests of the return scans on random episodes: lengths 1 to 500, rewards and
//! values spanning 1e-12 to 1e12 in magnitude, gamma and lambda anywhere in [0, 1].

use super::scan;
use proptest::prelude::*;

/// A magnitude-diverse float: sign x mantissa x 10^e, e in [-12, 12].
fn wide() -> impl Strategy<Value = f64> {
    (-1.0f64..1.0, -12i32..=12).prop_map(|(m, e)| m * 10f64.powi(e))
}

fn episode() -> impl Strategy<Value = (Vec<f64>, Vec<f64>)> {
    (1usize..=500).prop_flat_map(|n| {
        (
            prop::collection::vec(wide(), n),
            prop::collection::vec(wide(), n),
        )
    })
}

/// Tolerance for comparing two ways of summing the same terms: relative to the sum of the
/// absolute values of the terms involved (rounding error grows with that, not with the result).
fn close(a: f64, b: f64, scale: f64) -> bool {
    (a - b).abs() <= 1e-9 * scale.max(f64::MIN_POSITIVE)
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, ..ProptestConfig::default() })]

    // GAE (Schulman et al. 2015, eq. 16) is the discounted sum of TD residuals
    // A_t = sum_l (gamma lambda)^l delta_{t+l}; the scan computes it by the backward recursion
    // A_t = delta_t + gamma lambda A_{t+1}. Both are the same finite sum, so they agree up to
    // rounding, bounded by the sum of |terms|.
    #[test]
    fn gae_recursion_equals_explicit_sum((r, v) in episode(), tail in wide(), gamma in 0.0f64..=1.0, lambda in 0.0f64..=1.0) {
        let (mut d, mut a) = (Vec::new(), Vec::new());
        scan::td_residuals(&r, &v, tail, gamma, &mut d);
        scan::gae(&d, gamma, lambda, &mut a);
        let n = r.len();
        for t in (0..n).step_by(7) {
            let (mut sum, mut scale, mut w) = (0.0, 0.0, 1.0);
            for l in 0..n - t {
                sum += w * d[t + l];
                scale += (w * d[t + l]).abs();
                w *= gamma * lambda;
            }
            prop_assert!(close(a[t], sum, scale), "t={t}: {} vs {sum}", a[t]);
        }
    }

    // gae:0 = td exactly (the recursion adds 0 * A_{t+1}), and gae:1 = rtg_discounted - value on
    // terminated episodes (eq. 18: the V terms telescope), up to rounding of the telescoping.
    #[test]
    fn gae_zero_and_one_identities((r, v) in episode(), gamma in 0.0f64..=1.0) {
        let (mut d, mut a0, mut a1, mut g) = (Vec::new(), Vec::new(), Vec::new(), Vec::new());
        scan::td_residuals(&r, &v, 0.0, gamma, &mut d);
        scan::gae(&d, gamma, 0.0, &mut a0);
        prop_assert_eq!(&a0, &d);
        scan::gae(&d, gamma, 1.0, &mut a1);
        scan::discounted_returns(&r, gamma, &mut g);
        let scale: f64 = r.iter().chain(&v).map(|x| x.abs()).sum::<f64>() * 4.0;
        for t in 0..r.len() {
            prop_assert!(close(a1[t], g[t] - v[t], scale), "t={t}");
        }
    }

    // nstep:1 = td: with m = 1 the window is r_t + gamma V_{t+1} - V_t, which is delta_t; the
    // scan forms it as G_t - gamma G_{t+1} + gamma V_{t+1} - V_t, exact up to the cancellation
    // in G_t - gamma G_{t+1}, bounded by |G| terms.
    #[test]
    fn nstep_one_is_td((r, v) in episode(), tail in wide(), gamma in 0.0f64..=1.0) {
        let (mut d, mut g, mut n1) = (Vec::new(), Vec::new(), Vec::new());
        scan::td_residuals(&r, &v, tail, gamma, &mut d);
        scan::discounted_returns(&r, gamma, &mut g);
        scan::nstep(&g, &v, tail, gamma, 1, &mut n1);
        let scale: f64 = r.iter().chain(&v).map(|x| x.abs()).sum::<f64>() * 4.0 + tail.abs();
        for t in 0..r.len() {
            prop_assert!(close(n1[t], d[t], scale), "t={t}: {} vs {}", n1[t], d[t]);
        }
    }
}
