//! The Poisson bootstrap against the multinomial one and against the truth of a simulated
//! problem: the scalar LQ problem of testkit.rs, whose logs are drawn afresh so the sampling
//! variance of the batch gradient is known from the simulation, not from the log.

use crate::audit::{AuditConfig, Resampling, collect, prepare, run};
use crate::estimator::Estimator;
use crate::testkit::{Lq, reader};

fn cfg(resampling: Resampling, seed: u64) -> AuditConfig {
    AuditConfig {
        estimators: Some(vec![Estimator::Rtg]),
        resamples: 500,
        splits: 2,
        seed,
        resampling,
        ..AuditConfig::default()
    }
}

fn rtg_variance(text: &str, c: &AuditConfig) -> f64 {
    let r = run(reader(text), c).expect("audit runs");
    r.estimators[0].variance.expect("defined")
}

fn mean_and_se(x: &[f64]) -> (f64, f64) {
    let n = x.len() as f64;
    let m = x.iter().sum::<f64>() / n;
    let v = x.iter().map(|v| (v - m).powi(2)).sum::<f64>() / (n - 1.0);
    (m, (v / n).sqrt())
}

// Over 40 independent logs of 200 LQ episodes (k = -0.5, sigma = 0.5, horizon 5):
// 1. each scheme's bootstrap variance of the rtg gradient matches its closed form given the
//    log's per-episode gradients g_i (resample/poisson/tests.rs derives both, after Efron and
//    Tibshirani 1993, section 6.2): multinomial sigma^2 / n, Poisson sigma^2 E[1/m], with
//    sigma^2 = (1/n) sum (g_i - gbar)^2 and m ~ Poisson(n); E[1/m] = (1 + 1/n + O(n^-2)) / n.
//    Per log the ratio has Monte-Carlo error about sqrt(2/B) = 6%; averaged over 40 logs about
//    1%; we allow 4 standard errors of the mean, measured from the ratios' own spread;
// 2. the two schemes agree: the mean of var_poisson / var_multinomial is 1 + 1/n within 4 of
//    its standard errors;
// 3. both estimate the hidden truth Var(g) / n * (n - 1) / n, Var(g) the per-episode variance
//    of the whole simulation (8,000 episodes), within 4 standard errors (the logs' spread plus
//    the pooled estimate's own error, from the fourth moment).
#[test]
fn poisson_and_multinomial_variances_agree_on_the_lq_problem() {
    let lq = Lq {
        k: -0.5,
        sigma: 0.5,
        h: 5,
    };
    let (n, logs) = (200usize, 40u64);
    let (mut ratio_m, mut ratio_p, mut ratio_pm) = (vec![], vec![], vec![]);
    let (mut var_m, mut var_p, mut pooled) = (vec![], vec![], vec![]);
    let nf = n as f64;
    let mut e_inv = 0.0; // E[1/m | m >= 1], m ~ Poisson(n)
    let mut pmf = (-nf).exp();
    for m in 1..2000 {
        pmf *= nf / m as f64;
        e_inv += pmf / m as f64;
    }
    for s in 0..logs {
        let text = lq.log(n, 1.0, 100 + s);
        let m = rtg_variance(&text, &cfg(Resampling::Multinomial, s));
        let p = rtg_variance(&text, &cfg(Resampling::Poisson, s));
        // The per-episode rtg gradients g_i: the contribution rows (d = 1, one estimator).
        let c = cfg(Resampling::Multinomial, s);
        let rd = reader(&text);
        let prep = prepare(&rd, &c).unwrap();
        let g: Vec<f64> = collect(rd, &prep.plan, &c, &prep.scores)
            .unwrap()
            .contrib
            .column(0)
            .to_vec();
        let gbar = g.iter().sum::<f64>() / nf;
        let sigma2 = g.iter().map(|x| (x - gbar).powi(2)).sum::<f64>() / nf;
        ratio_m.push(m / (sigma2 / nf));
        ratio_p.push(p / (sigma2 * e_inv));
        ratio_pm.push(p / m);
        var_m.push(m);
        var_p.push(p);
        pooled.extend(g);
    }
    for (name, r, want) in [
        ("multinomial / closed form", &ratio_m, 1.0),
        ("poisson / closed form", &ratio_p, 1.0),
        ("poisson / multinomial", &ratio_pm, 1.0 + 1.0 / nf),
    ] {
        let (mean, se) = mean_and_se(r);
        eprintln!("{name}: {mean:.4} +- {se:.4} (expected {want:.4})");
        assert!(
            (mean - want).abs() < 4.0 * se,
            "{name}: {mean} +- {se} vs {want}"
        );
        assert!(se < 0.02, "{name}: se {se}");
    }
    // The hidden truth from the whole simulation.
    let total = pooled.len() as f64;
    let mu = pooled.iter().sum::<f64>() / total;
    let var_g = pooled.iter().map(|x| (x - mu).powi(2)).sum::<f64>() / (total - 1.0);
    let m4 = pooled.iter().map(|x| (x - mu).powi(4)).sum::<f64>() / total;
    let se_var_g = ((m4 - var_g * var_g) / total).sqrt(); // the standard error of a variance
    let truth = var_g / nf * (nf - 1.0) / nf;
    for (name, v) in [("multinomial", &var_m), ("poisson", &var_p)] {
        let (mean, se) = mean_and_se(v);
        let se = (se * se + (se_var_g / nf).powi(2)).sqrt();
        eprintln!("{name}: mean variance {mean:.5} +- {se:.5}, truth {truth:.5}");
        assert!(
            (mean - truth).abs() < 4.0 * se,
            "{name}: {mean} +- {se} vs {truth}"
        );
    }
}
