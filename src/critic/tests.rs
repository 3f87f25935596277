//! The cross-fitted critic against an in-sample fit, on a problem with a known gradient.

use super::*;
use crate::audit::{AuditConfig, run};
use crate::estimator::Estimator;
use crate::testkit::reader;
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use std::fmt::Write;

const N: usize = 400;
const M: usize = 40;

/// One-step episodes: state x ~ N(0, I_M), action a ~ N(0, 1) (a Gaussian policy whose mean
/// parameter has score s = a), reward r = a + 2 x_0 + e, e ~ N(0, 1). The exact gradient is
/// E[r s] = E[a^2] = 1, and a state-only baseline leaves it unbiased.
fn bandit(seed: u64) -> String {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let mut g = || -> f64 { StandardNormal.sample(&mut rng) };
    let mut text = String::from("episode,reward,terminated,score_0");
    for j in 0..M {
        write!(text, ",obs_{j}").unwrap();
    }
    text.push('\n');
    for i in 0..N {
        let x: Vec<f64> = (0..M).map(|_| g()).collect();
        let a = g();
        let r = a + 2.0 * x[0] + g();
        write!(text, "{i},{r},1,{a}").unwrap();
        for v in &x {
            write!(text, ",{v}").unwrap();
        }
        text.push('\n');
    }
    text
}

fn value_baseline_gradient(text: &str, in_sample: bool) -> f64 {
    let fit = FitConfig {
        in_sample,
        gamma: 1.0,
        ..FitConfig::default()
    };
    let critic = super::fit(reader(text), &fit).unwrap();
    let cfg = AuditConfig {
        gamma: 1.0,
        resamples: 20,
        splits: 2,
        estimators: Some(Estimator::parse_list("rtg,value_baseline").unwrap()),
        critic: Some(critic),
        ..AuditConfig::default()
    };
    let r = run(reader(text), &cfg).unwrap();
    r.estimators
        .iter()
        .find(|e| e.name == "value_baseline")
        .unwrap()
        .gradient
        .as_ref()
        .unwrap()[0]
}

// With p = 2 M + 3 = 83 regressors fitted on N = 400 episodes, the in-sample fitted value of
// episode i contains H_ii r_i, H the hat matrix, whose diagonal averages p / N = 0.21 (ridge
// makes it slightly smaller); r_i contains a_i, so E[(r_i - V_i) a_i] is about 1 - 0.21: a bias
// of about -0.2. The cross-fitted value of episode i comes from other episodes only, so its
// baseline is independent of a_i and the gradient stays unbiased. Over R = 10 datasets the
// mean's standard error is about sqrt(Var[(r - V) a] / N / R) = sqrt(3 / 4000) = 0.027, so the
// in-sample mean must be below 1 - 0.1 and the cross-fitted one within 0.11 (4 standard
// errors) of 1.
#[test]
fn cross_fitting_removes_the_in_sample_bias() {
    let r = 10;
    let (mut inside, mut crossed) = (0.0, 0.0);
    for seed in 0..r {
        let text = bandit(100 + seed);
        inside += value_baseline_gradient(&text, true) / r as f64;
        crossed += value_baseline_gradient(&text, false) / r as f64;
    }
    assert!(
        inside < 0.9,
        "in-sample fit should bias the gradient down by about 0.2: {inside}"
    );
    assert!(
        (crossed - 1.0).abs() < 0.11,
        "cross-fitted gradient should be unbiased: {crossed}"
    );
}

#[test]
fn explained_variance_of_a_perfect_and_a_useless_critic() {
    let mut perfect = ExplainedVariance::default();
    let mut useless = ExplainedVariance::default();
    for i in 0..100 {
        let g = (i as f64 * 0.37).sin() * 3.0;
        perfect.push(g, g);
        useless.push(g, 0.0);
    }
    assert_eq!(perfect.value(), Some(1.0));
    assert!(useless.value().unwrap().abs() < 1e-12);
    assert_eq!(ExplainedVariance::default().value(), None);
}

#[test]
fn folds_do_not_depend_on_row_order() {
    assert_eq!(fold_of(b"rover-0001", 5), fold_of(b"rover-0001", 5));
    let counts = (0..1000).fold([0usize; 5], |mut c, i| {
        c[fold_of(format!("ep{i}").as_bytes(), 5)] += 1;
        c
    });
    assert!(counts.iter().all(|&c| c > 150), "{counts:?}");
}

// Source: the feature map phi(s, t) = [1, s, s^2, t, t^2] of the module header, evaluated by
// hand. With weights w = (0.5, 1, -1, 0.25, 0, 0.1, 0.01) on a 2-D state, a truncated 2-step
// episode bootstraps at t = 2: with the logged next state s_T = (2, 3),
// 0.5 + 2 - 3 + 0.25 * 4 + 0.1 * 2 + 0.01 * 4 = 0.74; without it, at the last state (1, -1),
// 0.5 + 1 + 1 + 0.25 + 0.2 + 0.04 = 2.99.
#[test]
fn the_fitted_bootstrap_uses_the_logged_next_state_when_there_is_one() {
    let w = vec![0.5, 1.0, -1.0, 0.25, 0.0, 0.1, 0.01];
    let critic = Critic {
        weights: vec![w],
        folds: 1,
        in_sample: true,
        obs_dim: 2,
    };
    let layout = crate::episode::Layout {
        obs_dim: 2,
        ..Default::default()
    };
    let mut ep = Episode::new("e".into(), 2, &layout);
    ep.rewards = vec![0.0, 0.0];
    ep.obs = vec![0.0, 0.0, 1.0, -1.0];
    ep.end = End::Truncated { bootstrap: None };
    let mut without = ep.clone();
    ep.next_obs = Some(vec![2.0, 3.0]);
    critic.apply(&mut ep);
    critic.apply(&mut without);
    let boot = |e: &Episode| match e.end {
        End::Truncated { bootstrap } => bootstrap.unwrap(),
        End::Terminated => panic!("still truncated"),
    };
    assert!((boot(&ep) - 0.74).abs() < 1e-12, "{}", boot(&ep));
    assert!((boot(&without) - 2.99).abs() < 1e-12, "{}", boot(&without));
}
