//! Scores as random-projection sketches. A deep policy has millions of parameters and nobody
//! audits its full score vector; instead every step's score is replaced by k projections
//! p_tj = z_j . grad log pi(a_t | s_t), with the z_j drawn once per run, independent, and
//! E[z z^T] = I. The projections are either logged (`--score-sketch K`: the log's score columns)
//! or computed by gradaudit from a policy network (`--project`, policy/projection.rs).
//! Every estimator's gradient projects exactly (sum_t Psi_t p_tj = z_j . g), so the audit runs
//! unchanged on the k columns, and for any vector v, ||Z v||^2 / k is an unbiased estimate of
//! ||v||^2 (Hutchinson 1989). Variance, bias^2, MSE and the signal are therefore rescaled by
//! 1/k to estimate the full-gradient figures; ratios of them (snr, ess, episodes_for_snr) are
//! unchanged by the rescaling, and cosines are preserved approximately (Johnson-Lindenstrauss).
//!
//! Precision of the projection. Each squared figure is a sum over the k projected coordinates,
//! F = sum_j f_j, and each f_j = z_j^T M z_j (M the figure's matrix: the bootstrap covariance
//! for the variance, b b^T minus the noise floor for bias^2) is on its own an unbiased estimate
//! of the full figure tr M, independent across j given the data. The rescaled figure F / k is
//! their mean, so its standard error is sd_j(f_j) / sqrt(k), measured from the k values
//! themselves: this holds for any distribution of z (Gaussian or the rank-one blocks of
//! projection.rs) and any spectrum of M, where sqrt(2 / k) is only the Gaussian worst case.

use crate::report::{AuditReport, Sketch, SketchPrecision};

/// Relative standard deviation of ||Z v||^2 / k for Gaussian z and a single direction (the
/// worst case; spread-out covariances do better): sqrt(2 / k).
pub fn worst_relative_sd(k: usize) -> f64 {
    (2.0 / k as f64).sqrt()
}

/// Mean and standard error sd_j / sqrt(k) of k per-projection estimates (None below 2 values
/// or when a value is not finite).
pub fn mean_and_se(values: &[f64]) -> Option<(f64, f64)> {
    let k = values.len();
    if k < 2 || values.iter().any(|v| !v.is_finite()) {
        return None;
    }
    let mean = values.iter().sum::<f64>() / k as f64;
    let var = values.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (k as f64 - 1.0);
    Some((mean, (var / k as f64).sqrt()))
}

/// One estimator's squared figures per projected coordinate (unscaled: the coordinate's own
/// contribution to the figure computed on the k columns).
#[derive(Debug, Clone, PartialEq)]
pub struct CoordFigures {
    pub estimator: String,
    pub variance: Vec<f64>,
    pub bias_sq: Vec<f64>,
    pub mse: Vec<f64>,
}

/// Where the projections came from, for the report.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Source {
    /// The log's score columns (`--score-sketch`).
    Logged,
    /// Computed from a policy network of this many parameters (`--project`).
    Computed { full_dim: usize },
}

/// The projection's standard errors from the per-coordinate figures.
fn precision(
    per_coord: &[CoordFigures],
    signal: Option<&[f64]>,
) -> (Vec<SketchPrecision>, Option<f64>) {
    let se = |v: &[f64]| mean_and_se(v).map(|(_, se)| se);
    let rows = per_coord
        .iter()
        .map(|c| SketchPrecision {
            estimator: c.estimator.clone(),
            variance_se: se(&c.variance),
            bias_sq_se: se(&c.bias_sq),
            mse_se: se(&c.mse),
        })
        .collect();
    (rows, signal.and_then(se))
}

/// The range over estimators of se / figure, in percent, for the note.
fn relative_range(
    report: &AuditReport,
    rows: &[SketchPrecision],
    pick: fn(&SketchPrecision) -> Option<f64>,
    figure: fn(&crate::report::EstimatorRow) -> Option<f64>,
) -> Option<(f64, f64)> {
    let rel: Vec<f64> = rows
        .iter()
        .filter_map(|p| {
            let e = report.estimators.iter().find(|e| e.name == p.estimator)?;
            let (se, f) = (pick(p)?, figure(e)?);
            (f > 0.0).then(|| 100.0 * se / f)
        })
        .collect();
    let lo = rel.iter().copied().fold(f64::INFINITY, f64::min);
    let hi = rel.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    (!rel.is_empty()).then_some((lo, hi))
}

/// Rescales the squared bias quoted in a note ("squared bias alone (X)", "estimated bias^2
/// (X)"), which stats.rs wrote on the k columns' scale.
fn rescale_note(note: &str, s: f64) -> String {
    for key in ["squared bias alone (", "estimated bias^2 ("] {
        if let Some(i) = note.find(key) {
            let start = i + key.len();
            if let Some(len) = note[start..].find(')')
                && let Ok(x) = note[start..start + len].parse::<f64>()
            {
                return format!("{}{:.3e}{}", &note[..start], x * s, &note[start + len..]);
            }
        }
    }
    note.to_string()
}

/// Rescales a report computed on k sketch columns into estimates of the full-gradient figures,
/// and reports the projection's own precision from `per_coord` (one entry per estimator) and
/// the signal's per-coordinate values, when given.
pub fn rescale(
    report: &mut AuditReport,
    k: usize,
    source: Source,
    per_coord: &[CoordFigures],
    signal: Option<&[f64]>,
) {
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
        e.notes = e.notes.iter().map(|n| rescale_note(n, s)).collect();
    }
    let (rows, signal_se) = precision(per_coord, signal);
    // The variance's relative error is the headline; bias^2 and mse can sit near zero (a
    // clamped bias), where a relative figure says nothing, so the JSON lists their absolute
    // standard errors.
    let measured = match relative_range(report, &rows, |p| p.variance_se, |e| e.variance) {
        Some((lo, hi)) => format!(
            "; measured from the spread over the {k} projections, the standard error is \
             {lo:.1}-{hi:.1}% of the variance across estimators (sketch.precision in the JSON \
             report lists every figure's, bias^2 and mse included){}",
            few_projections_caution(k)
        ),
        None => String::new(),
    };
    let (source_name, full_dim, what) = match source {
        Source::Logged => ("logged", None, "the score columns are".to_string()),
        Source::Computed { full_dim } => (
            "computed",
            Some(full_dim),
            format!("the policy's {full_dim} scores were projected onto"),
        ),
    };
    report.input.sketch = Some(Sketch {
        k,
        source: source_name.to_string(),
        full_dim,
        signal_se,
        precision: rows,
        note: format!(
            "{what} {k} random projections: variance, bias^2, mse, signal and the norms are \
             estimates of the full-gradient figures (Hutchinson's estimator, unbiased for the \
             squared figures; Gaussian worst case {:.0}% relative error for k = {k}{measured}); \
             snr, ess and episodes_for_snr are ratios and carry about the same relative error; \
             cosine_half is preserved approximately (Johnson-Lindenstrauss); the gradient vector \
             shown is the projected one",
            100.0 * worst_relative_sd(k)
        ),
    });
}

/// Below 64 projections the measured spread is itself a small-sample estimate: when a few
/// directions dominate the score covariance, each projection's squared figure is close to a
/// scaled chi-square(1) draw, and an unlucky set of k draws understates both the figure and
/// its spread (seen on the reaching-arm demo at k = 16: the variance 63% low while 16% was
/// measured). The report then points at the worst case instead.
fn few_projections_caution(k: usize) -> String {
    if k >= 64 {
        return String::new();
    }
    format!(
        "; with only {k} projections that measured error is itself uncertain and understates the \
         true one when a few directions dominate the scores' covariance: read the worst case, or \
         use --project 64 or more"
    )
}

#[cfg(test)]
mod tests {
    use super::mean_and_se;
    use crate::audit::{AuditConfig, run};
    use crate::estimator::Estimator;
    use crate::testkit::reader;
    use rand::SeedableRng;
    use rand_distr::{Distribution, StandardNormal};
    use std::fmt::Write;

    // The standard error of a mean of k values, sd / sqrt(k) with the k - 1 sample variance:
    // for 1, 2, 3, 4 the variance is 5/3, so se = sqrt(5/12).
    #[test]
    fn standard_error_of_the_mean_over_projections() {
        let (m, se) = mean_and_se(&[1.0, 2.0, 3.0, 4.0]).unwrap();
        assert_eq!(m, 2.5);
        assert!((se - (5.0f64 / 12.0).sqrt()).abs() < 1e-15);
        assert_eq!(mean_and_se(&[1.0]), None);
        assert_eq!(mean_and_se(&[1.0, f64::NAN]), None);
    }

    #[test]
    fn quoted_squared_biases_are_rescaled() {
        let n =
            "bias-limited: the squared bias alone (3.200e1) keeps snr below 1 at any batch size";
        assert_eq!(
            super::rescale_note(n, 0.25),
            "bias-limited: the squared bias alone (8.000e0) keeps snr below 1 at any batch size"
        );
        let m = "episodes_for_snr assumes no bias: the estimated bias^2 (4.000e2) would make";
        assert!(super::rescale_note(m, 0.5).contains("(2.000e2)"));
        assert_eq!(super::rescale_note("no number here", 0.5), "no number here");
    }

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
