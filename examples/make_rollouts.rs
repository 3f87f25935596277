//! Simulates rollout logs for gradaudit's demos and benchmarks, in scenarios of our own:
//!
//! * `rover`: a docking rover. State p in R^2 (offset from the dock), action u in R^2 (a force)
//!   from a linear-Gaussian policy u ~ N(W phi(p) + c, diag(sigma^2)), quadratic cost, a time
//!   limit that truncates episodes, docking (|p| < 0.1 by default) that terminates them, a deliberately
//!   imperfect recorded critic, and exact score columns for theta = (W row-major, c, log sigma).
//! * `diverter`: a parcel diverter gate. Each step one parcel arrives; a logistic policy on its
//!   features decides divert (1) or pass (0). Heavy parcels belong in the divert bin (+1 when
//!   routed right, -1 when wrong); diverting into a full bin jams the gate (-10, terminated);
//!   the end of the shift also terminates. No critic is recorded.
//! * `arm`: a two-link arm reaching a target with an MLP Gaussian actor, and `actor`: benchmark
//!   logs of any MLP actor size (see rollouts/net_scenarios.rs). `--weights-out` writes the
//!   actor's weights (safetensors), `--policy-out` its description.
//!
//! Obs and actions are quantised to 1e-6 before use, so the logged (6-decimal) values are the
//! exact inputs of the logged scores.
//!
//! Run: `cargo run --release --example make_rollouts -- --scenario rover --out rover.csv`

use clap::{Parser, ValueEnum};
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use std::fs::File;
use std::io::{BufWriter, Write};

#[path = "rollouts/actor.rs"]
mod actor;
#[path = "rollouts/advantages.rs"]
mod advantages;
#[path = "rollouts/net_scenarios.rs"]
mod net_scenarios;

#[derive(Debug, Clone, Copy, ValueEnum)]
enum Scenario {
    Rover,
    Diverter,
    Arm,
    Actor,
}

/// Simulate a rollout log for gradaudit.
#[derive(Debug, Parser)]
struct Args {
    #[arg(long, value_enum)]
    scenario: Scenario,
    /// Episodes to simulate
    #[arg(long, default_value_t = 150)]
    episodes: usize,
    /// Time limit (rover: truncation) or shift length (diverter) in steps
    #[arg(long, default_value_t = 60)]
    horizon: usize,
    /// Score dimension d (rover: even, >= 8, d = 2F + 4 for F features; diverter: >= 4,
    /// d = F + 1)
    #[arg(long)]
    score_dim: Option<usize>,
    #[arg(long, default_value_t = 7)]
    seed: u64,
    /// Significant digits of the score columns (default: shortest text that reads back exactly)
    #[arg(long)]
    score_digits: Option<usize>,
    /// Output CSV path (`-` for stdout)
    #[arg(long)]
    out: String,
    /// Rover: docking radius that ends an episode (0 disables docking, so every episode runs to
    /// the time limit: used for benchmark logs of exact size)
    #[arg(long, default_value_t = 0.1)]
    dock_radius: f64,
    /// Also write the policy parameters as JSON here (arm, actor: the network description)
    #[arg(long)]
    policy_out: Option<String>,
    /// Arm, actor: write the actor's weights here (safetensors, F32)
    #[arg(long)]
    weights_out: Option<String>,
    /// Arm, actor: hidden layer widths, e.g. 64,64 (default arm 8,8; actor 64,64)
    #[arg(long, value_delimiter = ',')]
    hidden: Option<Vec<usize>>,
    /// Arm, actor: hidden activation
    #[arg(long, value_enum, default_value_t = actor::Activation::Tanh)]
    activation: actor::Activation,
    /// Actor: observation dimension
    #[arg(long, default_value_t = 4)]
    obs_dim: usize,
    /// Actor: action dimension
    #[arg(long, default_value_t = 2)]
    act_dim: usize,
    /// Arm, actor: no score columns (obs and act only)
    #[arg(long)]
    no_scores: bool,
    /// Actor: write only the first N score components
    #[arg(long)]
    score_cols: Option<usize>,
    /// Arm: log the clipped (applied) actions instead of the sampled ones, with their scores
    /// (the mistake gradaudit warns about)
    #[arg(long)]
    log_clipped: bool,
    /// Rover: append a training stack's own `adv` (GAE) and `value_target` columns, computed in
    /// float32; `truncation-as-termination` makes a deliberate fault (see rollouts/advantages.rs)
    #[arg(long, value_enum)]
    advantages: Option<advantages::Advantages>,
    /// Discount of the appended columns
    #[arg(long, default_value_t = 0.99)]
    adv_gamma: f64,
    /// Lambda of the appended columns
    #[arg(long, default_value_t = 0.95)]
    adv_lambda: f64,
}

fn q6(x: f64) -> f64 {
    (x * 1e6).round() / 1e6
}

struct Out {
    w: Box<dyn Write>,
    digits: Option<usize>,
    line: String,
}

impl Out {
    fn num(&mut self, x: f64) {
        use std::fmt::Write as _;
        let _ = write!(self.line, ",{}", q6(x));
    }
    fn score(&mut self, x: f64) {
        use std::fmt::Write as _;
        let _ = match self.digits {
            Some(d) => write!(self.line, ",{:.*e}", d.saturating_sub(1), x),
            None => write!(self.line, ",{x}"),
        };
    }
    fn end(&mut self) -> std::io::Result<()> {
        self.line.push('\n');
        self.w.write_all(self.line.as_bytes())?;
        self.line.clear();
        Ok(())
    }
}

fn normal(rng: &mut ChaCha8Rng) -> f64 {
    StandardNormal.sample(rng)
}

fn rover(a: &Args, rng: &mut ChaCha8Rng, out: &mut Out) -> std::io::Result<serde_json::Value> {
    let d = a.score_dim.unwrap_or(8);
    assert!(
        d >= 8 && d.is_multiple_of(2),
        "rover: --score-dim must be even and at least 8"
    );
    let f = (d - 4) / 2;
    // Extra features tanh(a_j . p + b_j) with fixed random directions.
    let dirs: Vec<[f64; 3]> = (2..f)
        .map(|_| [normal(rng), normal(rng), rng.random_range(-1.0..1.0)])
        .collect();
    let mut w = vec![vec![0.0; f]; 2];
    w[0][0] = -0.8;
    w[1][1] = -0.8;
    for row in w.iter_mut() {
        for x in row.iter_mut().skip(2) {
            *x = q6(0.05 * normal(rng));
        }
    }
    let c = [0.05, -0.05];
    let log_sigma = [0.5f64.ln(), 0.4f64.ln()];
    let sigma = [log_sigma[0].exp(), log_sigma[1].exp()];
    // An imperfect critic: right shape (quadratic in distance), wrong scale and offset.
    let critic = |p: [f64; 2]| -2.5 * (p[0] * p[0] + p[1] * p[1]) - 0.3;

    let mut header = String::from("episode,step,reward,terminated,truncated,value,next_value,logp");
    for j in 0..f {
        header.push_str(&format!(",obs_{j}"));
    }
    header.push_str(",act_0,act_1");
    for j in 0..d {
        header.push_str(&format!(",score_{j}"));
    }
    writeln!(out.w, "{header}")?;
    let dt = 0.1;
    for ep in 0..a.episodes {
        let mut p = [
            q6(rng.random_range(-2.0..2.0)),
            q6(rng.random_range(-2.0..2.0)),
        ];
        for t in 0..a.horizon {
            let mut phi = vec![p[0], p[1]];
            phi.extend(
                dirs.iter()
                    .map(|k| q6((k[0] * p[0] + k[1] * p[1] + k[2]).tanh())),
            );
            let mu: Vec<f64> = (0..2)
                .map(|i| c[i] + w[i].iter().zip(&phi).map(|(a, b)| a * b).sum::<f64>())
                .collect();
            let u = [
                q6(mu[0] + sigma[0] * normal(rng)),
                q6(mu[1] + sigma[1] * normal(rng)),
            ];
            let z = [(u[0] - mu[0]) / sigma[0], (u[1] - mu[1]) / sigma[1]];
            let logp = -0.5 * (z[0] * z[0] + z[1] * z[1])
                - log_sigma[0]
                - log_sigma[1]
                - (2.0 * std::f64::consts::PI).ln();
            let next = [
                q6(p[0] + dt * u[0] + 0.02 * normal(rng)),
                q6(p[1] + dt * u[1] + 0.02 * normal(rng)),
            ];
            let docked = (next[0] * next[0] + next[1] * next[1]).sqrt() < a.dock_radius;
            let mut reward = -(p[0] * p[0] + p[1] * p[1]) - 0.1 * (u[0] * u[0] + u[1] * u[1]);
            if docked {
                reward += 10.0;
            }
            let truncated = !docked && t + 1 == a.horizon;
            out.line.push_str(&format!(
                "rover-{ep:04},{t},{},{},{}",
                q6(reward),
                u8::from(docked),
                u8::from(truncated)
            ));
            out.num(critic(p));
            if truncated {
                out.num(critic(next));
            } else {
                out.line.push(',');
            }
            out.num(logp);
            for x in &phi {
                out.num(*x);
            }
            out.num(u[0]);
            out.num(u[1]);
            // Scores: d/dW_ij = z_i/sigma_i phi_j; d/dc_i = z_i/sigma_i; d/dlog sigma_i = z_i^2 - 1.
            for i in 0..2 {
                for x in &phi {
                    out.score(z[i] / sigma[i] * x);
                }
            }
            for i in 0..2 {
                out.score(z[i] / sigma[i]);
            }
            for zi in z {
                out.score(zi * zi - 1.0);
            }
            out.end()?;
            p = next;
            if docked {
                break;
            }
        }
    }
    Ok(serde_json::json!({
        "schema": "gradaudit.policy/1",
        "family": "gaussian_linear",
        "features": (0..f).map(|j| format!("obs_{j}")).collect::<Vec<_>>(),
        "actions": ["act_0", "act_1"],
        "W": w,
        "c": c,
        "log_sigma": log_sigma,
        "learn_log_sigma": true,
    }))
}

fn diverter(a: &Args, rng: &mut ChaCha8Rng, out: &mut Out) -> std::io::Result<serde_json::Value> {
    let d = a.score_dim.unwrap_or(5);
    assert!(d >= 4, "diverter: --score-dim must be at least 4");
    let f = d - 1;
    // Features: parcel weight (scaled), length, bin fill, then uninformative sensor channels.
    let mut wts = vec![1.6, 0.2, -2.0];
    wts.extend((3..f).map(|_| 0.0));
    let c = -1.0;
    let mut header = String::from("episode,step,reward,terminated,logp");
    for j in 0..f {
        header.push_str(&format!(",obs_{j}"));
    }
    header.push_str(",act_0");
    for j in 0..d {
        header.push_str(&format!(",score_{j}"));
    }
    writeln!(out.w, "{header}")?;
    for ep in 0..a.episodes {
        let mut fill: f64 = 0.0;
        for t in 0..a.horizon {
            let weight: f64 = rng.random_range(0.2..5.0);
            let mut phi = vec![q6(weight / 2.5), q6(rng.random_range(0.1..1.2)), q6(fill)];
            phi.extend((3..f).map(|_| q6(rng.random_range(-1.0..1.0))));
            let logit = c + wts.iter().zip(&phi).map(|(a, b)| a * b).sum::<f64>();
            let p1 = 1.0 / (1.0 + (-logit).exp());
            let divert = rng.random::<f64>() < p1;
            let heavy = weight > 2.5;
            let jam = divert && fill >= 0.95;
            let reward = if jam {
                -10.0
            } else if divert == heavy {
                1.0
            } else {
                -1.0
            };
            if divert {
                fill = (fill + 0.1).min(1.0);
            }
            // The bin is emptied with probability 0.1 each step by an operator.
            if rng.random::<f64>() < 0.1 {
                fill = 0.0;
            }
            let end = jam || t + 1 == a.horizon;
            let act = f64::from(u8::from(divert));
            let logp = if divert { p1.ln() } else { (1.0 - p1).ln() };
            out.line
                .push_str(&format!("gate-{ep:04},{t},{reward},{}", u8::from(end)));
            out.num(logp);
            for x in &phi {
                out.num(*x);
            }
            out.num(act);
            // grad log pi = (a - p1) [phi, 1]
            for x in &phi {
                out.score((act - p1) * x);
            }
            out.score(act - p1);
            out.end()?;
            if end {
                break;
            }
        }
    }
    Ok(serde_json::json!({
        "schema": "gradaudit.policy/1",
        "family": "bernoulli_logistic",
        "features": (0..f).map(|j| format!("obs_{j}")).collect::<Vec<_>>(),
        "action": "act_0",
        "w": wts,
        "c": c,
    }))
}

fn main() -> std::io::Result<()> {
    let a = Args::parse();
    let w: Box<dyn Write> = if a.out == "-" {
        Box::new(BufWriter::new(std::io::stdout().lock()))
    } else {
        Box::new(BufWriter::with_capacity(1 << 20, File::create(&a.out)?))
    };
    let mut out = Out {
        w,
        digits: a.score_digits,
        line: String::new(),
    };
    let mut rng = ChaCha8Rng::seed_from_u64(a.seed);
    let policy = match a.scenario {
        Scenario::Rover => rover(&a, &mut rng, &mut out)?,
        Scenario::Diverter => diverter(&a, &mut rng, &mut out)?,
        Scenario::Arm | Scenario::Actor => {
            let (net, obs, act, bounds) = if let Scenario::Arm = a.scenario {
                (
                    net_scenarios::arm(&a, &mut rng, &mut out)?,
                    4,
                    2,
                    Some(net_scenarios::ARM_LIMIT),
                )
            } else {
                (
                    net_scenarios::actor(&a, &mut rng, &mut out)?,
                    a.obs_dim,
                    a.act_dim,
                    None,
                )
            };
            let weights = a
                .weights_out
                .clone()
                .unwrap_or_else(|| "weights.safetensors".into());
            if a.weights_out.is_some() {
                net.write_safetensors(&weights)?;
            }
            let file = std::path::Path::new(&weights)
                .file_name()
                .map_or(weights.clone(), |f| f.to_string_lossy().into_owned());
            net_scenarios::description(&net, obs, act, &file, bounds)
        }
    };
    out.w.flush()?;
    drop(out);
    if let Some(mode) = a.advantages {
        assert!(a.out != "-", "--advantages rewrites the --out file");
        let text = std::fs::read_to_string(&a.out)?;
        std::fs::write(
            &a.out,
            advantages::append(&text, mode, a.adv_gamma, a.adv_lambda),
        )?;
    }
    if let Some(path) = &a.policy_out {
        let mut v = policy;
        let scenario = match a.scenario {
            Scenario::Rover => "docking rover",
            Scenario::Diverter => "parcel diverter gate",
            Scenario::Arm => "two-link reaching arm",
            Scenario::Actor => "benchmark",
        };
        v["note"] = serde_json::json!(
            format!(
                "{scenario} policy of make_rollouts --scenario {:?} --episodes {} --horizon {} --seed {}",
                a.scenario, a.episodes, a.horizon, a.seed
            )
            .to_lowercase()
        );
        std::fs::write(path, serde_json::to_string_pretty(&v)? + "\n")?;
    }
    Ok(())
}
