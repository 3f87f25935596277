//! Bias-corrected and accelerated (BCa) bootstrap intervals (Efron 1987, "Better bootstrap
//! confidence intervals", JASA 82; Efron and Tibshirani 1993, ch. 14), for figures whose
//! percentile interval under-covers: the sweep's MSE and the gradient noise scale.
//!
//! With theta^* the B replicate values, theta-hat the estimate and theta_(i) the leave-one-
//! episode-out (jackknife) values:
//! - z0 = Phi^-1(#{theta^* < theta-hat} / B) (ties count one half): the median bias of the
//!   replicates;
//! - a = sum_i (m - theta_(i))^3 / (6 [sum_i (m - theta_(i))^2]^(3/2)), m the mean of theta_(i):
//!   the acceleration, how fast the estimate's standard error changes with its value;
//! - the ends are the replicates' percentiles at Phi(z0 + (z0 + z_q) / (1 - a (z0 + z_q))) for
//!   z_q = Phi^-1(alpha / 2) and Phi^-1(1 - alpha / 2).
//!
//! BCa is second-order accurate where the percentile interval is first-order only, and it
//! corrects both a shift of the replicates (the sq-norm figures' replicates sit above their
//! estimate by the variance) and a skew (variance-like figures are right-skewed).

use super::normal;
use super::{Interval, percentile};

/// The BCa interval, or None when a value is not finite or there are too few replicates or
/// jackknife values.
pub fn bca(
    mut replicates: Vec<f64>,
    estimate: f64,
    jackknife: &[f64],
    confidence: f64,
) -> Option<Interval> {
    if replicates.len() < 2
        || jackknife.len() < 2
        || !estimate.is_finite()
        || replicates.iter().chain(jackknife).any(|x| !x.is_finite())
    {
        return None;
    }
    let b = replicates.len() as f64;
    let below = replicates.iter().filter(|&&x| x < estimate).count() as f64;
    let ties = replicates.iter().filter(|&&x| x == estimate).count() as f64;
    // Keep the fraction inside (0, 1): with every replicate on one side z0 would be infinite.
    let frac = ((below + 0.5 * ties) / b).clamp(0.5 / b, 1.0 - 0.5 / b);
    let z0 = normal::quantile(frac);
    let a = acceleration(jackknife);
    replicates.sort_by(f64::total_cmp);
    let alpha = 1.0 - confidence;
    let end = |q: f64| {
        let zq = normal::quantile(q);
        let denom = 1.0 - a * (z0 + zq);
        // A huge acceleration can push the adjusted level past the replicates: use the
        // extreme replicate then (the interval cannot say more than the bootstrap saw).
        let level = if denom > 0.0 {
            normal::cdf(z0 + (z0 + zq) / denom)
        } else if q < 0.5 {
            0.0
        } else {
            1.0
        };
        percentile(&replicates, level)
    };
    Some(Interval {
        low: end(alpha / 2.0),
        high: end(1.0 - alpha / 2.0),
    })
}

/// The jackknife acceleration a (see the module header); 0 when the values do not vary.
pub fn acceleration(jackknife: &[f64]) -> f64 {
    let n = jackknife.len() as f64;
    let m = jackknife.iter().sum::<f64>() / n;
    let (mut s2, mut s3) = (0.0, 0.0);
    for x in jackknife {
        let d = m - x;
        s2 += d * d;
        s3 += d * d * d;
    }
    if s2 > 0.0 {
        s3 / (6.0 * s2.powf(1.5))
    } else {
        0.0
    }
}

/// The scale a studentised interval is formed on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Scale {
    /// theta itself.
    Plain,
    /// ln theta, for positive figures whose spread grows with their value (variances, MSEs):
    /// the ends stay positive and the skew is mostly removed.
    Log,
}

/// The studentised (bootstrap-t) interval: see the module header. `se` is the estimate's
/// standard error, `replicate_se[b]` that of replicate b computed the same way inside it.
/// None when a value is not finite, the estimate is not positive on the log scale, or fewer
/// than 2 replicates have a defined t.
pub fn studentized(
    estimate: f64,
    se: f64,
    replicates: &[f64],
    replicate_se: &[f64],
    confidence: f64,
    scale: Scale,
) -> Option<Interval> {
    let to = |x: f64| match scale {
        Scale::Plain => Some(x),
        Scale::Log => (x > 0.0).then(|| x.ln()),
    };
    // On the log scale the standard error of ln theta is se / theta (delta method).
    let se_on = |x: f64, s: f64| match scale {
        Scale::Plain => s,
        Scale::Log => s / x,
    };
    let (centre, spread) = (to(estimate)?, se_on(estimate, se));
    if !(centre.is_finite() && spread.is_finite() && spread >= 0.0) {
        return None;
    }
    let mut t: Vec<f64> = Vec::with_capacity(replicates.len());
    for (&x, &s) in replicates.iter().zip(replicate_se) {
        if !x.is_finite() || !s.is_finite() {
            return None;
        }
        // A replicate with no spread of its own (at 0 on the log scale, or every resampled
        // episode alike) has no t; it is left out.
        let Some(value) = to(x) else { continue };
        let s = se_on(x, s);
        if s > 0.0 {
            t.push((value - centre) / s);
        }
    }
    if t.len() < 2 {
        return None;
    }
    t.sort_by(f64::total_cmp);
    let alpha = 1.0 - confidence;
    let from = |y: f64| match scale {
        Scale::Plain => y,
        Scale::Log => y.exp(),
    };
    // theta - se t*_(1 - alpha/2) and theta - se t*_(alpha/2) (Efron and Tibshirani 1993,
    // eq. 12.19): the upper quantile of t gives the lower end.
    let end = |q: f64| from(centre - spread * percentile(&t, q));
    Some(Interval {
        low: end(1.0 - alpha / 2.0),
        high: end(alpha / 2.0),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    // With replicates symmetric around the estimate and a symmetric jackknife, z0 = a = 0 and
    // BCa is the percentile interval (Efron and Tibshirani 1993, sec. 14.3), up to the 1e-7
    // error of Phi (1000 replicates apart by 1: the ends move by 1e-4 at most).
    #[test]
    fn symmetric_case_is_the_percentile_interval() {
        let reps: Vec<f64> = (0..1001).map(|i| i as f64 - 500.0).collect();
        let jack: Vec<f64> = (0..20).map(|i| (i as f64 - 9.5) * 0.1).collect();
        assert!(acceleration(&jack).abs() < 1e-12);
        let iv = bca(reps.clone(), 0.0, &jack, 0.9).unwrap();
        let mut sorted = reps;
        sorted.sort_by(f64::total_cmp);
        assert!((iv.low - percentile(&sorted, 0.05)).abs() < 1e-4, "{iv:?}");
        assert!((iv.high - percentile(&sorted, 0.95)).abs() < 1e-4, "{iv:?}");
    }

    // With every replicate's standard error equal to the estimate's, t*_b = (x_b - theta) / se
    // and the bootstrap-t ends theta - se t*_q are 2 theta - x_(q): the basic bootstrap
    // interval (Davison and Hinkley 1997, eq. 5.6).
    #[test]
    fn studentized_with_constant_se_is_the_basic_interval() {
        let reps: Vec<f64> = (0..1000).map(|i| 3.0 + (i as f64 / 37.0).sin()).collect();
        let iv = studentized(3.2, 0.5, &reps, &[0.5; 1000], 0.9, Scale::Plain).unwrap();
        let mut sorted = reps.clone();
        sorted.sort_by(f64::total_cmp);
        assert!(
            (iv.low - (6.4 - percentile(&sorted, 0.95))).abs() < 1e-12,
            "{iv:?}"
        );
        assert!(
            (iv.high - (6.4 - percentile(&sorted, 0.05))).abs() < 1e-12,
            "{iv:?}"
        );
    }

    // On the log scale with x_b = theta e^(z_b) and se*_b = c x_b (se = c theta), t*_b = z_b / c
    // and the ends are theta e^(-z_(q)), i.e. theta^2 / x_(q): the basic interval of ln theta.
    #[test]
    fn studentized_on_the_log_scale_inverts_the_ratios() {
        let (theta, c) = (4.0, 0.3);
        let z: Vec<f64> = (0..999)
            .map(|i| 0.4 * ((i as f64 + 0.5) / 999.0 - 0.3))
            .collect();
        let reps: Vec<f64> = z.iter().map(|z| theta * z.exp()).collect();
        let se: Vec<f64> = reps.iter().map(|x| c * x).collect();
        let iv = studentized(theta, c * theta, &reps, &se, 0.8, Scale::Log).unwrap();
        let mut sorted = reps.clone();
        sorted.sort_by(f64::total_cmp);
        let want_low = theta * theta / percentile(&sorted, 0.9);
        let want_high = theta * theta / percentile(&sorted, 0.1);
        // Up to the percentiles' linear interpolation between neighbours 4e-4 apart in z,
        // which exp bends by about (4e-4)^2 / 8 = 2e-8 relative.
        assert!(
            (iv.low - want_low).abs() < 1e-6 * theta,
            "{iv:?} vs {want_low}"
        );
        assert!(
            (iv.high - want_high).abs() < 1e-6 * theta,
            "{iv:?} vs {want_high}"
        );
        // Positive ends whatever the replicates: a log-scale interval never reaches 0.
        assert!(iv.low > 0.0);
        assert!(studentized(0.0, 1.0, &reps, &se, 0.8, Scale::Log).is_none());
    }

    // Shifted replicates: when every replicate sits 10 above the estimate's spread centre,
    // z0 > 0 moves both ends down (the bias correction), and a right-skewed jackknife (a > 0)
    // stretches the upper end.
    #[test]
    fn bias_correction_moves_the_ends() {
        let reps: Vec<f64> = (0..1000).map(|i| i as f64 / 10.0).collect();
        let jack = [0.0; 5];
        let plain = bca(reps.clone(), 50.0, &jack, 0.9).unwrap();
        let shifted = bca(reps.clone(), 60.0, &jack, 0.9).unwrap();
        assert!(shifted.low > plain.low && shifted.high > plain.high);
        let skew = [0.0, 0.0, 0.0, 0.0, -4.0];
        assert!(acceleration(&skew) > 0.0);
        let accel = bca(reps, 50.0, &skew, 0.9).unwrap();
        assert!(accel.high > plain.high, "{accel:?} {plain:?}");
    }
}
