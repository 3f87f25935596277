//! The projected audit of a 4,868-parameter network against the exact full-dimension figures.
//!
//! Exact figures without a d x d computation: let C_k be the N x d matrix of per-episode
//! gradients of estimator k, W the B x N bootstrap weights (counts / N), W_c its columns
//! centred over replicates, and G = C C^T the N x N Gram matrix. The bootstrap variance trace
//! sum_j var_b((W C)_bj) is tr(C^T W_c^T W_c C) / (B - 1) = sum(A .* G) / (B - 1) with
//! A = W_c^T W_c, and the squared distance of the point gradients is 1^T G_diff 1 / N^2, where
//! G_diff is the Gram matrix of C_k - C_ref. These are the definitions of stats.rs (variance
//! trace, bias^2 = ||g_k - g_ref||^2 - the paired variance trace), in closed form.

use crate::audit::{AuditConfig, collect, run, scores, select};
use crate::contrib::Plan;
use crate::estimator::Estimator;
use crate::policy::projection::ProjectMode;
use crate::resample::bootstrap_counts;
use crate::testkit::reader;
use ndarray::{Array2, s};
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use std::fmt::Write;

const OBS: usize = 8;
const HIDDEN: usize = 64;
const N: usize = 150;
const T: usize = 8;
const B: usize = 200;
const K: usize = 64;
const SEEDS: u64 = 20;

fn matrix(rows: usize, cols: usize, scale: f64, r: &mut rand_chacha::ChaCha8Rng) -> Vec<Vec<f64>> {
    (0..rows)
        .map(|_| {
            (0..cols)
                .map(|_| {
                    let x: f64 = StandardNormal.sample(&mut *r);
                    scale * x
                })
                .collect()
        })
        .collect()
}

/// An 8 -> 64 -> 64 -> 2 tanh Gaussian actor with inline tensors: 4,868 parameters.
fn description(r: &mut rand_chacha::ChaCha8Rng) -> String {
    let v = |n: usize, r: &mut rand_chacha::ChaCha8Rng| matrix(1, n, 0.1, r).remove(0);
    let json = serde_json::json!({
        "schema": "gradaudit.policy/1",
        "family": "mlp",
        "features": (0..OBS).map(|j| format!("obs_{j}")).collect::<Vec<_>>(),
        "actions": ["act_0", "act_1"],
        "tensors": {
            "l0.w": matrix(HIDDEN, OBS, 0.35, r), "l0.b": v(HIDDEN, r),
            "l1.w": matrix(HIDDEN, HIDDEN, 0.18, r), "l1.b": v(HIDDEN, r),
            "mu.w": matrix(2, HIDDEN, 0.18, r), "mu.b": v(2, r),
            "log_std": [-0.5, -0.3],
        },
        "layers": [
            {"weight": "l0.w", "bias": "l0.b", "activation": "tanh"},
            {"weight": "l1.w", "bias": "l1.b", "activation": "tanh"},
        ],
        "head": {"kind": "gaussian", "mean": {"weight": "mu.w", "bias": "mu.b"},
                 "log_sigma": "log_std"},
    });
    json.to_string()
}

/// N episodes of T steps; actions need not be on-policy for this check, which compares two
/// computations on the same data.
fn log(r: &mut rand_chacha::ChaCha8Rng) -> String {
    let mut g = || -> f64 { StandardNormal.sample(&mut *r) };
    let mut out = String::from("episode,step,reward,terminated");
    for j in 0..OBS {
        write!(out, ",obs_{j}").unwrap();
    }
    out.push_str(",act_0,act_1\n");
    for e in 0..N {
        for t in 0..T {
            let obs: Vec<f64> = (0..OBS).map(|_| g()).collect();
            let a = [0.6 * g(), 0.7 * g()];
            let reward = -(a[0] - obs[0]).powi(2) - a[1] * a[1] + 0.3 * g();
            write!(out, "{e},{t},{reward},{}", u8::from(t + 1 == T)).unwrap();
            for x in obs.iter().chain(&a) {
                write!(out, ",{x}").unwrap();
            }
            out.push('\n');
        }
    }
    out
}

struct Exact {
    g_ref: Array2<f64>,
    g_k: Array2<f64>,
    g_diff: Array2<f64>,
}

impl Exact {
    /// (variance of ref, variance of k, bias^2 of k) for the bootstrap of `seed`.
    fn figures(&self, seed: u64) -> [f64; 3] {
        let mut w = Array2::<f64>::zeros((B, N));
        for (b, mut row) in w.rows_mut().into_iter().enumerate() {
            bootstrap_counts(seed, b as u64, row.as_slice_mut().unwrap());
        }
        w /= N as f64;
        let mean = w.mean_axis(ndarray::Axis(0)).unwrap();
        let wc = &w - &mean;
        let a = wc.t().dot(&wc) / (B as f64 - 1.0);
        let tr = |g: &Array2<f64>| (&a * g).sum();
        let dist_sq = self.g_diff.sum() / (N * N) as f64;
        [tr(&self.g_ref), tr(&self.g_k), dist_sq - tr(&self.g_diff)]
    }
}

fn config(seed: u64, project: ProjectMode, policy: &str) -> AuditConfig {
    AuditConfig {
        gamma: 0.5,
        resamples: B,
        splits: 2,
        seed,
        estimators: Some(Estimator::parse_list("rtg,rtg_discounted").unwrap()),
        policy: Some(policy.to_string()),
        project,
        ..AuditConfig::default()
    }
}

// Source: Hutchinson (1989) for the unbiasedness of each projection's estimate; the standard
// error of a mean of K independent estimates, sd / sqrt(K). Each figure's z = (sketched -
// exact) / reported se should behave like a t variable with K - 1 = 63 degrees of freedom:
// |z| < 3 fails with probability about 0.004 per figure (60 figures here), and the RMS of
// (sketched - exact) over the 20 seeds divided by the RMS of the reported se should be near 1,
// with Monte-Carlo relative error about 1 / sqrt(2 x 20) = 16% under normality (more for
// heavier tails); we allow 0.6 to 1.5.
#[test]
fn projected_figures_match_the_exact_ones_within_their_standard_errors() {
    let mut r = rand_chacha::ChaCha8Rng::seed_from_u64(5);
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("actor.json");
    std::fs::write(&path, description(&mut r)).unwrap();
    let policy = path.to_string_lossy().into_owned();
    let text = log(&mut r);

    let exact_cfg = config(0, ProjectMode::Exact, &policy);
    let rd = reader(&text);
    let sc = scores(&rd, &exact_cfg).unwrap();
    let d = sc.dim;
    assert_eq!(d, 4868);
    let (estimators, _) = select(
        rd.schema(),
        exact_cfg.estimators.as_deref(),
        Estimator::Rtg,
        false,
    )
    .unwrap();
    assert_eq!(
        estimators,
        Estimator::parse_list("rtg,rtg_discounted").unwrap()
    );
    let plan = Plan::new(estimators, 0.5, d);
    let data = collect(rd, &plan, &exact_cfg, &sc).unwrap();
    let c_ref = data.contrib.slice(s![.., 0..d]).to_owned();
    let c_k = data.contrib.slice(s![.., d..2 * d]).to_owned();
    let diff = &c_k - &c_ref;
    let exact = Exact {
        g_ref: c_ref.dot(&c_ref.t()),
        g_k: c_k.dot(&c_k.t()),
        g_diff: diff.dot(&diff.t()),
    };

    let mut sq_err = [0.0; 3];
    let mut max_z = 0.0f64;
    let mut sq_se = [0.0; 3];
    for seed in 0..SEEDS {
        let want = exact.figures(seed);
        let rep = run(reader(&text), &config(seed, ProjectMode::K(K), &policy)).unwrap();
        let sk = rep.input.sketch.as_ref().unwrap();
        assert_eq!((sk.k, sk.full_dim), (K, Some(d)));
        let row = |name: &str| rep.estimators.iter().find(|e| e.name == name).unwrap();
        let prec = |name: &str| sk.precision.iter().find(|p| p.estimator == name).unwrap();
        let got = [
            (
                row("rtg").variance.unwrap(),
                prec("rtg").variance_se.unwrap(),
            ),
            (
                row("rtg_discounted").variance.unwrap(),
                prec("rtg_discounted").variance_se.unwrap(),
            ),
            (
                row("rtg_discounted").bias_sq.unwrap(),
                prec("rtg_discounted").bias_sq_se.unwrap(),
            ),
        ];
        for (f, ((value, se), exact)) in got.iter().zip(want).enumerate() {
            assert!(exact > 0.0, "figure {f} seed {seed}: exact {exact}");
            let z = (value - exact) / se;
            assert!(
                z.abs() < 3.0,
                "figure {f} seed {seed}: sketched {value} exact {exact} se {se} (z {z:.2})"
            );
            max_z = max_z.max(z.abs());
            sq_err[f] += (value - exact).powi(2);
            sq_se[f] += se * se;
        }
    }
    let ratios: Vec<f64> = (0..3).map(|f| (sq_err[f] / sq_se[f]).sqrt()).collect();
    eprintln!("max |z| {max_z:.2}; rms error / rms se {ratios:.3?}");
    for f in 0..3 {
        let ratio = (sq_err[f] / sq_se[f]).sqrt();
        assert!(
            (0.6..1.5).contains(&ratio),
            "figure {f}: rms error / rms se = {ratio:.3}"
        );
    }
}
