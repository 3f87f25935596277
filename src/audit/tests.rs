//! Checks of the whole audit pipeline (reader -> contributions -> bootstrap -> statistics)
//! against closed forms, hand-worked values and the failure modes that advantage code is known
//! to have in practice.

use super::*;
use crate::report::AuditReport;
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use std::fmt::Write;

/// Absolute tolerance for values computed exactly by hand (a few ulps of the magnitudes here).
const EXACT: f64 = 1e-9;

fn audit_text(text: &str, cfg: &AuditConfig) -> AuditReport {
    run(crate::testkit::reader(text), cfg).expect("audit runs")
}

fn cfg(estimators: &str, gamma: f64) -> AuditConfig {
    AuditConfig {
        gamma,
        estimators: Some(Estimator::parse_list(estimators).unwrap()),
        resamples: 200,
        splits: 10,
        ..AuditConfig::default()
    }
}

fn grad<'a>(r: &'a AuditReport, name: &str) -> &'a [f64] {
    r.estimators
        .iter()
        .find(|e| e.name == name)
        .unwrap_or_else(|| panic!("{name} audited"))
        .gradient
        .as_ref()
        .expect("a finite gradient")
}

fn row<'a>(r: &'a AuditReport, name: &str) -> &'a crate::report::EstimatorRow {
    r.estimators.iter().find(|e| e.name == name).unwrap()
}

fn assert_close(got: &[f64], want: &[f64], tol: f64) {
    assert_eq!(got.len(), want.len(), "{got:?} vs {want:?}");
    for (g, w) in got.iter().zip(want) {
        assert!((g - w).abs() <= tol, "{got:?} vs {want:?}");
    }
}

/// Builds a log where episode `e` (of `n`) puts a one-hot score on component `offset_e + t`,
/// so each gradient component is Psi_t of one step divided by the number of episodes.
struct OneHot {
    d: usize,
    text: String,
    next: usize,
}

impl OneHot {
    fn new(d: usize) -> OneHot {
        let mut text = String::from("episode,step,reward,terminated,truncated,value,next_value");
        for j in 0..d {
            write!(text, ",score_{j}").unwrap();
        }
        text.push('\n');
        OneHot { d, text, next: 0 }
    }

    /// rewards, values, end flags per step as (terminated, truncated) on the last row only, and
    /// next_value on the last row.
    fn episode(&mut self, id: &str, rewards: &[f64], values: &[f64], end: (u8, u8), next: &str) {
        for t in 0..rewards.len() {
            let last = t + 1 == rewards.len();
            let (te, tr) = if last { end } else { (0, 0) };
            write!(
                self.text,
                "{id},{t},{},{te},{tr},{},{}",
                rewards[t],
                values[t],
                if last { next } else { "" }
            )
            .unwrap();
            for j in 0..self.d {
                write!(self.text, ",{}", u8::from(j == self.next)).unwrap();
            }
            self.text.push('\n');
            self.next += 1;
        }
    }
}

// Hand-worked in estimator::scan::tests: rewards [1,1,1], values [2,2,2], gamma 0.99.
// Terminated: gae:0.95 = [1.01714975, 0.0395, -1], gae:0 = [0.98, 0.98, -1],
// gae:1 = [0.9701, -0.01, -1]. Truncated with bootstrap 4: gae:0.95 = [4.51992914, 3.76388, 2.96].
// Here through the whole pipeline: two episodes, so each component is Psi_t / 2.
// This also guards two failure modes: termination and truncation merged (the time-limit
// bootstrap zeroed would give the terminated numbers for the second episode) and the bootstrap
// value counted twice at a truncated end (2.96 would become 1 + 0.99 * 8 - 2 = 6.92).
#[test]
fn hand_worked_gae_through_the_pipeline() {
    let mut log = OneHot::new(6);
    log.episode("a", &[1.0; 3], &[2.0; 3], (1, 0), "");
    log.episode("b", &[1.0; 3], &[2.0; 3], (0, 1), "4");
    let r = audit_text(&log.text, &cfg("gae:0.95,gae:0,gae:1", 0.99));
    let half = |v: &[f64]| v.iter().map(|x| x / 2.0).collect::<Vec<_>>();
    let g = grad(&r, "gae:0.95");
    assert_close(&g[..3], &half(&[1.01714975, 0.0395, -1.0]), EXACT);
    assert_close(&g[3..], &half(&[4.51992914, 3.76388, 2.96]), EXACT);
    assert_close(&grad(&r, "gae:0")[..3], &half(&[0.98, 0.98, -1.0]), EXACT);
    assert_close(
        &grad(&r, "gae:1")[..3],
        &half(&[0.9701, -0.01, -1.0]),
        EXACT,
    );
}

// Failure mode: a trace that leaks across an episode boundary. With gamma = lambda = 1, a
// one-step truncated episode (reward 1, value 0, bootstrap 4) followed in the log by another
// (reward 100, value 0, terminated): the first advantage is 1 + 4 - 0 = 5, not 1 + 100 = 101.
#[test]
fn trace_does_not_leak_across_episodes() {
    let mut log = OneHot::new(2);
    log.episode("first", &[1.0], &[0.0], (0, 1), "4");
    log.episode("second", &[100.0], &[0.0], (1, 0), "");
    let r = audit_text(&log.text, &cfg("gae:1,nstep:20,td", 1.0));
    for name in ["gae:1", "nstep:20", "td"] {
        assert_close(grad(&r, name), &[5.0 / 2.0, 100.0 / 2.0], EXACT);
    }
}

// Failure modes: bootstrapping from V(s_t) instead of V(s_{t+1}), and the terminal TD residual
// still adding gamma V(s'). Rewards [0, 0], values [1, 3], terminated, with a next_value of 7
// logged on the terminal row anyway: delta = [0 + 3 - 1, 0 + 0 - 3] = [2, -3] (gamma 1).
#[test]
fn td_bootstraps_from_the_next_state_and_not_past_termination() {
    let mut log = OneHot::new(4);
    log.episode("a", &[0.0, 0.0], &[1.0, 3.0], (1, 0), "7");
    log.episode("b", &[0.0, 0.0], &[1.0, 3.0], (1, 0), "");
    let r = audit_text(&log.text, &cfg("td", 1.0));
    assert_close(grad(&r, "td"), &[1.0, -1.5, 1.0, -1.5], EXACT);
}

// Failure modes: done flags read one step early or late, and every step weighted by the
// episode's total instead of its reward-to-go. Rewards [1, 2, 3], terminated on the third row:
// rtg = [6, 5, 3], total = [6, 6, 6]; a flag read one row early would make the episode [1, 2]
// and a flag read late would merge the next episode (rewards [10]) into it.
#[test]
fn reward_to_go_and_episode_ends() {
    let mut log = OneHot::new(4);
    log.episode("a", &[1.0, 2.0, 3.0], &[0.0; 3], (1, 0), "");
    log.episode("b", &[10.0], &[0.0], (1, 0), "");
    let r = audit_text(&log.text, &cfg("rtg,total", 1.0));
    assert_close(grad(&r, "rtg"), &[3.0, 2.5, 1.5, 5.0], EXACT);
    assert_close(grad(&r, "total"), &[3.0, 3.0, 3.0, 5.0], EXACT);
}

// Failure mode: return accumulators not reset between interleaved episodes. Rows of a and b
// alternate; per-episode reward-to-go must be a: [1+2, 2] and b: [10+20, 20]. Scores are the
// same one-hot layout as if the episodes were written one after the other.
#[test]
fn interleaved_episodes_keep_separate_accumulators() {
    let text = "episode,reward,terminated,score_0,score_1,score_2,score_3\n\
                a,1,0,1,0,0,0\nb,10,0,0,0,1,0\na,2,1,0,1,0,0\nb,20,1,0,0,0,1\n";
    let r = audit_text(text, &cfg("rtg", 1.0));
    assert_close(grad(&r, "rtg"), &[1.5, 1.0, 15.0, 10.0], EXACT);
}

// Failure mode: n-step windows off by one at both ends, through the pipeline (the scan test
// in estimator::scan::tests works the same numbers by hand): n = 2, gamma = 0.5, rewards
// [1, 2, 4, 8], values [10, 20, 30, 40], truncated with bootstrap 100 -> [-0.5, -6, 3, 18].
#[test]
fn nstep_windows_through_the_pipeline() {
    let mut log = OneHot::new(8);
    log.episode(
        "a",
        &[1.0, 2.0, 4.0, 8.0],
        &[10.0, 20.0, 30.0, 40.0],
        (0, 1),
        "100",
    );
    log.episode(
        "b",
        &[1.0, 2.0, 4.0, 8.0],
        &[10.0, 20.0, 30.0, 40.0],
        (0, 1),
        "100",
    );
    let r = audit_text(&log.text, &cfg("nstep:2", 0.5));
    assert_close(&grad(&r, "nstep:2")[..4], &[-0.25, -3.0, 1.5, 9.0], EXACT);
}

// Failure mode: normalisation that divides by zero for one-step batches or constant returns.
// Every step earns reward 1 in one-step episodes, so G_t = 1 everywhere: the spread is zero,
// whitened must stay finite (taken as zero, with a note) and mean_baseline is exactly zero.
#[test]
fn whitening_constant_returns_stays_finite() {
    let mut text = String::from("episode,reward,terminated,score_0\n");
    for i in 0..30 {
        writeln!(text, "e{i},1,1,{}", (i as f64 * 0.7).sin()).unwrap();
    }
    let r = audit_text(&text, &cfg("rtg,mean_baseline,whitened", 0.99));
    let w = row(&r, "whitened");
    assert_eq!(w.gradient, Some(vec![0.0]));
    assert!(
        w.notes.iter().any(|n| n.contains("constant")),
        "{:?}",
        w.notes
    );
    assert!(row(&r, "mean_baseline").gradient.as_ref().unwrap()[0].abs() < EXACT);
    let json = serde_json::to_string(&r).unwrap();
    assert!(!json.contains("NaN") && !json.contains("inf"));
}

// Batch-dependent baselines are exact inside each resample: with bootstrap weights w_i the
// mean baseline is b(w) = sum w_i A_i / sum w_i T_i (see contrib.rs). Check the point estimate
// against a direct computation: G over all steps, b their mean, g = mean_i sum_t (G_t - b) s_t.
#[test]
fn mean_baseline_equals_direct_computation() {
    let text = "episode,reward,terminated,score_0,score_1\n\
                a,1,0,0.5,-1\na,2,1,1.5,0\nb,-3,0,2,1\nb,4,0,-1,0.25\nb,1,1,0.5,0.5\n";
    let gamma: f64 = 0.9;
    let ga = [1.0 + gamma * 2.0, 2.0];
    let gb = [-3.0 + gamma * (4.0 + gamma), 4.0 + gamma, 1.0];
    let b = (ga.iter().sum::<f64>() + gb.iter().sum::<f64>()) / 5.0;
    let sa = [[0.5, -1.0], [1.5, 0.0]];
    let sb = [[2.0, 1.0], [-1.0, 0.25], [0.5, 0.5]];
    let mut want = [0.0; 2];
    for j in 0..2 {
        let a: f64 = (0..2).map(|t| (ga[t] - b) * sa[t][j]).sum();
        let bb: f64 = (0..3).map(|t| (gb[t] - b) * sb[t][j]).sum();
        want[j] = (a + bb) / 2.0;
    }
    let r = audit_text(text, &cfg("rtg,mean_baseline,whitened", gamma));
    assert_close(grad(&r, "mean_baseline"), &want, EXACT);
    let all: Vec<f64> = ga.iter().chain(&gb).copied().collect();
    let sd = (all.iter().map(|g| (g - b).powi(2)).sum::<f64>() / 5.0).sqrt();
    assert_close(grad(&r, "whitened"), &[want[0] / sd, want[1] / sd], EXACT);
}

// One-step Gaussian policy, a ~ N(theta, sigma^2), reward r = a, episode of one step.
// Objective J(theta) = E[a] = theta, so the exact gradient is 1. The REINFORCE estimator of one
// episode is g = r * d/dtheta log pi(a) = a (a - theta) / sigma^2. Writing a = theta + sigma z,
// z ~ N(0, 1): a (a - theta) = theta sigma z + sigma^2 z^2, so
//   E[g] = sigma^2 E[z^2] / sigma^2 = 1,
//   E[g^2] = (theta^2 sigma^2 E[z^2] + 2 theta sigma^3 E[z^3] + sigma^4 E[z^4]) / sigma^4
//          = theta^2 / sigma^2 + 3            (Gaussian moments E z^3 = 0, E z^4 = 3),
//   Var[g] = theta^2 / sigma^2 + 2.
// With theta = 1, sigma = 0.5: Var[g] = 6, and the batch mean of N episodes has variance 6/N.
// Tolerances: the mean within 4 standard errors (4 sqrt(6/N)); the bootstrap variance within
// 15%: it estimates (N-1)/N s^2 / N, and s^2 of this heavy-tailed g (kurtosis about 25 by the
// same moment algebra) has relative sd sqrt((25 - 1)/N) = 3.5% at N = 20000, plus sqrt(2/B) =
// 3.2% of Monte-Carlo error at B = 2000.
#[test]
fn one_step_gaussian_matches_closed_form_moments() {
    let (theta, sigma, n) = (1.0f64, 0.5f64, 20_000usize);
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(99);
    let mut text = String::from("episode,reward,terminated,score_0\n");
    for i in 0..n {
        let z: f64 = StandardNormal.sample(&mut rng);
        let a = theta + sigma * z;
        writeln!(text, "{i},{a},1,{}", (a - theta) / (sigma * sigma)).unwrap();
    }
    let mut c = cfg("rtg,total", 1.0);
    c.resamples = 2000;
    let r = audit_text(&text, &c);
    let rtg = row(&r, "rtg");
    let exact_var = 6.0 / n as f64;
    assert!(
        (rtg.gradient.as_ref().unwrap()[0] - 1.0).abs() < 4.0 * exact_var.sqrt(),
        "{}",
        rtg.gradient.as_ref().unwrap()[0]
    );
    assert!(
        (rtg.variance.unwrap() / exact_var - 1.0).abs() < 0.15,
        "{} vs {exact_var}",
        rtg.variance.unwrap()
    );
    // One step: total and rtg are the same estimator, so their paired difference is zero.
    assert_eq!(row(&r, "total").bias_sq.unwrap(), 0.0);
}

/// Scalar linear-quadratic problem: x_{t+1} = x_t + u_t, u_t ~ N(k x_t, sigma^2),
/// x_0 ~ N(0, 1), reward r_t = -(x_t^2 + u_t^2), horizon H, terminated at the horizon.
/// With m_t = E[x_t^2]: E[u_t^2] = k^2 m_t + sigma^2 and
/// m_{t+1} = E[((1 + k) x_t + sigma z)^2] = (1 + k)^2 m_t + sigma^2, so
///   J(k) = -sum_{t<H} ((1 + k^2) m_t + sigma^2),
///   dm_{t+1}/dk = 2 (1 + k) m_t + (1 + k)^2 dm_t/dk,   dm_0/dk = 0,
///   dJ/dk = -sum_{t<H} (2 k m_t + (1 + k^2) dm_t/dk).
pub(super) fn lq_objective_and_gradient(k: f64, sigma: f64, h: usize) -> (f64, f64) {
    let (mut m, mut dm, mut j, mut dj) = (1.0, 0.0, 0.0, 0.0);
    for _ in 0..h {
        j -= (1.0 + k * k) * m + sigma * sigma;
        dj -= 2.0 * k * m + (1.0 + k * k) * dm;
        let (m_next, dm_next) = (
            (1.0 + k).powi(2) * m + sigma * sigma,
            2.0 * (1.0 + k) * m + (1.0 + k).powi(2) * dm,
        );
        m = m_next;
        dm = dm_next;
    }
    (j, dj)
}

#[test]
fn lq_exact_gradient_matches_central_differences() {
    let (k, sigma, h) = (-0.5, 0.5, 6);
    let eps = 1e-5;
    let (_, dj) = lq_objective_and_gradient(k, sigma, h);
    let fd = (lq_objective_and_gradient(k + eps, sigma, h).0
        - lq_objective_and_gradient(k - eps, sigma, h).0)
        / (2.0 * eps);
    // Central differences have O(eps^2) truncation error; J is a polynomial of modest degree
    // and size here, so 1e-6 is loose.
    assert!((dj - fd).abs() < 1e-6, "{dj} vs {fd}");
}

// On a large simulated log of the LQ problem, the rtg and total gradients agree with the exact
// gradient within their reported 99% intervals (the norm interval, d = 1) and within 4
// bootstrap standard errors, and rtg's variance is below total's (reward-to-go drops the
// past rewards, which carry no signal for later actions but add variance).
#[test]
fn lq_simulation_agrees_with_exact_gradient() {
    let (k, sigma, h, n) = (-0.5f64, 0.5f64, 6usize, 20_000usize);
    let (_, exact) = lq_objective_and_gradient(k, sigma, h);
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
    let mut text = String::from("episode,step,reward,terminated,score_0\n");
    for e in 0..n {
        let mut x: f64 = StandardNormal.sample(&mut rng);
        for t in 0..h {
            let z: f64 = StandardNormal.sample(&mut rng);
            let u = k * x + sigma * z;
            let score = (u - k * x) * x / (sigma * sigma);
            writeln!(
                text,
                "{e},{t},{},{},{score}",
                -(x * x + u * u),
                u8::from(t + 1 == h)
            )
            .unwrap();
            x += u;
        }
    }
    let mut c = cfg("rtg,total,rtg_discounted", 0.5);
    c.resamples = 1000;
    c.confidence = 0.99;
    let r = audit_text(&text, &c);
    for name in ["rtg", "total"] {
        let e = row(&r, name);
        let g = e.gradient.as_ref().unwrap()[0];
        assert!(
            (g - exact).abs() < 4.0 * e.variance.unwrap().sqrt(),
            "{name}: {g} vs {exact}"
        );
        let iv = e.gradient_norm_interval.unwrap();
        assert!(
            iv.low <= exact.abs() && exact.abs() <= iv.high,
            "{name}: {iv:?} vs {exact}"
        );
    }
    assert!(row(&r, "rtg").variance.unwrap() < row(&r, "total").variance.unwrap());
    // total is unbiased for the same objective (past rewards are uncorrelated with later
    // scores), so its bias must not be called detected; discounting with gamma = 0.5 drops
    // most of the future cost of an action on a 6-step horizon, a real bias that must be.
    assert!(
        !row(&r, "total").bias_detected,
        "{:?}",
        row(&r, "total").bias_z
    );
    let disc = row(&r, "rtg_discounted");
    assert!(
        disc.bias_detected && disc.bias_z.unwrap() > 10.0,
        "{:?}",
        disc.bias_z
    );
}

// Results are bit-identical for any thread count: replicate blocks have a fixed size and each
// replicate's weights depend on (seed, b) alone.
#[test]
fn same_numbers_with_one_and_two_threads() {
    let mut text = String::from("episode,reward,terminated,value,score_0,score_1\n");
    for i in 0..97 {
        let f = i as f64;
        writeln!(
            text,
            "{i},{},0,{},{},{}",
            (f * 0.3).sin(),
            f * 0.01,
            (f * 1.7).cos(),
            0.2
        )
        .unwrap();
        writeln!(
            text,
            "{i},{},1,{},{},{}",
            (f * 0.9).cos(),
            f * 0.02,
            -0.4,
            (f * 0.11).sin()
        )
        .unwrap();
    }
    let c = AuditConfig {
        resamples: 300,
        ..AuditConfig::default()
    };
    let run_with = |threads| {
        rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap()
            .install(|| serde_json::to_string(&audit_text(&text, &c)).unwrap())
    };
    assert_eq!(run_with(1), run_with(2));
}

#[test]
fn rows_are_permuted_in_place() {
    // Rows 0..5 of width 2 holding (r, 10 r); order [3, 0, 4, 1, 2] (two cycles plus moves).
    let mut flat: Vec<f64> = (0..5).flat_map(|r| [r as f64, 10.0 * r as f64]).collect();
    permute_rows(&mut flat, 2, &[3, 0, 4, 1, 2]);
    assert_eq!(
        flat,
        vec![3.0, 30.0, 0.0, 0.0, 4.0, 40.0, 1.0, 10.0, 2.0, 20.0]
    );
    let mut same = vec![1.0, 2.0];
    permute_rows(&mut same, 1, &[0, 1]);
    assert_eq!(same, vec![1.0, 2.0]);
}

/// Every figure of a report is finite or null: serde_json would print NaN or infinity as
/// null silently, so check the numbers themselves.
fn assert_all_finite(r: &AuditReport) {
    assert!(r.signal.unwrap().is_finite() && r.reference_variance.unwrap().is_finite());
    for e in &r.estimators {
        let opt = [e.snr, e.ess, e.cosine_half, e.bias_z];
        let fixed = [
            e.variance.unwrap(),
            e.bias_sq.unwrap(),
            e.mse.unwrap(),
            e.gradient_norm.unwrap(),
        ];
        assert!(
            fixed
                .iter()
                .chain(opt.iter().flatten())
                .chain(e.gradient.as_ref().unwrap())
                .all(|x| x.is_finite()),
            "{}",
            e.name
        );
    }
    let json = serde_json::to_string(r).unwrap();
    assert!(!json.contains("NaN") && !json.contains("inf"));
}

// Rewards around 1e12 and around 1e-12 (values scaled alike): squared figures reach 1e24 and
// 1e-24, well inside f64's range (about 1e-308 to 1e308), so every figure stays finite and
// every ratio (snr, ess) is defined; the ratios equal those of the unscaled log to rounding
// (the scaling property, tested in general in audit::props).
#[test]
fn extreme_reward_magnitudes_stay_finite() {
    let mut base = String::from("episode,reward,terminated,value,score_0,score_1\n");
    for i in 0..60 {
        for t in 0..5 {
            let x = (i * 5 + t) as f64;
            writeln!(
                base,
                "{i},{},{},{},{},{}",
                (x * 0.7).sin() + 0.3,
                u8::from(t == 4),
                (x * 0.3).cos(),
                (x * 1.3).sin(),
                (x * 0.9).cos()
            )
            .unwrap();
        }
    }
    let scaled = |c: f64| {
        base.lines()
            .enumerate()
            .map(|(i, l)| {
                if i == 0 {
                    return l.to_string();
                }
                let mut f: Vec<String> = l.split(',').map(String::from).collect();
                for k in [1, 3] {
                    f[k] = (f[k].parse::<f64>().unwrap() * c).to_string();
                }
                f.join(",")
            })
            .collect::<Vec<_>>()
            .join("\n")
    };
    let c = AuditConfig {
        resamples: 200,
        splits: 10,
        ..AuditConfig::default()
    };
    let one = audit_text(&base, &c);
    for factor in [1e12, 1e-12] {
        let r = audit_text(&scaled(factor), &c);
        assert_all_finite(&r);
        for e in &r.estimators {
            let o = row(&one, &e.name);
            if let (Some(a), Some(b)) = (e.snr, o.snr) {
                assert!(
                    (a / b - 1.0).abs() < 1e-6,
                    "{} at {factor}: {a} vs {b}",
                    e.name
                );
            }
        }
    }
}

// One episode of 10^6 steps with gamma = 1 (plus a short one, since an audit needs two): every
// scan is a single backward pass without recursion, so this neither overflows the stack nor
// takes quadratic time; with rewards of +-1 the returns reach at most 1e6 in magnitude and
// every figure stays finite.
#[test]
fn a_million_step_episode_at_gamma_one() {
    let n = 1_000_000;
    let mut text = String::with_capacity(n * 24);
    text.push_str("episode,reward,terminated,value,score_0\n");
    for t in 0..n {
        let r = if t % 3 == 0 { 1 } else { -1 };
        writeln!(
            text,
            "long,{r},{},0.5,{}",
            u8::from(t + 1 == n),
            (t % 7) as f64 * 0.1 - 0.3
        )
        .unwrap();
    }
    text.push_str("short,1,0,0.5,1\nshort,2,1,0.5,-1\n");
    let c = AuditConfig {
        gamma: 1.0,
        resamples: 20,
        splits: 2,
        estimators: Some(
            Estimator::parse_list("rtg,total,td,gae:0.9,gae:1,nstep:1000,mean_baseline,whitened")
                .unwrap(),
        ),
        ..AuditConfig::default()
    };
    let r = audit_text(&text, &c);
    assert_eq!(r.input.steps, n as u64 + 2);
    assert_all_finite(&r);
}

#[test]
fn the_contribution_matrix_respects_the_memory_budget() {
    let mut text = String::from("episode,reward,terminated,score_0\n");
    for i in 0..50 {
        writeln!(text, "{i},1,1,{i}").unwrap();
    }
    // Few resampled rows, so that the episodes' rows (not the replicates) cross the budget.
    let c = AuditConfig {
        budget: crate::limits::Budget::from_bytes(8192),
        resamples: 2,
        splits: 1,
        ..AuditConfig::default()
    };
    let e = run(crate::testkit::reader(&text), &c)
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("memory budget of 0 MB") && e.contains("--max-memory"),
        "{e}"
    );
    assert!(
        e.contains("episodes x") && !e.contains(" 50 episodes"),
        "{e}"
    );
}

#[test]
fn huge_resample_count_is_refused_before_allocating() {
    let text = "episode,reward,terminated,score_0\n1,1,1,1\n2,2,1,2\n";
    for (resamples, splits) in [(usize::MAX, 1), (2, usize::MAX), (1 << 61, 1 << 62)] {
        let c = AuditConfig {
            budget: crate::limits::Budget::from_mb(1000),
            resamples,
            splits,
            ..AuditConfig::default()
        };
        let e = run(crate::testkit::reader(text), &c)
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("--resamples") && e.contains("budget of 1000 MB"),
            "{e}"
        );
    }
}

// Regression: ids mixing integers and text ("9", "10", "1a") once made the id comparison
// cyclic (9 < 10 < "1a" < 9), which a sort may reject with a panic. The order is now total:
// integers by value, then text.
#[test]
fn mixed_integer_and_text_episode_ids_sort_totally() {
    let mut ids = vec!["1a", "10", "9", "b", "-3", "10x", "2"];
    ids.sort_by(|a, b| id_order(a.as_bytes(), b.as_bytes()));
    assert_eq!(ids, vec!["-3", "2", "9", "10", "10x", "1a", "b"]);
    let mut text = String::from("episode,reward,terminated,score_0\n");
    for id in ["1a", "10", "9", "b", "2", "10x"] {
        text.push_str(&format!("{id},1,1,{}\n", id.len()));
    }
    let r = audit_text(&text, &cfg("rtg", 0.99));
    assert_eq!(r.input.episodes, 6);
}

// Regression: `1` and `01` (equal as integers) and two invalid UTF-8 ids (equal after lossy
// decoding) once tied, and a stable sort kept them in file order, so swapping their rows
// changed the output. Ties now break on the raw bytes: a total order.
#[test]
fn ids_1_and_01_in_any_order_give_identical_output() {
    assert_eq!(id_order(b"01", b"1"), Ordering::Less);
    assert_eq!(id_order(b"1", b"01"), Ordering::Greater);
    assert_eq!(id_order(b"+1", b"1"), Ordering::Less);
    assert_eq!(id_order(b"\xfe", b"\xff"), Ordering::Less);
    assert_eq!(id_order(b"1", b"1"), Ordering::Equal);
    let log = |order: [&str; 2]| {
        let mut text = String::from("episode,reward,terminated,score_0\n");
        for (i, id) in ["3", order[0], "2", order[1], "4"].iter().enumerate() {
            // Each id carries its own data, wherever its row is.
            let v = match *id {
                "1" => 5.0,
                "01" => -2.0,
                _ => i as f64,
            };
            writeln!(text, "{id},{v},1,{}", v * 0.5 - 1.0).unwrap();
        }
        text
    };
    let c = AuditConfig {
        resamples: 50,
        splits: 5,
        ..AuditConfig::default()
    };
    let a = run(crate::testkit::reader(&log(["1", "01"])), &c).unwrap();
    let b = run(crate::testkit::reader(&log(["01", "1"])), &c).unwrap();
    assert_eq!(a.signal_interval, b.signal_interval);
    assert_eq!(a.estimators, b.estimators);
}

/// A log of the scalar LQ problem at k = -0.1, sigma 0.5, 6 steps (testkit::Lq).
fn lq_log(n: usize, critic_scale: f64, seed: u64) -> String {
    let lq = crate::testkit::Lq {
        k: -0.1,
        sigma: 0.5,
        h: 6,
    };
    lq.log(n, critic_scale, seed)
}

// The gate's mse end is the larger of two upper bounds (gate::pessimistic): bias_sq's upper
// end plus the point variance, and the row's mse interval's upper end; snr's low end divides
// the signal's low end by it; bias_sq's end is the larger of its percentile and its
// stats/mse.rs upper ends. Asked for, every per-episode row gets an interval
// around its own mse; not asked for, none does.
#[test]
fn gate_mse_end_is_the_larger_of_its_two_bounds() {
    use crate::gate::{Stat, pessimistic};
    let text = lq_log(300, 0.0, 3);
    let plain = audit_text(&text, &cfg("rtg,total,rtg_discounted", 0.5));
    assert!(
        plain
            .estimators
            .iter()
            .all(|r| r.mse_interval.is_none() && r.bias_sq_upper.is_none())
    );
    // The biased rtg_discounted gets a bias_sq upper end above its estimate; the reference's
    // (bias 0 in every replicate) is 0.
    let disc_upper = |r: &AuditReport| row(r, "rtg_discounted").bias_sq_upper;
    let asked = AuditConfig {
        mse_intervals: true,
        ..cfg("rtg,total,rtg_discounted", 0.5)
    };
    let report = audit_text(&text, &asked);
    assert!(
        disc_upper(&report).is_some_and(|u| u > row(&report, "rtg_discounted").bias_sq.unwrap())
    );
    assert!(row(&report, "rtg").bias_sq_upper.is_none_or(|u| u == 0.0));
    for r in &report.estimators {
        let iv = r
            .mse_interval
            .expect("per-episode rows get an mse interval");
        let mse = r.mse.expect("defined");
        assert!(
            iv.low > 0.0 && iv.low <= mse && mse <= iv.high,
            "{}: {iv:?}",
            r.name
        );
        let mut without = r.clone();
        without.mse_interval = None;
        let old = pessimistic(&report, &without, Stat::Mse).unwrap();
        let end = pessimistic(&report, r, Stat::Mse).unwrap();
        assert_eq!(end, old.max(iv.high), "{}", r.name);
        let b_hi = pessimistic(&report, r, Stat::BiasSq).unwrap();
        let percentile_hi = r.bias_sq_interval.expect("defined").high;
        assert_eq!(
            b_hi,
            r.bias_sq_upper
                .map_or(percentile_hi, |u| u.max(percentile_hi))
        );
        let snr = pessimistic(&report, r, Stat::Snr).unwrap();
        let s_lo = report.signal_interval.expect("a signal").low;
        assert!((snr - s_lo / end).abs() <= 1e-12 * snr.abs(), "{}", r.name);
    }
}

// gae:0, nstep:1 and td are one estimator (the TD residual weights every step): one test in
// Holm's m, not three. Holm over the two distinct tests by hand (Holm 1979): with raw p_a of
// the td group (its smallest) and p_b of total, sorted p_(1) <= p_(2), the adjusted values are
// min(1, 2 p_(1)) and max of that and p_(2).
#[test]
fn one_estimator_under_three_names_is_one_test() {
    let text = lq_log(200, 0.5, 4);
    let report = audit_text(&text, &cfg("rtg,td,gae:0,nstep:1,total", 0.99));
    assert_eq!(report.significance.tested, 4);
    assert_eq!(report.significance.distinct_tests, 2);
    let p = |n: &str| row(&report, n).bias_p.expect("tested");
    let adj = |n: &str| row(&report, n).bias_p_adjusted.expect("tested");
    let group = p("td").min(p("gae:0")).min(p("nstep:1"));
    let (lo, hi) = (group.min(p("total")), group.max(p("total")));
    let first = (2.0 * lo).min(1.0);
    let (want_group, want_total) = if group <= p("total") {
        (first, first.max(hi))
    } else {
        (first.max(hi), first)
    };
    for n in ["td", "gae:0", "nstep:1"] {
        assert_eq!(adj(n), want_group, "{n}");
    }
    assert_eq!(adj("total"), want_total);
}
