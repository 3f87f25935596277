//! `crosscheck`: every fault of the catalogue, written by this file's own training-loop style
//! implementation of it (from the fault's public description: a flat buffer of rows in file
//! order, a backward loop with a "not done" mask), is named exactly; correct columns, f64 or
//! float32, agree; hand-worked values agree; fitted gamma and lambda recover the true ones.

// Index loops over the flat buffer, as the training loops being imitated are written.
#![allow(clippy::needless_range_loop)]

use crate::util::{Dir, run};
use serde_json::Value;

const GAMMA: f64 = 0.99;
const LAMBDA: f64 = 0.95;

/// A synthetic log: episodes in file order, each terminated or truncated with a bootstrap.
struct Log {
    r: Vec<f64>,
    v: Vec<f64>,
    last: Vec<bool>,
    term: Vec<bool>,
    boot: Vec<f64>,
    ep: Vec<usize>,
}

/// xorshift64*: a fixed stream of numbers in [-1, 1) (no shared code with the tool).
struct Rng(u64);
impl Rng {
    fn next(&mut self) -> f64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        let x = self.0.wrapping_mul(0x2545_F491_4F6C_DD1D);
        (x >> 11) as f64 / (1u64 << 53) as f64 * 2.0 - 1.0
    }
}

/// 40 episodes of 2 to 25 steps; every third truncated with a bootstrap value, the last one
/// terminated (so every truncated episode has a next episode).
fn log() -> Log {
    let mut g = Rng(0x9E37_79B9_7F4A_7C15);
    let mut l = Log {
        r: vec![],
        v: vec![],
        last: vec![],
        term: vec![],
        boot: vec![],
        ep: vec![],
    };
    for e in 0..40 {
        let len = 2 + ((g.next() + 1.0) * 12.0) as usize;
        let truncated = e % 3 == 1;
        for t in 0..len {
            l.r.push((2.0 * g.next() * 1e6).round() / 1e6);
            l.v.push((5.0 * g.next() * 1e6).round() / 1e6);
            let end = t + 1 == len;
            l.last.push(end);
            l.term.push(end && !truncated);
            l.boot.push(if end && truncated {
                (3.0 + 4.0 * g.next() * 1e6).round() / 1e6
            } else {
                0.0
            });
            l.ep.push(e);
        }
    }
    l
}

/// The training-loop shape: A_i = r_i + gamma nv_i - V_i + gamma lambda keep_i A_{i+1}.
fn backward(r: &[f64], v: &[f64], nv: &[f64], keep: &[bool], gamma: f64, lambda: f64) -> Vec<f64> {
    let mut a = vec![0.0; r.len()];
    let mut acc = 0.0;
    for i in (0..r.len()).rev() {
        let carry = if keep[i] { gamma * lambda * acc } else { 0.0 };
        acc = r[i] + gamma * nv[i] - v[i] + carry;
        a[i] = acc;
    }
    a
}

impl Log {
    fn n(&self) -> usize {
        self.r.len()
    }
    fn truncated(&self, i: usize) -> bool {
        self.last[i] && !self.term[i]
    }
    /// The correct next value: V of the next row, 0 after termination, the bootstrap after
    /// truncation.
    fn next_values(&self) -> Vec<f64> {
        (0..self.n())
            .map(|i| match (self.last[i], self.term[i]) {
                (false, _) => self.v[i + 1],
                (true, true) => 0.0,
                (true, false) => self.boot[i],
            })
            .collect()
    }
    fn keep(&self) -> Vec<bool> {
        self.last.iter().map(|l| !l).collect()
    }
    fn correct(&self, gamma: f64, lambda: f64) -> Vec<f64> {
        backward(
            &self.r,
            &self.v,
            &self.next_values(),
            &self.keep(),
            gamma,
            lambda,
        )
    }

    /// CSV with the advantage column `adv` and the value target `ret` (= adv + V).
    fn csv(&self, adv: &[f64]) -> String {
        let mut s =
            String::from("episode,step,reward,terminated,truncated,value,next_value,adv,ret\n");
        let mut step = 0;
        for i in 0..self.n() {
            let nv = if self.truncated(i) {
                self.boot[i].to_string()
            } else {
                String::new()
            };
            s.push_str(&format!(
                "e{},{step},{},{},{},{},{nv},{},{}\n",
                self.ep[i],
                self.r[i],
                u8::from(self.term[i]),
                u8::from(self.truncated(i)),
                self.v[i],
                adv[i],
                adv[i] + self.v[i]
            ));
            step = if self.last[i] { 0 } else { step + 1 };
        }
        s
    }
}

/// Runs crosscheck on a CSV; returns (exit code, JSON report).
fn check(name: &str, csv: &str, extra: &[&str]) -> (i32, Value) {
    let dir = Dir::new(name);
    let path = dir.write("log.csv", csv.as_bytes());
    let mut args = vec!["crosscheck", path.as_str(), "--format", "json"];
    args.extend_from_slice(extra);
    let (code, out, err) = run(&args);
    assert!(code == 0 || code == 1, "{name}: exit {code}: {err}");
    (code, serde_json::from_str(&out).expect("JSON report"))
}

fn explained_by(report: &Value, column: usize) -> Vec<String> {
    report["columns"][column]["explained_by"]
        .as_array()
        .expect("list")
        .iter()
        .map(|v| v.as_str().expect("name").to_string())
        .collect()
}

/// Asserts that the advantage column `adv` is named as exactly `variant`.
fn assert_named(variant: &str, adv: &[f64]) {
    let l = log();
    let (code, rep) = check(
        variant,
        &l.csv(adv),
        &["--advantage", "adv", "--estimator", "gae:0.95"],
    );
    assert_eq!(code, 1, "{variant}: a faulty column exits 1");
    assert_eq!(
        rep["columns"][0]["status"], "explained",
        "{variant}: {rep:#}"
    );
    assert_eq!(
        explained_by(&rep, 0),
        vec![variant.to_string()],
        "{variant}"
    );
}

#[test]
fn correct_column_agrees_with_envelope() {
    let l = log();
    let (code, rep) = check(
        "correct",
        &l.csv(&l.correct(GAMMA, LAMBDA)),
        &[
            "--advantage",
            "adv",
            "--returns",
            "ret",
            "--estimator",
            "gae:0.95",
        ],
    );
    assert_eq!(code, 0);
    assert_eq!(rep["tool"]["name"], "gradaudit");
    assert_eq!(rep["tool"]["schema"], "gradaudit.crosscheck/1");
    assert_eq!(rep["agree"], true);
    for c in 0..2 {
        assert_eq!(rep["columns"][c]["status"], "agrees");
        assert_eq!(rep["columns"][c]["agreement"]["steps_differing"], 0);
    }
}

// float32: a stack that computes in f64 and logs float32, and one that computes in float32.
#[test]
fn float32_columns_agree() {
    let l = log();
    let rounded: Vec<f64> = l
        .correct(GAMMA, LAMBDA)
        .iter()
        .map(|a| *a as f32 as f64)
        .collect();
    let (code, rep) = check("f32round", &l.csv(&rounded), &["--advantage", "adv"]);
    assert_eq!(code, 0, "{rep:#}");
    // The whole loop in float32.
    let f = |x: &[f64]| x.iter().map(|x| *x as f32).collect::<Vec<f32>>();
    let (r, v, nv) = (f(&l.r), f(&l.v), f(&l.next_values()));
    let keep = l.keep();
    let (g, lam) = (GAMMA as f32, LAMBDA as f32);
    let mut a32 = vec![0f32; l.n()];
    let mut acc = 0f32;
    for i in (0..l.n()).rev() {
        let carry = if keep[i] { g * lam * acc } else { 0.0 };
        acc = r[i] + g * nv[i] - v[i] + carry;
        a32[i] = acc;
    }
    let a: Vec<f64> = a32.iter().map(|x| *x as f64).collect();
    let (code, rep) = check("f32loop", &l.csv(&a), &["--advantage", "adv"]);
    assert_eq!(code, 0, "{rep:#}");
    // A column with fewer digits (4 significant) is judged at its own precision.
    let text: Vec<f64> = a
        .iter()
        .map(|x| format!("{x:.3e}").parse().unwrap())
        .collect();
    let (code, rep) = check("digits4", &l.csv(&text), &["--advantage", "adv"]);
    assert_eq!(code, 0, "{rep:#}");
    assert_eq!(
        rep["columns"][0]["tolerance"]["column_precision"],
        "4 significant digits"
    );
}

#[test]
fn truncation_taken_as_termination_is_named() {
    let l = log();
    let mut nv = l.next_values();
    for i in 0..l.n() {
        if l.truncated(i) {
            nv[i] = 0.0;
        }
    }
    assert_named(
        "truncation_as_termination",
        &backward(&l.r, &l.v, &nv, &l.keep(), GAMMA, LAMBDA),
    );
}

#[test]
fn bootstrap_from_current_state_is_named() {
    let l = log();
    let nv: Vec<f64> = (0..l.n())
        .map(|i| if l.term[i] { 0.0 } else { l.v[i] })
        .collect();
    assert_named(
        "bootstrap_from_current_value",
        &backward(&l.r, &l.v, &nv, &l.keep(), GAMMA, LAMBDA),
    );
}

#[test]
fn trace_not_reset_in_a_flat_buffer_is_named() {
    let l = log();
    let mut keep = vec![true; l.n()];
    keep[l.n() - 1] = false;
    assert_named(
        "trace_across_episodes_file_order",
        &backward(&l.r, &l.v, &l.next_values(), &keep, GAMMA, LAMBDA),
    );
}

/// The done mask shifted by one row: `dones[i + 1]` (early) or `dones[i - 1]` (late) used at
/// row i; a masked row bootstraps with 0; the buffer's last row keeps its own end.
fn shifted_mask(l: &Log, early: bool) -> Vec<f64> {
    let n = l.n();
    let correct = l.next_values();
    let mut nv = vec![0.0; n];
    let mut keep = vec![false; n];
    for i in 0..n {
        if i == n - 1 {
            nv[i] = correct[i];
            continue;
        }
        let done = if early {
            l.last[i + 1]
        } else {
            i > 0 && l.last[i - 1]
        };
        nv[i] = if done { 0.0 } else { l.v[i + 1] };
        keep[i] = !done;
    }
    backward(&l.r, &l.v, &nv, &keep, GAMMA, LAMBDA)
}

#[test]
fn end_flag_one_step_early_is_named() {
    assert_named("end_flag_early", &shifted_mask(&log(), true));
}

#[test]
fn end_flag_one_step_late_is_named() {
    assert_named("end_flag_late", &shifted_mask(&log(), false));
}

#[test]
fn bootstrap_counted_twice_at_truncation_is_named() {
    // The time-limit fix that folds gamma V(s_T) into the reward, applied on top of a loop
    // that already bootstraps truncated episodes.
    let l = log();
    let mut r = l.r.clone();
    for i in 0..l.n() {
        if l.truncated(i) {
            r[i] += GAMMA * l.boot[i];
        }
    }
    assert_named(
        "bootstrap_twice_at_truncation",
        &backward(&r, &l.v, &l.next_values(), &l.keep(), GAMMA, LAMBDA),
    );
}

#[test]
fn reward_counted_twice_at_truncation_is_named() {
    let l = log();
    let mut r = l.r.clone();
    for i in 0..l.n() {
        if l.truncated(i) {
            r[i] *= 2.0;
        }
    }
    assert_named(
        "reward_twice_at_truncation",
        &backward(&r, &l.v, &l.next_values(), &l.keep(), GAMMA, LAMBDA),
    );
}

#[test]
fn next_episodes_first_value_as_bootstrap_is_named() {
    // An auto-resetting environment returns the next episode's first observation after a
    // time limit; the loop bootstraps from V of the next row of the buffer.
    let l = log();
    let mut nv = l.next_values();
    for i in 0..l.n() - 1 {
        if l.truncated(i) {
            nv[i] = l.v[i + 1];
        }
    }
    assert_named(
        "next_episode_first_value",
        &backward(&l.r, &l.v, &nv, &l.keep(), GAMMA, LAMBDA),
    );
}

/// (x - mean) / (sd + 1e-8), population sd: the usual advantage normalisation.
fn normalise(x: &[f64]) -> Vec<f64> {
    let n = x.len() as f64;
    let mean = x.iter().sum::<f64>() / n;
    let sd = (x.iter().map(|a| (a - mean).powi(2)).sum::<f64>() / n).sqrt();
    x.iter().map(|a| (a - mean) / (sd + 1e-8)).collect()
}

#[test]
fn normalised_over_the_batch_is_named() {
    let l = log();
    assert_named("normalised_batch", &normalise(&l.correct(GAMMA, LAMBDA)));
}

#[test]
fn normalised_per_minibatch_is_named() {
    let l = log();
    let a = l.correct(GAMMA, LAMBDA);
    let per: Vec<f64> = a.chunks(50).flat_map(normalise).collect();
    assert_named("normalised_minibatch", &per);
}

// Fitted gamma and lambda recover the values the column was written with. The grid's final
// resolution is 5.1e-9 in gamma and 5.1e-8 in lambda (src/crosscheck/fit.rs); the recovered
// values must be within 1e-6 (a column in f64 constrains them far better than that).
#[test]
fn other_gamma_and_lambda_are_fitted() {
    let l = log();
    let (g, lam) = (0.9713, 0.8842);
    let (code, rep) = check(
        "fit",
        &l.csv(&l.correct(g, lam)),
        &["--advantage", "adv", "--estimator", "gae:0.95"],
    );
    assert_eq!(code, 1);
    assert_eq!(
        explained_by(&rep, 0),
        vec!["other_gamma_lambda".to_string()],
        "{rep:#}"
    );
    let v = rep["columns"][0]["variants"]
        .as_array()
        .unwrap()
        .iter()
        .find(|v| v["name"] == "other_gamma_lambda")
        .unwrap();
    let fg = v["parameters"]["gamma"].as_f64().unwrap();
    let fl = v["parameters"]["lambda"].as_f64().unwrap();
    assert!((fg - g).abs() < 1e-6, "gamma {fg}");
    assert!((fl - lam).abs() < 1e-6, "lambda {fl}");
}

#[test]
fn value_targets_are_checked_too() {
    // ret = adv + V with the truncation fault: the return column names it as well.
    let l = log();
    let mut nv = l.next_values();
    for i in 0..l.n() {
        if l.truncated(i) {
            nv[i] = 0.0;
        }
    }
    let a = backward(&l.r, &l.v, &nv, &l.keep(), GAMMA, LAMBDA);
    let (code, rep) = check("ret", &l.csv(&a), &["--returns", "ret"]);
    assert_eq!(code, 1);
    assert_eq!(rep["columns"][0]["kind"], "return");
    assert_eq!(
        explained_by(&rep, 0),
        vec!["truncation_as_termination".to_string()]
    );
}

#[test]
fn unexplained_difference_shows_the_worst_rows() {
    let l = log();
    let mut a = l.correct(GAMMA, LAMBDA);
    a[17] += 0.5;
    a[101] -= 2.0;
    let (code, rep) = check("noise", &l.csv(&a), &["--advantage", "adv"]);
    assert_eq!(code, 1);
    let c = &rep["columns"][0];
    assert_eq!(c["status"], "unexplained", "{rep:#}");
    assert_eq!(c["agreement"]["steps_differing"], 2);
    // Line = row index + 2 (the header is line 1); the worst row first.
    assert_eq!(c["agreement"]["first_difference"]["line"], 19);
    assert_eq!(c["worst_rows"][0]["line"], 103);
    assert!((c["agreement"]["max_abs_error"].as_f64().unwrap() - 2.0).abs() < 1e-9);
}

// Hand-worked values (src/estimator/scan.rs tests, worked by hand there): rewards [1, 1, 1],
// values [2, 2, 2], gamma 0.99, gae:0.95: terminated [1.01714975, 0.0395, -1]; truncated with
// bootstrap 4: [4.51992914, 3.76388, 2.96]. n-step (n = 2, gamma 0.5), rewards [1, 2, 4, 8],
// values [10, 20, 30, 40], truncated with tail 100: [-0.5, -6, 3, 18].
#[test]
fn hand_worked_values_agree() {
    let csv = "episode,step,reward,terminated,truncated,value,next_value,adv\n\
        a,0,1,0,0,2,,1.01714975\na,1,1,0,0,2,,0.0395\na,2,1,1,0,2,,-1\n\
        b,0,1,0,0,2,,4.51992914\nb,1,1,0,0,2,,3.76388\nb,2,1,0,1,2,4,2.96\n";
    let (code, rep) = check("hand_gae", csv, &["--advantage", "adv"]);
    assert_eq!(code, 0, "{rep:#}");
    let csv = "episode,step,reward,terminated,truncated,value,next_value,adv,ret\n\
        n,0,1,0,0,10,,-0.5,9.5\nn,1,2,0,0,20,,-6,14\nn,2,4,0,0,30,,3,33\nn,3,8,0,1,40,100,18,58\n";
    let (code, rep) = check(
        "hand_nstep",
        csv,
        &[
            "--advantage",
            "adv",
            "--returns",
            "ret",
            "--estimator",
            "nstep:2",
            "--gamma",
            "0.5",
        ],
    );
    assert_eq!(code, 0, "{rep:#}");
    // The same n-step column claimed as nstep:3 differs.
    let (code, _) = check(
        "hand_nstep3",
        csv,
        &[
            "--advantage",
            "adv",
            "--estimator",
            "nstep:3",
            "--gamma",
            "0.5",
        ],
    );
    assert_eq!(code, 1);
}

// GAE paper (Schulman et al. 2016, eqs. 17-18): GAE(gamma, 0) = delta_t (so a logged TD
// residual column passes as gae:0 and as nstep:1), and GAE(gamma, 1) = sum_l gamma^l r_{t+l} -
// V_t (a logged G_t - V_t column passes as gae:1 and as the discounted return).
#[test]
fn gae_paper_identities_hold_for_logged_columns() {
    let l = log();
    let nv = l.next_values();
    let td: Vec<f64> = (0..l.n())
        .map(|i| l.r[i] + GAMMA * nv[i] - l.v[i])
        .collect();
    for claim in ["gae:0", "nstep:1"] {
        let (code, rep) = check(
            "eq17",
            &l.csv(&td),
            &["--advantage", "adv", "--estimator", claim],
        );
        assert_eq!(code, 0, "{claim}: {rep:#}");
    }
    // G_t with the bootstrap at truncation, by a forward double loop (not a recursion).
    let mut g = vec![0.0; l.n()];
    for i in 0..l.n() {
        let (mut j, mut disc) = (i, 1.0);
        loop {
            g[i] += disc * l.r[j];
            disc *= GAMMA;
            if l.last[j] {
                g[i] += disc * nv[j];
                break;
            }
            j += 1;
        }
    }
    let adv: Vec<f64> = g.iter().zip(&l.v).map(|(g, v)| g - v).collect();
    for claim in ["gae:1", "rtg_discounted"] {
        let (code, rep) = check(
            "eq18",
            &l.csv(&adv),
            &["--advantage", "adv", "--estimator", claim],
        );
        assert_eq!(code, 0, "{claim}: {rep:#}");
    }
}

#[test]
fn bad_input_exits_2_naming_the_column() {
    let dir = Dir::new("cc_bad");
    let p = dir.write("l.csv", b"episode,step,reward,value,adv\na,0,1,2,x\n");
    let (code, _, err) = run(&["crosscheck", &p, "--advantage", "adv"]);
    assert_eq!(code, 2);
    assert!(err.contains("line 2") && err.contains("'adv'"), "{err}");
    let (code, _, err) = run(&["crosscheck", &p, "--advantage", "advs"]);
    assert_eq!(code, 2);
    assert!(err.contains("did you mean 'adv'"), "{err}");
    let (code, _, err) = run(&["crosscheck", &p]);
    assert_eq!(code, 2);
    assert!(err.contains("nothing to check"), "{err}");
    let (code, _, err) = run(&["crosscheck", &p, "--advantage", "adv", "--gamma", "1.5"]);
    assert_eq!(code, 2);
    assert!(err.contains("--gamma 1.5 must lie in [0, 1]"), "{err}");
    let (code, _, err) = run(&["crosscheck", &p, "--advantage", "adv", "--estimator", "td"]);
    assert_eq!(code, 2);
    assert!(err.contains("gae:L, nstep:N or rtg_discounted"), "{err}");
    let p = dir.write("nov.csv", b"episode,step,reward,adv\na,0,1,1\n");
    let (code, _, err) = run(&["crosscheck", &p, "--advantage", "adv"]);
    assert_eq!(code, 2);
    assert!(err.contains("needs the value column"), "{err}");
}

/// The synthetic log with two score columns and its exact (f64) gae:0.95 column `adv`, in a
/// temporary folder kept alive by the returned Dir.
pub fn exact_gae_log() -> (Dir, String) {
    let l = log();
    let adv = l.correct(GAMMA, LAMBDA);
    let mut g = Rng(7);
    let mut text = String::new();
    for (k, line) in l.csv(&adv).lines().enumerate() {
        if k == 0 {
            text.push_str(&format!("{line},score_0,score_1\n"));
        } else {
            text.push_str(&format!("{line},{},{}\n", g.next(), g.next()));
        }
    }
    let dir = Dir::new("exact_gae");
    let path = dir.write("log.csv", text.as_bytes());
    (dir, path)
}

#[test]
fn tolerance_flag_overrides_the_data() {
    // A float32-rounded column agrees by the data's tolerance but not within 1e-12.
    let l = log();
    let rounded: Vec<f64> = l
        .correct(GAMMA, LAMBDA)
        .iter()
        .map(|a| *a as f32 as f64)
        .collect();
    let (code, rep) = check(
        "tolflag",
        &l.csv(&rounded),
        &["--advantage", "adv", "--tolerance", "1e-12"],
    );
    assert_eq!(code, 1);
    let t = &rep["columns"][0]["tolerance"];
    assert_eq!(t["source"], "flag");
    assert_eq!(t["max"], 1e-12);
    let (code, _, err) = run(&[
        "crosscheck",
        "x.csv",
        "--advantage",
        "a",
        "--tolerance",
        "0",
    ]);
    assert_eq!(code, 2);
    assert!(err.contains("--tolerance"), "{err}");
}

#[test]
fn overflowing_reference_is_unchecked_not_agreeing() {
    // Rewards near f64::MAX: the return sums (and the tolerances) overflow; those steps cannot
    // be checked, so the column does not pass, and the JSON holds null for every figure that
    // would be infinite.
    let csv = "episode,step,reward,terminated,truncated,adv\n\
        a,0,1.5e308,0,0,1\na,1,1.5e308,1,0,1.5e308\n";
    let (code, rep) = check(
        "overflow",
        csv,
        &[
            "--advantage",
            "adv",
            "--estimator",
            "rtg_discounted",
            "--gamma",
            "1",
        ],
    );
    assert_eq!(code, 1);
    let a = &rep["columns"][0]["agreement"];
    assert_eq!(a["unchecked_steps"], 2, "{rep:#}");
    assert_eq!(a["first_difference"]["reference"], Value::Null);
    assert_eq!(a["max_abs_error"], Value::Null);
    assert_eq!(a["max_rel_error"], Value::Null);
    assert_eq!(rep["columns"][0]["status"], "unexplained");
}

// n-step with another window than claimed: written by a direct sum (sum_{k<m} gamma^k r_{t+k}
// + gamma^m V_{t+m} - V_t, m = min(3, T - t), V_T the episode's end value), claimed nstep:5.
#[test]
fn another_nstep_window_is_named() {
    let l = log();
    let nv = l.next_values();
    let mut a = vec![0.0; l.n()];
    for i in 0..l.n() {
        let (mut sum, mut disc) = (0.0, 1.0);
        // The window's rows i..i+m-1 stop at 3 rows or at the episode's last row.
        let mut end = i;
        while end - i < 3 {
            sum += disc * l.r[end];
            disc *= GAMMA;
            if l.last[end] {
                break;
            }
            end += 1;
        }
        // Ended on the episode's last row: its end value; else V of the row after the window.
        let boot = if end - i < 3 { nv[end] } else { l.v[end] };
        a[i] = sum + disc * boot - l.v[i];
    }
    let (code, rep) = check(
        "window",
        &l.csv(&a),
        &["--advantage", "adv", "--estimator", "nstep:5"],
    );
    assert_eq!(code, 1);
    assert_eq!(
        explained_by(&rep, 0),
        vec!["other_window".to_string()],
        "{rep:#}"
    );
}
