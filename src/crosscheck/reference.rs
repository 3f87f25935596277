//! The reference computation of a logged column, per episode, from the same rewards, values,
//! end flags and bootstrap values the training stack saw. It reuses the audit's scans
//! ([`crate::estimator::scan`]), so the check and the audit agree on what is correct:
//!
//! * `gae:L`: A_t = sum_l (gamma L)^l delta_{t+l}, delta_t = r_t + gamma V_{t+1} - V_t;
//! * `nstep:N`: A_t = sum_{k<m} gamma^k r_{t+k} + gamma^m V_{t+m} - V_t, m = min(N, T - t);
//! * discounted return: R_t = sum_{u<T} gamma^(u-t) r_u + gamma^(T-t) V_T, A_t = R_t - V_t;
//!
//! with V_T = 0 when the episode terminated and its bootstrap value when it was truncated
//! (`Episode::tail_value`). The value target (return column) is A_t + V_t.
//!
//! The magnitudes ([`magnitudes`]) are the same computation on absolute values: M_t bounds
//! |every term| summed into the step's value, M2_t = sum_l decay^l M_{t+l} the terms the
//! recursion carries; the tolerance (tolerance.rs) scales with them.

use super::{Claim, Claimed, Kind};
use crate::episode::Episode;
use crate::estimator::scan;

/// The values of an episode, or zeros when the log has none (a discounted return without a
/// critic is checked against V = 0).
pub fn values(ep: &Episode) -> Vec<f64> {
    ep.values.clone().unwrap_or_else(|| vec![0.0; ep.len()])
}

/// The reference advantages of one episode with its own end (tail value `tail`).
pub fn advantages(c: &Claimed, rewards: &[f64], values: &[f64], tail: f64, out: &mut Vec<f64>) {
    let gamma = c.gamma;
    let mut work = Vec::new();
    match c.claim {
        Claim::Gae(lambda) => {
            scan::td_residuals(rewards, values, tail, gamma, &mut work);
            scan::gae(&work, gamma, lambda, out);
        }
        Claim::NStep(n) => {
            scan::discounted_returns(rewards, gamma, &mut work);
            scan::nstep(&work, values, tail, gamma, n, out);
        }
        // An n-step window as long as the episode reaches the tail from every step.
        Claim::Return => {
            scan::discounted_returns(rewards, gamma, &mut work);
            scan::nstep(&work, values, tail, gamma, rewards.len().max(1), out);
        }
    }
}

/// The reference column of kind `kind` for an episode.
pub fn column(c: &Claimed, kind: Kind, ep: &Episode, values: &[f64]) -> Vec<f64> {
    let mut out = Vec::new();
    advantages(c, &ep.rewards, values, ep.tail_value(), &mut out);
    if kind == Kind::Return {
        for (o, v) in out.iter_mut().zip(values) {
            *o += v;
        }
    }
    out
}

/// (M_t, M2_t): the computation on absolute values (see the module header).
pub fn magnitudes(c: &Claimed, ep: &Episode, values: &[f64]) -> (Vec<f64>, Vec<f64>) {
    let t_len = ep.len();
    let gamma = c.gamma;
    let tail = ep.tail_value().abs();
    let abs_next = |t: usize| {
        if t + 1 < t_len {
            values[t + 1].abs()
        } else {
            tail
        }
    };
    let mut m = vec![0.0; t_len];
    match c.claim {
        Claim::Gae(_) | Claim::Return => {
            let decay = c.decay();
            let mut acc = 0.0;
            for t in (0..t_len).rev() {
                acc = ep.rewards[t].abs() + gamma * abs_next(t) + values[t].abs() + decay * acc;
                m[t] = acc;
            }
        }
        Claim::NStep(n) => {
            let mut g = Vec::new();
            let abs_r: Vec<f64> = ep.rewards.iter().map(|r| r.abs()).collect();
            scan::discounted_returns(&abs_r, gamma, &mut g);
            for t in 0..t_len {
                let k = n.min(t_len - t);
                let gk = gamma.powi(k.min(i32::MAX as usize) as i32);
                let after = if t + k < t_len { g[t + k] } else { 0.0 };
                m[t] = g[t] - gk * after + gk * abs_next(t + k - 1) + values[t].abs();
            }
        }
    }
    let mut m2 = Vec::new();
    scan::gae(&m, 1.0, c.decay(), &mut m2);
    (m, m2)
}
