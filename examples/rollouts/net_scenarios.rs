//! The two scenarios with MLP actors:
//!
//! * `arm`: a two-link planar arm (links of 0.5 m) reaching a target. Obs: the joint angles q1,
//!   q2 and the fingertip's offset from the target (ex, ey); actions: joint velocity commands
//!   a ~ N(mu(obs), diag sigma^2) from a 2 x 8 tanh MLP (random Glorot weights, as a trainer
//!   has them at its first update). The actuators saturate at +-1 rad/s: the simulator applies
//!   clip(a, -1, 1) but logs the sampled a (the score needs it), unless `--log-clipped` asks
//!   for the mistake. Reward -|tip - target| - 0.01 |clip(a)|^2; reaching within 5 cm
//!   terminates, the time limit truncates.
//! * `actor`: benchmark logs of any MLP size. Obs follow an AR(1) process independent of the
//!   actions (so whole episodes are computed as matrix products); reward -|a - obs[..m]|^2;
//!   episodes end at the horizon (terminated).

use super::actor::Actor;
use super::{Args, Out, normal, q6};
use ndarray::Array2;
use rand::RngExt;
use rand_chacha::ChaCha8Rng;
use std::io::Write;

/// Joint-velocity limit of the arm's actuators (rad/s).
pub const ARM_LIMIT: f64 = 1.0;
const LINK: f64 = 0.5;

fn tip(q: [f64; 2]) -> [f64; 2] {
    [
        LINK * q[0].cos() + LINK * (q[0] + q[1]).cos(),
        LINK * q[0].sin() + LINK * (q[0] + q[1]).sin(),
    ]
}

fn header(out: &mut Out, lead: &str, obs: usize, act: usize, scores: usize) -> std::io::Result<()> {
    let mut h = String::from(lead);
    for j in 0..obs {
        h.push_str(&format!(",obs_{j}"));
    }
    for j in 0..act {
        h.push_str(&format!(",act_{j}"));
    }
    for j in 0..scores {
        h.push_str(&format!(",score_{j}"));
    }
    writeln!(out.w, "{h}")
}

/// The arm scenario; returns the actor (its weights go to --weights-out).
pub fn arm(a: &Args, rng: &mut ChaCha8Rng, out: &mut Out) -> std::io::Result<Actor> {
    let hidden = a.hidden.clone().unwrap_or_else(|| vec![8, 8]);
    let mut sizes = vec![4];
    sizes.extend(&hidden);
    sizes.push(2);
    let actor = Actor::random(&sizes, a.activation, 0.4f64.ln(), 1.0, rng);
    let d = actor.dim();
    let scores = if a.no_scores { 0 } else { d };
    header(
        out,
        "episode,step,reward,terminated,truncated,logp",
        4,
        2,
        scores,
    )?;
    let sigma = actor.sigma();
    let dt = 0.2;
    for ep in 0..a.episodes {
        let mut q = [
            q6(rng.random_range(-3.0..3.0)),
            q6(rng.random_range(-2.5..2.5)),
        ];
        let (r, th): (f64, f64) = (rng.random_range(0.2..0.9), rng.random_range(-3.1..3.1));
        let target = [r * th.cos(), r * th.sin()];
        for t in 0..a.horizon {
            let p = tip(q);
            let obs = [q[0], q[1], q6(p[0] - target[0]), q6(p[1] - target[1])];
            let mu = actor.mean(&obs);
            let act: Vec<f64> = (0..2).map(|i| q6(mu[i] + sigma[i] * normal(rng))).collect();
            let applied: Vec<f64> = act.iter().map(|x| x.clamp(-ARM_LIMIT, ARM_LIMIT)).collect();
            q = [q6(q[0] + dt * applied[0]), q6(q[1] + dt * applied[1])];
            let p = tip(q);
            let dist = ((p[0] - target[0]).powi(2) + (p[1] - target[1]).powi(2)).sqrt();
            let reached = dist < 0.05;
            let truncated = !reached && t + 1 == a.horizon;
            let reward = -dist - 0.01 * (applied[0].powi(2) + applied[1].powi(2));
            let logged = if a.log_clipped { &applied } else { &act };
            out.line.push_str(&format!(
                "arm-{ep:04},{t},{},{},{}",
                q6(reward),
                u8::from(reached),
                u8::from(truncated)
            ));
            out.num(actor.log_density(&mu, logged));
            for x in obs.iter().chain(logged) {
                out.num(*x);
            }
            if !a.no_scores {
                for s in actor.score(&obs, logged) {
                    out.score(s);
                }
            }
            out.end()?;
            if reached {
                break;
            }
        }
    }
    Ok(actor)
}

/// The benchmark actor scenario.
pub fn actor(a: &Args, rng: &mut ChaCha8Rng, out: &mut Out) -> std::io::Result<Actor> {
    let (n_obs, n_act) = (a.obs_dim, a.act_dim);
    assert!(n_act <= n_obs, "actor: --act-dim must not exceed --obs-dim");
    let hidden = a.hidden.clone().unwrap_or_else(|| vec![64, 64]);
    let mut sizes = vec![n_obs];
    sizes.extend(&hidden);
    sizes.push(n_act);
    let actor = Actor::random(&sizes, a.activation, 0.5f64.ln(), 1.0, rng);
    let cols = if a.no_scores {
        0
    } else {
        a.score_cols.unwrap_or(actor.dim()).min(actor.dim())
    };
    header(out, "episode,step,reward,terminated", n_obs, n_act, cols)?;
    let sigma = actor.sigma();
    let mut s: Vec<f64> = (0..n_obs).map(|_| normal(rng)).collect();
    for ep in 0..a.episodes {
        let mut obs = Array2::<f64>::zeros((a.horizon, n_obs));
        for mut row in obs.rows_mut() {
            for (x, v) in s.iter_mut().zip(row.iter_mut()) {
                *x = q6(0.9 * *x + 0.435 * normal(rng));
                *v = *x;
            }
        }
        let mu = actor.mean_batch(&obs);
        for t in 0..a.horizon {
            let act: Vec<f64> = (0..n_act)
                .map(|i| q6(mu[[t, i]] + sigma[i] * normal(rng)))
                .collect();
            let reward: f64 = -(0..n_act)
                .map(|i| (act[i] - obs[[t, i]]).powi(2))
                .sum::<f64>();
            out.line.push_str(&format!(
                "net-{ep:06},{t},{},{}",
                q6(reward),
                u8::from(t + 1 == a.horizon)
            ));
            for x in obs.row(t).iter().chain(&act) {
                out.num(*x);
            }
            if cols > 0 {
                let row = obs.row(t).to_vec();
                for s in actor.score(&row, &act).into_iter().take(cols) {
                    out.score(s);
                }
            }
            out.end()?;
        }
    }
    Ok(actor)
}

/// The description JSON (family mlp) of an actor for the log written by `arm` or `actor`.
pub fn description(
    actor: &Actor,
    obs: usize,
    act: usize,
    weights: &str,
    bounds: Option<f64>,
) -> serde_json::Value {
    let last = actor.layers.len() - 1;
    let layers: Vec<serde_json::Value> = actor.layers[..last]
        .iter()
        .enumerate()
        .map(|(l, _)| {
            serde_json::json!({
                "weight": format!("trunk.{l}.weight"),
                "bias": format!("trunk.{l}.bias"),
                "activation": actor.activation.name(),
            })
        })
        .collect();
    let mut v = serde_json::json!({
        "schema": "gradaudit.policy/1",
        "family": "mlp",
        "features": (0..obs).map(|j| format!("obs_{j}")).collect::<Vec<_>>(),
        "actions": (0..act).map(|j| format!("act_{j}")).collect::<Vec<_>>(),
        "weights": weights,
        "layers": layers,
        "head": {
            "kind": "gaussian",
            "mean": {"weight": "mu.weight", "bias": "mu.bias"},
            "log_sigma": "log_std",
        },
    });
    if let Some(b) = bounds {
        v["action_bounds"] = serde_json::json!(vec![[-b, b]; act]);
    }
    v
}
