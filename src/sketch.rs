//! Scores logged as random-projection sketches. A deep policy has millions of parameters and
//! nobody logs its full score vector; instead the log holds k fixed random projections
//! p_tj = z_j . grad log pi(a_t | s_t), with the z_j drawn once per run and E[z z^T] = I.
//! Every estimator's gradient projects exactly (sum_t Psi_t p_tj = z_j . g), so the audit runs
//! unchanged on the k columns, and for any vector v, ||Z v||^2 / k is an unbiased estimate of
//! ||v||^2 (Hutchinson 1989). Variance, bias^2, MSE and the signal are therefore rescaled by
//! 1/k to estimate the full-gradient figures; ratios of them (snr, ess, episodes_for_snr) are
//! unchanged by the rescaling, and cosines are preserved approximately (Johnson-Lindenstrauss).

use crate::report::{AuditReport, Sketch};

/// Relative standard deviation of ||Z v||^2 / k for Gaussian z and a single direction (the
/// worst case; spread-out covariances do better): sqrt(2 / k).
pub fn worst_relative_sd(k: usize) -> f64 {
    (2.0 / k as f64).sqrt()
}

/// Rescales a report computed on k sketch columns into estimates of the full-gradient figures.
pub fn rescale(report: &mut AuditReport, k: usize) {
    let s = 1.0 / k as f64;
    let r = s.sqrt();
    let scale = |x: &mut Option<f64>, by: f64| *x = x.map(|v| v * by);
    let scale_iv = |i: &mut Option<crate::stats::Interval>, by: f64| {
        if let Some(i) = i {
            i.low *= by;
            i.high *= by;
        }
    };
    scale(&mut report.signal, s);
    scale(&mut report.reference_variance, s);
    scale_iv(&mut report.signal_interval, s);
    for e in &mut report.estimators {
        scale(&mut e.variance, s);
        scale(&mut e.bias_sq, s);
        scale(&mut e.mse, s);
        scale_iv(&mut e.bias_sq_interval, s);
        scale(&mut e.gradient_norm, r);
        scale_iv(&mut e.gradient_norm_interval, r);
        scale_iv(&mut e.bias_norm_interval, r);
    }
    report.input.sketch = Some(Sketch {
        k,
        note: format!(
            "scores are {k} random projections: variance, bias^2, mse, signal and the norms are \
             estimates of the full-gradient figures (Hutchinson's estimator, unbiased for the \
             squared figures, relative error up to about {:.0}% for k = {k}, less when the \
             variance is spread over many directions); snr, ess and episodes_for_snr are \
             ratios and carry the same relative error at most; cosine_half is preserved \
             approximately (Johnson-Lindenstrauss); the gradient vector shown is the projected \
             one",
            100.0 * worst_relative_sd(k)
        ),
    });
}

#[cfg(test)]
mod tests {
    use crate::audit::{AuditConfig, run};
    use crate::estimator::Estimator;
    use crate::testkit::reader;
    use rand::SeedableRng;
    use rand_distr::{Distribution, StandardNormal};
    use std::fmt::Write;

    const D: usize = 48;
    const K: usize = 16;

    /// A policy with D parameters: scalar action a ~ N(theta . phi, 1) on random features phi,
    /// reward -(a - 1)^2, 3 steps per episode; score (a - theta . phi) phi. Returns the full
    /// log, the sketched log (K Gaussian projections) and the per-episode rtg gradients.
    fn logs(n: usize) -> (String, String, Vec<Vec<f64>>, Vec<Vec<f64>>) {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(21);
        let mut g = || -> f64 { StandardNormal.sample(&mut rng) };
        let theta: Vec<f64> = (0..D).map(|_| 0.1 * g()).collect();
        let z: Vec<Vec<f64>> = (0..K).map(|_| (0..D).map(|_| g()).collect()).collect();
        let head = |w: usize| {
            let mut h = String::from("episode,step,reward,terminated");
            for j in 0..w {
                write!(h, ",score_{j}").unwrap();
            }
            h + "\n"
        };
        let (mut full, mut sk) = (head(D), head(K));
        let mut per_episode = Vec::new();
        for e in 0..n {
            let mut steps = Vec::new();
            for _ in 0..3 {
                let phi: Vec<f64> = (0..D).map(|_| g()).collect();
                let mu: f64 = theta.iter().zip(&phi).map(|(a, b)| a * b).sum();
                let a = mu + g();
                let s: Vec<f64> = phi.iter().map(|p| (a - mu) * p).collect();
                steps.push((-(a - 1.0) * (a - 1.0), s));
            }
            let mut ge = vec![0.0; D];
            let mut rtg = 0.0;
            for t in (0..3).rev() {
                rtg += steps[t].0;
                for (x, sj) in ge.iter_mut().zip(&steps[t].1) {
                    *x += rtg * sj;
                }
            }
            per_episode.push(ge);
            for (t, (r, s)) in steps.iter().enumerate() {
                let end = u8::from(t == 2);
                write!(full, "{e},{t},{r},{end}").unwrap();
                write!(sk, "{e},{t},{r},{end}").unwrap();
                for x in s {
                    write!(full, ",{x}").unwrap();
                }
                for zj in &z {
                    write!(sk, ",{}", zj.iter().zip(s).map(|(a, b)| a * b).sum::<f64>()).unwrap();
                }
                full.push('\n');
                sk.push('\n');
            }
        }
        (full, sk, per_episode, z)
    }

    #[test]
    fn sketched_audit_estimates_the_full_figures() {
        let n = 3000;
        let (full, sk, per_episode, z) = logs(n);
        let base = AuditConfig {
            gamma: 0.5,
            resamples: 400,
            splits: 20,
            estimators: Some(Estimator::parse_list("rtg,rtg_discounted").unwrap()),
            ..AuditConfig::default()
        };
        let a = run(reader(&full), &base).unwrap();
        let b = run(
            reader(&sk),
            &AuditConfig {
                sketch: Some(K),
                ..base.clone()
            },
        )
        .unwrap();
        assert!(b.input.sketch.is_some());
        let row = |r: &crate::report::AuditReport, name: &str| {
            r.estimators
                .iter()
                .find(|e| e.name == name)
                .unwrap()
                .clone()
        };
        // Exact: every estimator's gradient projects, sum_t Psi_t (Z s_t) = Z g.
        for name in ["rtg", "rtg_discounted"] {
            let (gf, gs) = (
                row(&a, name).gradient.unwrap(),
                row(&b, name).gradient.unwrap(),
            );
            for (j, zj) in z.iter().enumerate() {
                let proj: f64 = zj.iter().zip(&gf).map(|(x, y)| x * y).sum();
                assert!(
                    (proj - gs[j]).abs() <= 1e-9 * proj.abs().max(1.0),
                    "{name}[{j}]"
                );
            }
        }
        // Hutchinson: with the same resamples, the sketched variance is tr(Z S Z^T) / k for the
        // bootstrap covariance S, mean tr S and sd sqrt(2 tr(S^2) / k) for Gaussian z. S is
        // close to the sample covariance of the per-episode gradients over N (the bootstrap
        // estimate of a mean's covariance, Efron and Tibshirani 1993), which gives the scale.
        let mean: Vec<f64> = (0..D)
            .map(|j| per_episode.iter().map(|g| g[j]).sum::<f64>() / n as f64)
            .collect();
        let mut cov = vec![vec![0.0; D]; D];
        for g in &per_episode {
            for i in 0..D {
                for j in 0..D {
                    cov[i][j] += (g[i] - mean[i]) * (g[j] - mean[j]) / (n as f64 * n as f64);
                }
            }
        }
        let tr: f64 = (0..D).map(|i| cov[i][i]).sum();
        let tr2: f64 = cov.iter().flatten().map(|x| x * x).sum();
        let sd = (2.0 * tr2 / K as f64).sqrt();
        let (vf, vs) = (
            row(&a, "rtg").variance.unwrap(),
            row(&b, "rtg").variance.unwrap(),
        );
        assert!(
            (vf / tr - 1.0).abs() < 0.15,
            "bootstrap trace {vf} vs sample {tr}"
        );
        assert!(
            (vs - vf).abs() < 4.0 * sd,
            "sketched {vs} vs full {vf}, sd {sd}"
        );
        // Ratios survive the rescaling: snr of rtg within the same relative error.
        let (sf, ss) = (row(&a, "rtg").snr.unwrap(), row(&b, "rtg").snr.unwrap());
        assert!(
            (ss / sf - 1.0).abs() < 4.0 * sd / vf + 4.0 * super::worst_relative_sd(K),
            "{ss} vs {sf}"
        );
    }
}
