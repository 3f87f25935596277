//! Reverse scans over one episode that produce the return proxy Psi_t of each estimator.
//! Every scan is O(T), allocation-light and written so that a value after the episode's last
//! step enters only through `tail` (V_T: 0 when terminated, the bootstrap value when truncated).

/// Discounted returns without bootstrap: G_t = sum_{u>=t} gamma^(u-t) r_u.
pub fn discounted_returns(rewards: &[f64], gamma: f64, out: &mut Vec<f64>) {
    out.clear();
    out.resize(rewards.len(), 0.0);
    let mut acc = 0.0;
    for t in (0..rewards.len()).rev() {
        acc = rewards[t] + gamma * acc;
        out[t] = acc;
    }
}

/// TD residuals delta_t = r_t + gamma V_{t+1} - V_t, with V_T = `tail`.
pub fn td_residuals(rewards: &[f64], values: &[f64], tail: f64, gamma: f64, out: &mut Vec<f64>) {
    let n = rewards.len();
    out.clear();
    out.resize(n, 0.0);
    for t in 0..n {
        let next = if t + 1 < n { values[t + 1] } else { tail };
        out[t] = rewards[t] + gamma * next - values[t];
    }
}

/// GAE(lambda): A_t = sum_l (gamma lambda)^l delta_{t+l}, by the backward recursion
/// A_t = delta_t + gamma lambda A_{t+1}, A_T = 0 (Schulman et al. 2015, eq. 16).
pub fn gae(deltas: &[f64], gamma: f64, lambda: f64, out: &mut Vec<f64>) {
    out.clear();
    out.resize(deltas.len(), 0.0);
    let decay = gamma * lambda;
    let mut acc = 0.0;
    for t in (0..deltas.len()).rev() {
        acc = deltas[t] + decay * acc;
        out[t] = acc;
    }
}

/// n-step advantage: sum_{k<m} gamma^k r_{t+k} + gamma^m V_{t+m} - V_t with m = min(n, T-t)
/// and V_T = `tail`. Uses the discounted returns `g` (from [`discounted_returns`]):
/// sum_{k<m} gamma^k r_{t+k} = G_t - gamma^m G_{t+m}, with G_T = 0.
pub fn nstep(g: &[f64], values: &[f64], tail: f64, gamma: f64, n: usize, out: &mut Vec<f64>) {
    let len = g.len();
    out.clear();
    out.resize(len, 0.0);
    let full = gamma.powi(n.min(i32::MAX as usize) as i32);
    for t in 0..len {
        let m = n.min(len - t);
        let gm = if m == n { full } else { gamma.powi(m as i32) };
        let (g_after, v_after) = if t + m < len {
            (g[t + m], values[t + m])
        } else {
            (0.0, tail)
        };
        out[t] = g[t] - gm * g_after + gm * v_after - values[t];
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_abs_diff_eq;

    const TOL: f64 = 1e-12;

    fn run_gae(r: &[f64], v: &[f64], tail: f64, gamma: f64, lambda: f64) -> Vec<f64> {
        let (mut d, mut a) = (Vec::new(), Vec::new());
        td_residuals(r, v, tail, gamma, &mut d);
        gae(&d, gamma, lambda, &mut a);
        a
    }

    fn assert_all(got: &[f64], want: &[f64], tol: f64) {
        assert_eq!(got.len(), want.len());
        for (g, w) in got.iter().zip(want) {
            assert_abs_diff_eq!(g, w, epsilon = tol);
        }
    }

    // Worked by hand. rewards [1,1,1], values [2,2,2], gamma 0.99, terminated (V_3 = 0):
    //   delta = [1 + 0.99*2 - 2, 1 + 0.99*2 - 2, 1 + 0 - 2] = [0.98, 0.98, -1]
    //   gae:0    = delta                                 = [0.98, 0.98, -1]
    //   gae:0.95 (decay 0.9405): A2 = -1; A1 = 0.98 - 0.9405 = 0.0395;
    //            A0 = 0.98 + 0.9405 * 0.0395 = 1.01714975
    //   gae:1    (decay 0.99):   A2 = -1; A1 = 0.98 - 0.99 = -0.01; A0 = 0.98 - 0.0099 = 0.9701
    #[test]
    fn hand_worked_terminated_episode() {
        let (r, v) = ([1.0, 1.0, 1.0], [2.0, 2.0, 2.0]);
        assert_all(
            &run_gae(&r, &v, 0.0, 0.99, 0.95),
            &[1.01714975, 0.0395, -1.0],
            TOL,
        );
        assert_all(&run_gae(&r, &v, 0.0, 0.99, 0.0), &[0.98, 0.98, -1.0], TOL);
        assert_all(
            &run_gae(&r, &v, 0.0, 0.99, 1.0),
            &[0.9701, -0.01, -1.0],
            TOL,
        );
    }

    // Same episode truncated with bootstrap V_3 = 4: delta_2 = 1 + 0.99*4 - 2 = 2.96;
    //   A1 = 0.98 + 0.9405 * 2.96 = 3.76388; A0 = 0.98 + 0.9405 * 3.76388 = 4.51992914
    #[test]
    fn hand_worked_truncated_episode_bootstraps_once() {
        let a = run_gae(&[1.0, 1.0, 1.0], &[2.0, 2.0, 2.0], 4.0, 0.99, 0.95);
        assert_all(&a, &[4.51992914, 3.76388, 2.96], TOL);
    }

    // GAE paper (Schulman et al. 2015, eqs. 17-18): GAE(gamma, 0) = delta_t and
    // GAE(gamma, 1) = sum_l gamma^l r_{t+l} - V_t (terminated, so no tail term).
    #[test]
    fn gae_identities() {
        let r = [0.3, -1.2, 2.5, 0.0, 4.1];
        let v = [1.0, -0.5, 0.7, 2.2, -3.0];
        let gamma = 0.93;
        let mut d = Vec::new();
        td_residuals(&r, &v, 0.0, gamma, &mut d);
        assert_all(&run_gae(&r, &v, 0.0, gamma, 0.0), &d, TOL);
        let mut g = Vec::new();
        discounted_returns(&r, gamma, &mut g);
        let want: Vec<f64> = g.iter().zip(&v).map(|(g, v)| g - v).collect();
        assert_all(&run_gae(&r, &v, 0.0, gamma, 1.0), &want, TOL);
        // nstep:1 = td and nstep:N (N >= T) = gae:1, truncated with a tail too.
        let tail = 1.7;
        td_residuals(&r, &v, tail, gamma, &mut d);
        let mut n1 = Vec::new();
        nstep(&g, &v, tail, gamma, 1, &mut n1);
        assert_all(&n1, &d, TOL);
        let mut nl = Vec::new();
        nstep(&g, &v, tail, gamma, 50, &mut nl);
        assert_all(&nl, &run_gae(&r, &v, tail, gamma, 1.0), TOL);
    }

    // Failure mode: n-step windows off by one. With n = 2, gamma = 0.5, rewards [1,2,4,8],
    // values [10,20,30,40], tail 100 (truncated), by hand:
    //   t=0: 1 + 0.5*2 + 0.25*30 - 10 = -0.5
    //   t=1: 2 + 0.5*4 + 0.25*40 - 20 = -6
    //   t=2: 4 + 0.5*8 + 0.25*100 - 30 = 3      (window reaches the tail exactly)
    //   t=3: 8 + 0.5*100 - 40 = 18               (m = 1 at the last step)
    #[test]
    fn nstep_windows_at_both_ends() {
        let mut g = Vec::new();
        discounted_returns(&[1.0, 2.0, 4.0, 8.0], 0.5, &mut g);
        let mut a = Vec::new();
        nstep(&g, &[10.0, 20.0, 30.0, 40.0], 100.0, 0.5, 2, &mut a);
        assert_all(&a, &[-0.5, -6.0, 3.0, 18.0], TOL);
    }

    // Failure mode: the terminal TD residual still adding gamma V(s'), or bootstrapping from
    // V(s_t) instead of V(s_{t+1}). Values differ per step so either slip changes the answer:
    // rewards [0, 0], values [1, 3], terminated, gamma 1: delta = [0 + 3 - 1, 0 + 0 - 3] = [2, -3].
    #[test]
    fn td_uses_next_value_and_zero_at_termination() {
        let mut d = Vec::new();
        td_residuals(&[0.0, 0.0], &[1.0, 3.0], 0.0, 1.0, &mut d);
        assert_all(&d, &[2.0, -3.0], TOL);
    }
}
