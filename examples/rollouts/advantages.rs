//! `--advantages`: appends a training stack's own per-step columns to a written rover log, as
//! a float32 training loop would compute them: `adv` (GAE at `--adv-gamma`, `--adv-lambda`)
//! and `value_target` (adv + V). With `truncation-as-termination` the code makes the most
//! common mistake on purpose: a truncated episode's bootstrap value (next_value on its last
//! row) is ignored and the tail is taken as 0, as if the episode had terminated. The demo logs
//! `demo-data/docking_rover_adv*.csv` are written this way (see the README).

use clap::ValueEnum;

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum Advantages {
    /// The correct computation
    Correct,
    /// Truncated episodes bootstrapped with 0 (deliberate fault)
    TruncationAsTermination,
}

/// One episode's float32 GAE: (advantages, value targets).
fn gae32(r: &[f32], v: &[f32], tail: f32, gamma: f32, lambda: f32) -> (Vec<f32>, Vec<f32>) {
    let n = r.len();
    let mut adv = vec![0f32; n];
    let mut acc = 0f32;
    for t in (0..n).rev() {
        let next = if t + 1 < n { v[t + 1] } else { tail };
        let delta = r[t] + gamma * next - v[t];
        acc = delta + gamma * lambda * acc;
        adv[t] = acc;
    }
    let target = adv.iter().zip(v).map(|(a, v)| a + v).collect();
    (adv, target)
}

/// Rewrites the CSV `text` with the two columns appended.
pub fn append(text: &str, mode: Advantages, gamma: f64, lambda: f64) -> String {
    let mut lines = text.lines();
    let header = lines.next().expect("a header row");
    let names: Vec<&str> = header.split(',').collect();
    let col = |n: &str| names.iter().position(|h| *h == n).expect("rover column");
    let (ep, rew, term, trunc, val, next) = (
        col("episode"),
        col("reward"),
        col("terminated"),
        col("truncated"),
        col("value"),
        col("next_value"),
    );
    let rows: Vec<Vec<&str>> = lines.map(|l| l.split(',').collect()).collect();
    let mut out = format!("{header},adv,value_target\n");
    let mut start = 0;
    while start < rows.len() {
        let mut end = start;
        while end + 1 < rows.len() && rows[end + 1][ep] == rows[start][ep] {
            end += 1;
        }
        let f = |i: usize, c: usize| rows[i][c].parse::<f32>().unwrap_or(0.0);
        let r: Vec<f32> = (start..=end).map(|i| f(i, rew)).collect();
        let v: Vec<f32> = (start..=end).map(|i| f(i, val)).collect();
        let truncated = rows[end][trunc] == "1" && rows[end][term] != "1";
        let tail = match mode {
            Advantages::Correct if truncated => f(end, next),
            _ => 0.0,
        };
        let (adv, target) = gae32(&r, &v, tail, gamma as f32, lambda as f32);
        for (k, i) in (start..=end).enumerate() {
            out.push_str(&format!("{},{},{}\n", rows[i].join(","), adv[k], target[k]));
        }
        start = end + 1;
    }
    out
}
