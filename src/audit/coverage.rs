//! Coverage of every interval that the audit, the sweep and the gate report, measured over many
//! simulated logs whose truth is known: the share of logs whose interval contains the truth,
//! with its Monte-Carlo standard error sqrt(p (1 - p) / M) over M logs.
//!
//! The problem is the scalar linear-quadratic one of the pipeline tests with a second policy
//! parameter: x_{t+1} = x_t + u_t, u_t ~ N(k x_t + c, sigma^2) at c = 0, x_0 ~ N(0, 1),
//! r_t = -(x_t^2 + u_t^2), horizon H, terminated at the horizon. Its scores are
//! s_t = (u_t - k x_t) / sigma^2 * (x_t, 1). Truths, derived here:
//! - the gradient G = (dJ/dk, 0): dJ/dk from the closed-form recursion of
//!   `lq_objective_and_gradient`; dJ/dc = 0 at c = 0 because the reflection x -> -x, u -> -u
//!   maps the process with offset c to the one with -c and leaves every reward unchanged, so
//!   J(c) = J(-c);
//! - the mean of the discounted estimator, E[sum_t G^gamma_t s_t] with G^gamma_t =
//!   sum_{u>=t} gamma^(u-t) r_u, by the score-function identity per time step: giving step t
//!   its own parameter k_t, E[r_u s_t] = dE[r_u]/dk_t for t <= u (0 for t > u). With
//!   m_t = E[x_t^2], m_0 = 1, m_{t+1} = (1 + k)^2 m_t + sigma^2 and
//!   E[r_u] = -((1 + k_u^2) m_u + sigma^2):
//!   dE[r_u]/dk_u = -2 k m_u,
//!   dE[r_u]/dk_t = -(1 + k^2) 2 (1 + k) m_t (1 + k)^(2 (u - t - 1))   (t < u),
//!   so E[g_gamma]_k = sum_{t<=u<H} gamma^(u-t) dE[r_u]/dk_t; at gamma = 1 it is dJ/dk (tested
//!   to 1e-12). Its c-component is 0 by the same reflection (G^gamma_t is even, s_t,c odd);
//! - second moments tr(Sigma) = E|g_i|^2 - |E g_i|^2 per episode and the expected half-batch
//!   cosine E[cos(g_A, g_B)] (two independent batches of N/2 episodes) have no handy closed
//!   form: they come from a large simulation (`Truth::simulate`), whose first moments are
//!   checked against the closed form above;
//! - from those: the bias b = E[g_gamma] - G (zero for `total`, whose past rewards are
//!   uncorrelated with later scores), the signal |G|^2, the noise scale tr(Sigma) / |G|^2,
//!   the MSE of one batch |b|^2 + tr(Sigma) / N, snr = |G|^2 / MSE and relative bias |b| / |G|.
//!
//! The gate's interval ends are one-sided bounds: the pessimistic end of a two-sided interval
//! at level c is a one-sided bound at (1 + c) / 2, and a derived rule value (snr, relative
//! bias) combines two such ends (signal low, bias_sq high) with the point variance.

use super::tests::lq_objective_and_gradient;
use super::{AuditConfig, run};
use crate::estimator::Estimator;
use crate::gate::{self, Stat};
use crate::report::{AuditReport, EstimatorRow};
use crate::stats::Interval;
use crate::sweep::{self, Over, SweepConfig};
use crate::testkit::reader;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use std::fmt::Write;

/// The two-parameter LQ problem of the module header.
struct Lq2 {
    k: f64,
    sigma: f64,
    h: usize,
}

/// One step: its reward and its score (d/dk, d/dc).
struct Step {
    reward: f64,
    score: [f64; 2],
}

impl Lq2 {
    fn episode(&self, rng: &mut ChaCha8Rng, out: &mut Vec<Step>) {
        out.clear();
        let mut x: f64 = StandardNormal.sample(rng);
        for _ in 0..self.h {
            let z: f64 = StandardNormal.sample(rng);
            let u = self.k * x + self.sigma * z;
            let s = (u - self.k * x) / (self.sigma * self.sigma);
            out.push(Step {
                reward: -(x * x + u * u),
                score: [s * x, s],
            });
            x += u;
        }
    }

    /// A log of `n` episodes as CSV text.
    fn log(&self, n: usize, seed: u64) -> String {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut text = String::from("episode,step,reward,terminated,score_0,score_1\n");
        let mut steps = Vec::with_capacity(self.h);
        for e in 0..n {
            self.episode(&mut rng, &mut steps);
            for (t, s) in steps.iter().enumerate() {
                let end = u8::from(t + 1 == self.h);
                writeln!(
                    text,
                    "{e},{t},{},{end},{},{}",
                    s.reward, s.score[0], s.score[1]
                )
                .expect("writing to a String");
            }
        }
        text
    }

    /// E[g_gamma]'s k-component in closed form (module header).
    fn mean_gradient(&self, gamma: f64) -> f64 {
        let (k, s2) = (self.k, self.sigma * self.sigma);
        let mut m = vec![1.0; self.h];
        for t in 1..self.h {
            m[t] = (1.0 + k).powi(2) * m[t - 1] + s2;
        }
        let mut total = 0.0;
        for (t, &mt) in m.iter().enumerate() {
            total -= 2.0 * k * mt;
            for u in t + 1..self.h {
                let dm = 2.0 * (1.0 + k) * mt * (1.0 + k).powi(2 * (u - t - 1) as i32);
                total -= gamma.powi((u - t) as i32) * (1.0 + k * k) * dm;
            }
        }
        total
    }
}

/// A return proxy of the truth simulation: the whole return, or the discounted reward-to-go
/// (gamma = 1: `rtg`).
#[derive(Debug, Clone, Copy, PartialEq)]
enum Proxy {
    Total,
    Discounted(f64),
}

impl Proxy {
    /// g_i = sum_t Psi_t s_t for one episode, computed here from its definition (not by the
    /// tool's scans).
    fn gradient(self, steps: &[Step]) -> [f64; 2] {
        let total: f64 = steps.iter().map(|s| s.reward).sum();
        let mut g = [0.0; 2];
        let mut tail = 0.0;
        for s in steps.iter().rev() {
            let psi = match self {
                Proxy::Total => total,
                Proxy::Discounted(gamma) => {
                    tail = s.reward + gamma * tail;
                    tail
                }
            };
            g[0] += psi * s.score[0];
            g[1] += psi * s.score[1];
        }
        g
    }
}

fn dot(a: [f64; 2], b: [f64; 2]) -> f64 {
    a[0] * b[0] + a[1] * b[1]
}

/// One proxy's true figures.
#[derive(Debug, Clone, Copy)]
struct ProxyTruth {
    /// E[g_i], closed form.
    mean: [f64; 2],
    /// E[g_i] from the simulation, and its largest standard error per component.
    sim_mean: [f64; 2],
    sim_se: f64,
    /// tr Cov(g_i) per episode.
    trace: f64,
    /// E[cos(g_A, g_B)] for independent half batches.
    cosine: f64,
}

/// Running sums of one proxy over the truth simulation.
#[derive(Default, Clone)]
struct Sums {
    g: [f64; 2],
    g2: [f64; 2],
    half: [[f64; 2]; 2],
    cos: f64,
    pairs: usize,
}

impl Sums {
    fn add(&mut self, g: [f64; 2], slot: usize, closes_pair: bool) {
        for (j, gj) in g.into_iter().enumerate() {
            self.g[j] += gj;
            self.g2[j] += gj * gj;
            self.half[slot][j] += gj;
        }
        if closes_pair {
            let [a, b] = self.half;
            let c = dot(a, b) / (dot(a, a) * dot(b, b)).sqrt();
            if c.is_finite() {
                self.cos += c;
                self.pairs += 1;
            }
            self.half = [[0.0; 2]; 2];
        }
    }
}

/// The truth for every proxy, from the closed form and a simulation of `episodes` episodes
/// cut into consecutive pairs of half batches of `half` episodes.
fn simulate(
    p: &Lq2,
    proxies: &[Proxy],
    half: usize,
    episodes: usize,
    seed: u64,
) -> Vec<ProxyTruth> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut sums = vec![Sums::default(); proxies.len()];
    let mut steps = Vec::with_capacity(p.h);
    for e in 0..episodes {
        p.episode(&mut rng, &mut steps);
        let slot = (e / half) % 2;
        let closes = (e + 1) % (2 * half) == 0;
        for (proxy, s) in proxies.iter().zip(&mut sums) {
            s.add(proxy.gradient(&steps), slot, closes);
        }
    }
    let n = episodes as f64;
    proxies
        .iter()
        .zip(sums)
        .map(|(proxy, s)| {
            let gamma = match proxy {
                Proxy::Total => 1.0,
                Proxy::Discounted(g) => *g,
            };
            let mean = [p.mean_gradient(gamma), 0.0];
            let sim_mean = [s.g[0] / n, s.g[1] / n];
            let var = |j: usize| s.g2[j] / n - sim_mean[j] * sim_mean[j];
            ProxyTruth {
                mean,
                sim_mean,
                sim_se: (var(0).max(var(1)) / n).sqrt(),
                trace: s.g2[0] / n + s.g2[1] / n - dot(mean, mean),
                cosine: s.cos / s.pairs as f64,
            }
        })
        .collect()
}

/// Hits of one interval over the logs.
#[derive(Debug, Clone)]
struct Tally {
    name: String,
    /// Nominal coverage (two-sided level, or (1 + level) / 2 for a one-sided end); None for
    /// a power figure (the share of logs whose interval excludes a wrong value).
    nominal: Option<f64>,
    hits: usize,
    /// Logs counted (the denominator).
    logs: usize,
    /// Logs whose interval was undefined: left out of an interval's count, and counted as
    /// safe for a gate end (a rule on an undefined end fails unless it allows that).
    undefined: usize,
}

impl Tally {
    fn rate(&self) -> f64 {
        self.hits as f64 / self.logs as f64
    }
    /// Monte-Carlo standard error of the coverage, sqrt(p (1 - p) / M).
    fn se(&self) -> f64 {
        let p = self.rate();
        (p * (1.0 - p) / self.logs as f64).sqrt()
    }
}

/// Every interval's tally, in the order first seen.
#[derive(Default)]
struct Table {
    rows: Vec<Tally>,
}

impl Table {
    fn tally(&mut self, name: &str, nominal: Option<f64>) -> &mut Tally {
        let pos = match self.rows.iter().position(|t| t.name == name) {
            Some(i) => i,
            None => {
                self.rows.push(Tally {
                    name: name.to_string(),
                    nominal,
                    hits: 0,
                    logs: 0,
                    undefined: 0,
                });
                self.rows.len() - 1
            }
        };
        &mut self.rows[pos]
    }

    /// Records one log's interval: `covered` is None when the interval is undefined.
    fn record(&mut self, name: &str, nominal: f64, covered: Option<bool>) {
        let t = self.tally(name, Some(nominal));
        match covered {
            Some(c) => {
                t.logs += 1;
                t.hits += usize::from(c);
            }
            None => t.undefined += 1,
        }
    }

    /// Records one log's gate end: None (undefined) fails the rule, which is safe.
    fn record_end(&mut self, name: &str, nominal: f64, safe: Option<bool>) {
        let t = self.tally(name, Some(nominal));
        t.logs += 1;
        t.hits += usize::from(safe != Some(false));
        t.undefined += usize::from(safe.is_none());
    }

    /// Records whether one log's interval excludes a wrong value (power, no nominal level).
    fn record_power(&mut self, name: &str, excluded: bool) {
        let t = self.tally(name, None);
        t.logs += 1;
        t.hits += usize::from(excluded);
    }

    fn render(&self) -> String {
        let mut out = String::from(
            "| interval | nominal | coverage | MC SE | M logs | undefined |\n|---|---|---|---|---|---|\n",
        );
        for t in &self.rows {
            writeln!(
                out,
                "| {} | {} | {:.3} | {:.3} | {} | {} |",
                t.name,
                t.nominal.map_or("power".into(), |p| format!("{p:.3}")),
                t.rate(),
                t.se(),
                t.logs,
                t.undefined
            )
            .expect("writing to a String");
        }
        out
    }
}

fn contains(iv: Option<Interval>, truth: f64) -> Option<bool> {
    iv.map(|i| i.low <= truth && truth <= i.high)
}

/// The design of one coverage study.
struct Study {
    problem: Lq2,
    logs: usize,
    episodes: usize,
    resamples: usize,
    splits: usize,
    confidence: f64,
    /// Discount of the audited rtg_discounted (the known bias).
    gamma: f64,
    /// The sweep's grid over gamma (family rtg_discounted).
    grid: Vec<f64>,
    /// Episodes of the truth simulation.
    truth_episodes: usize,
}

/// The truths the study compares with, all per the module header.
struct Truths {
    rtg: ProxyTruth,
    total: ProxyTruth,
    disc: ProxyTruth,
    grid: Vec<ProxyTruth>,
}

impl Truths {
    fn of(study: &Study) -> Truths {
        let mut proxies = vec![
            Proxy::Discounted(1.0),
            Proxy::Total,
            Proxy::Discounted(study.gamma),
        ];
        proxies.extend(study.grid.iter().map(|&g| Proxy::Discounted(g)));
        let all = simulate(
            &study.problem,
            &proxies,
            study.episodes / 2,
            study.truth_episodes,
            7_000_001,
        );
        for (proxy, t) in proxies.iter().zip(&all) {
            for j in 0..2 {
                let z = (t.sim_mean[j] - t.mean[j]) / t.sim_se;
                assert!(
                    z.abs() < 5.0,
                    "{proxy:?}: simulation {t:?} against the closed form"
                );
            }
        }
        Truths {
            rtg: all[0],
            total: all[1],
            disc: all[2],
            grid: all[3..].to_vec(),
        }
    }

    fn signal(&self) -> f64 {
        dot(self.rtg.mean, self.rtg.mean)
    }

    /// The squared bias of `t` against the reference.
    fn bias_sq(&self, t: &ProxyTruth) -> f64 {
        let b = [t.mean[0] - self.rtg.mean[0], t.mean[1] - self.rtg.mean[1]];
        dot(b, b)
    }

    /// MSE of one batch of `n` episodes: |b|^2 + tr(Sigma) / n.
    fn mse(&self, t: &ProxyTruth, n: usize) -> f64 {
        self.bias_sq(t) + t.trace / n as f64
    }
}

fn row<'a>(report: &'a AuditReport, name: &str) -> &'a EstimatorRow {
    report
        .estimators
        .iter()
        .find(|e| e.name == name)
        .unwrap_or_else(|| panic!("{name} audited"))
}

fn audit_config(study: &Study, seed: u64) -> AuditConfig {
    AuditConfig {
        gamma: study.gamma,
        estimators: Some(Estimator::parse_list("rtg,total,rtg_discounted").expect("valid")),
        resamples: study.resamples,
        splits: study.splits,
        confidence: study.confidence,
        seed,
        mse_intervals: true,
        ..AuditConfig::default()
    }
}

/// The audit's own intervals for one log.
fn record_audit(table: &mut Table, study: &Study, truth: &Truths, report: &AuditReport) {
    let c = study.confidence;
    let norm = |t: &ProxyTruth| dot(t.mean, t.mean).sqrt();
    let (rtg, total, disc) = (
        row(report, "rtg"),
        row(report, "total"),
        row(report, "rtg_discounted"),
    );
    for (name, r, t) in [
        ("rtg", rtg, &truth.rtg),
        ("total", total, &truth.total),
        ("rtg_discounted", disc, &truth.disc),
    ] {
        let label = format!("|g| interval, {name}");
        table.record(&label, c, contains(r.gradient_norm_interval, norm(t)));
    }
    let bias = truth.bias_sq(&truth.disc).sqrt();
    table.record(
        "bias norm, rtg_discounted (known bias)",
        c,
        contains(disc.bias_norm_interval, bias),
    );
    let excludes_zero = disc.bias_norm_interval.is_some_and(|i| i.low > 0.0);
    table.record_power(
        "power: bias norm of rtg_discounted excludes 0",
        excludes_zero,
    );
    table.record(
        "bias norm, total (zero bias)",
        c,
        contains(total.bias_norm_interval, 0.0),
    );
    for (name, r, t) in [
        ("rtg", rtg, &truth.rtg),
        ("rtg_discounted", disc, &truth.disc),
    ] {
        let label = format!("cosine_half, {name}");
        table.record(&label, c, contains(r.cosine_half_interval, t.cosine));
    }
    table.record(
        "signal |G|^2",
        c,
        contains(report.signal_interval, truth.signal()),
    );
    let b_simple = truth.rtg.trace / truth.signal();
    let scale = report
        .noise_scale
        .iter()
        .find(|s| s.role == "reference")
        .and_then(|s| s.episodes_interval)
        .map(|iv| iv.low <= b_simple && iv.high.is_none_or(|h| b_simple <= h));
    table.record("noise scale B_simple (BCa), rtg", c, scale);
}

/// The gate's pessimistic interval ends for one log (one-sided, nominal (1 + c) / 2).
fn record_gate(table: &mut Table, study: &Study, truth: &Truths, report: &AuditReport) {
    let one_sided = (1.0 + study.confidence) / 2.0;
    let (rtg, disc) = (row(report, "rtg"), row(report, "rtg_discounted"));
    let end = |r: &EstimatorRow, stat| gate::pessimistic(report, r, stat).ok();
    let n = study.episodes;
    let b2 = truth.bias_sq(&truth.disc);
    let checks = [
        (
            "gate cosine_half low, rtg",
            end(rtg, Stat::CosineHalf).map(|v| v <= truth.rtg.cosine),
        ),
        (
            "gate bias_sq high, rtg_discounted",
            end(disc, Stat::BiasSq).map(|v| v >= b2),
        ),
        (
            "gate relative_bias high, rtg_discounted",
            end(disc, Stat::RelativeBias).map(|v| v >= (b2 / truth.signal()).sqrt()),
        ),
        (
            "gate snr low, rtg_discounted",
            end(disc, Stat::Snr).map(|v| v <= truth.signal() / truth.mse(&truth.disc, n)),
        ),
        (
            "gate mse high, rtg_discounted",
            end(disc, Stat::Mse).map(|v| v >= truth.mse(&truth.disc, n)),
        ),
    ];
    for (name, safe) in checks {
        table.record_end(name, one_sided, safe);
    }
}

/// The sweep's MSE interval at every grid point for one log.
fn record_sweep(table: &mut Table, study: &Study, truth: &Truths, text: &str, seed: u64) {
    let audit = AuditConfig {
        estimators: None,
        ..audit_config(study, seed)
    };
    let spec = study
        .grid
        .iter()
        .map(|g| g.to_string())
        .collect::<Vec<_>>()
        .join(",");
    let family = Estimator::RtgDiscounted;
    let grid = sweep::parse_grid(Over::Gamma, &spec, family, audit.gamma).expect("valid grid");
    let cfg = SweepConfig {
        audit,
        over: Over::Gamma,
        grid,
        family,
    };
    let report = sweep::run(reader(text), &cfg).expect("sweep runs");
    for (point, t) in report.points.iter().zip(&truth.grid) {
        let label = format!("sweep MSE, gamma {}", point.label);
        let mse = truth.mse(t, study.episodes);
        table.record(&label, study.confidence, contains(point.mse_interval, mse));
    }
}

/// Runs the study: every log audited and swept, every interval checked against its truth.
fn measure(study: &Study) -> Table {
    let truth = Truths::of(study);
    let mut table = Table::default();
    for m in 0..study.logs {
        let seed = 1_000 + m as u64;
        let text = study.problem.log(study.episodes, seed);
        let report = run(reader(&text), &audit_config(study, seed)).expect("audit runs");
        record_audit(&mut table, study, &truth, &report);
        record_gate(&mut table, study, &truth, &report);
        record_sweep(&mut table, study, &truth, &text, seed);
    }
    table
}

/// The regimes studied, each a (k, N) pair: `moderate` (k = -0.1, N = 400: B_simple about 33
/// episodes, snr about 12, expected half-batch cosine about 0.86), `small` (the same problem at
/// N = 100: the per-episode gradients are heavy-tailed, kurtosis in the hundreds, which N = 100
/// does not average away) and `weak` (k = -0.5, N = 100, near the optimum: B_simple about 830,
/// snr about 0.1, the half-batch cosine about 0.03).
fn design(regime: &str, logs: usize, resamples: usize, truth_episodes: usize) -> Study {
    let (k, episodes) = match regime {
        "moderate" => (-0.1, 400),
        "small" => (-0.1, 100),
        "weak" => (-0.5, 100),
        other => panic!("unknown regime {other}"),
    };
    Study {
        problem: Lq2 {
            k,
            sigma: 0.5,
            h: 6,
        },
        logs,
        episodes,
        resamples,
        splits: 50,
        confidence: 0.95,
        gamma: 0.5,
        grid: vec![0.5, 0.8, 0.9, 1.0],
        truth_episodes,
    }
}

// The closed form of E[g_gamma] (module header) at gamma = 1 is dJ/dk of
// lq_objective_and_gradient, itself checked against central differences.
#[test]
fn discounted_mean_at_gamma_one_is_the_exact_gradient() {
    let p = design("weak", 1, 1, 1).problem;
    let (_, dj) = lq_objective_and_gradient(p.k, p.sigma, p.h);
    assert!((p.mean_gradient(1.0) - dj).abs() < 1e-12);
    assert!((p.mean_gradient(0.5) - dj).abs() > 0.1);
}

// Fast version of the study (Efron and Tibshirani 1993, ch. 12-14, for what a bootstrap
// interval's coverage should be; the truths are derived in the module header): 30 logs of the
// moderate regime with 200 resamples. Loose bounds: an interval covering 95% gives fewer than
// 21 hits of 30 with probability 1e-6 (binomial), one covering 50% passes with probability
// 0.02; a one-sided end at 97.5% needs 23 of 30; the bias interval of rtg_discounted must
// exclude 0 in 24 of 30 logs (its bias is about 13 standard errors at N = 400).
#[test]
fn every_interval_covers_its_truth_fast() {
    let study = design("moderate", 30, 200, 100_000);
    let table = measure(&study);
    let text = table.render();
    for t in &table.rows {
        assert!(t.logs >= 25, "{text}");
        let need = match t.nominal {
            Some(p) if p > 0.96 => 23,
            Some(_) => 21,
            None => 24,
        };
        assert!(t.hits >= need, "{}: {text}", t.name);
    }
}

#[test]
#[ignore = "the full coverage study: cargo test --release --lib audit::coverage -- --ignored --nocapture"]
fn coverage_table_full() {
    for regime in ["moderate", "small", "weak"] {
        let study = design(regime, 400, 1000, 2_000_000);
        let truth = Truths::of(&study);
        println!(
            "{regime}: |G| {:.4}, bias {:.4}, B_simple {:.1}, cos rtg {:.4}, cos disc {:.4}",
            truth.signal().sqrt(),
            truth.bias_sq(&truth.disc).sqrt(),
            truth.rtg.trace / truth.signal(),
            truth.rtg.cosine,
            truth.disc.cosine
        );
        println!("{}", measure(&study).render());
    }
}
