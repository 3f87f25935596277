//! The logged next observation as a value network's bootstrap state (`--value-net`): CSV
//! `next_obs_*` columns, Parquet list columns under the names the trade uses, the fallback to
//! the last observation without them, and next observations that do not match the obs.

use crate::util::{Dir, run, run_json};
use arrow_array::types::Float64Type;
use arrow_array::{ArrayRef, BooleanArray, Float64Array, Int64Array, ListArray, RecordBatch};
use std::fmt::Write as _;
use std::sync::Arc;

/// The value network: one identity layer on obs_0..obs_2, so V(s) = W . s + B exactly.
const W: [f64; 3] = [0.75, -0.5, 1.25];
const B: f64 = -0.2;

fn v(s: &[f64; 3]) -> f64 {
    W.iter().zip(s).map(|(w, x)| w * x).sum::<f64>() + B
}

/// One step of a docking rover: the state it acted in and the state it reached.
struct Step {
    episode: usize,
    t: usize,
    reward: f64,
    obs: [f64; 3],
    next: [f64; 3],
    score: [f64; 2],
    terminated: bool,
    truncated: bool,
}

/// A small deterministic generator (xorshift64*), so the logs need no fixtures.
struct Rng(u64);
impl Rng {
    fn unit(&mut self) -> f64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        (self.0.wrapping_mul(0x2545_f491_4f6c_dd1d) >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// `n` episodes: each docks (terminated) within 3..9 steps or is cut by a 10-step time limit
/// (truncated, no next_value). Each step's next state is the next row's state; a truncated
/// episode's last next state is one no row of the log holds.
fn rollouts(n: usize) -> Vec<Step> {
    let mut rng = Rng(0x5eed_0b5e_7a7e);
    let mut out = Vec::new();
    for e in 0..n {
        let docks = rng.unit() < 0.5;
        let len = if docks {
            3 + (rng.unit() * 7.0) as usize
        } else {
            10
        };
        let mut s = [rng.unit() * 4.0 - 2.0, rng.unit(), rng.unit() - 0.5];
        for t in 0..len {
            let next = [
                s[0] * 0.9 + rng.unit() - 0.5,
                s[1] + 0.25 * rng.unit(),
                -s[2] + 0.1,
            ];
            out.push(Step {
                episode: e,
                t,
                reward: (rng.unit() * 8.0).round() / 4.0 - s[0].abs(),
                obs: s,
                next,
                score: [rng.unit() - 0.5, rng.unit() * 2.0 - 1.0],
                terminated: docks && t + 1 == len,
                truncated: !docks && t + 1 == len,
            });
            s = next;
        }
    }
    out
}

/// The log as CSV; `next_obs` adds next_obs_0..2, `values` adds the value column V(s_t) and
/// next_value = `bootstrap(step)` on truncated last rows.
fn csv(rows: &[Step], next_obs: bool, values: Option<&dyn Fn(&Step) -> f64>) -> String {
    let mut s = String::from("episode,step,reward,terminated,truncated,score_0,score_1");
    s.push_str(",obs_0,obs_1,obs_2");
    if next_obs {
        s.push_str(",next_obs_0,next_obs_1,next_obs_2");
    }
    if values.is_some() {
        s.push_str(",value,next_value");
    }
    s.push('\n');
    for r in rows {
        write!(
            s,
            "{},{},{},{},{},{},{},{},{},{}",
            r.episode,
            r.t,
            r.reward,
            u8::from(r.terminated),
            u8::from(r.truncated),
            r.score[0],
            r.score[1],
            r.obs[0],
            r.obs[1],
            r.obs[2]
        )
        .unwrap();
        if next_obs {
            write!(s, ",{},{},{}", r.next[0], r.next[1], r.next[2]).unwrap();
        }
        if let Some(boot) = values {
            let next = if r.truncated {
                boot(r).to_string()
            } else {
                String::new()
            };
            write!(s, ",{},{next}", v(&r.obs)).unwrap();
        }
        s.push('\n');
    }
    s
}

fn value_net(dir: &Dir) -> String {
    let desc = serde_json::json!({
        "schema": "gradaudit.policy/1",
        "family": "mlp_value",
        "features": ["obs_0", "obs_1", "obs_2"],
        "tensors": {"v.w": [W], "v.b": [B]},
        "layers": [{"weight": "v.w", "bias": "v.b", "activation": "identity"}],
    });
    dir.write("value.json", desc.to_string().as_bytes())
}

/// The audit as JSON, without the input's file name (the only field naming the writing).
fn audit(log: &str, extra: &[&str]) -> serde_json::Value {
    let mut args = vec![
        "audit",
        log,
        "--format",
        "json",
        "--resamples",
        "200",
        "--seed",
        "11",
        "--estimators",
        "rtg,value_baseline,gae:0.9,td,nstep:3",
    ];
    args.extend_from_slice(extra);
    let mut v = run_json(&args);
    v["input"]["file"] = serde_json::Value::Null;
    v
}

/// Every estimator's variance, bias^2 and gradient norm agree to 1e-9 relative.
fn same_figures(a: &serde_json::Value, b: &serde_json::Value) {
    let (xs, ys) = (
        a["estimators"].as_array().unwrap(),
        b["estimators"].as_array().unwrap(),
    );
    assert_eq!(xs.len(), ys.len());
    for (x, y) in xs.iter().zip(ys) {
        assert_eq!(x["name"], y["name"]);
        for key in ["variance", "bias_sq", "gradient_norm"] {
            let (p, q) = (x[key].as_f64().unwrap(), y[key].as_f64().unwrap());
            assert!(
                (p - q).abs() <= 1e-9 * p.abs().max(1e-12),
                "{} {key}: {p} vs {q}",
                x["name"]
            );
        }
    }
}

// Source: a closed form. The value network has no hidden layer, so V(s) = W . s + B. With
// next-observation columns, a truncated episode's bootstrap is V(s_T) = W . s_T + B at its
// last row's next observation; the audit must equal the audit of the same log whose value
// column holds W . s_t + B and whose truncated last rows hold next_value = W . s_T + B,
// computed here in the test.
#[test]
fn the_bootstrap_is_the_value_at_the_logged_next_observation() {
    let dir = Dir::new("next-obs");
    let rows = rollouts(60);
    assert!(rows.iter().any(|r| r.truncated) && rows.iter().any(|r| r.terminated));
    let net = value_net(&dir);
    let log = dir.write("rover.csv", csv(&rows, true, None).as_bytes());
    let got = audit(&log, &["--value-net", &net]);
    assert_eq!(
        got["input"]["value_net"]["bootstrap"],
        "logged_next_observation"
    );
    let note = got["input"]["value_net"]["note"].as_str().unwrap();
    assert!(
        note.contains("next_obs_0, next_obs_1, next_obs_2"),
        "{note}"
    );
    let next = |r: &Step| v(&r.next);
    let by_hand = dir.write("by_hand.csv", csv(&rows, true, Some(&next)).as_bytes());
    same_figures(&got, &audit(&by_hand, &[]));
    // The text report says where the bootstrap came from.
    let (code, text, err) = run(&["audit", &log, "--value-net", &net, "--resamples", "50"]);
    assert_eq!(code, 0, "{err}");
    assert!(
        text.contains("bootstrap with V at the next observation"),
        "{text}"
    );
}

// Source: the same closed form. Without next-observation columns the bootstrap is V at the
// last logged observation, W . s_{T-1} + B, and the report says so.
#[test]
fn without_next_observations_the_last_observation_is_used() {
    let dir = Dir::new("next-obs-fallback");
    let rows = rollouts(60);
    let net = value_net(&dir);
    let log = dir.write("rover.csv", csv(&rows, false, None).as_bytes());
    let got = audit(&log, &["--value-net", &net]);
    assert_eq!(got["input"]["value_net"]["bootstrap"], "last_observation");
    let last = |r: &Step| v(&r.obs);
    let by_hand = dir.write("by_hand.csv", csv(&rows, false, Some(&last)).as_bytes());
    same_figures(&got, &audit(&by_hand, &[]));
    // The two bootstraps differ here, so the check above could tell them apart.
    let with_next = dir.write("next.csv", csv(&rows, true, None).as_bytes());
    let other = audit(&with_next, &["--value-net", &net]);
    let td = |r: &serde_json::Value| {
        r["estimators"]
            .as_array()
            .unwrap()
            .iter()
            .find(|e| e["name"] == "td")
            .unwrap()["gradient_norm"]
            .as_f64()
            .unwrap()
    };
    assert!((td(&got) - td(&other)).abs() > 1e-6 * td(&got).abs());
}

/// The log as Arrow columns: obs and the next observation as list columns named `obs_list`
/// and `next_list`.
fn batch(rows: &[Step], obs_list: &str, next_list: &str, next_width: usize) -> RecordBatch {
    let f64s = |f: &dyn Fn(&Step) -> f64| {
        Arc::new(Float64Array::from_iter_values(rows.iter().map(f))) as ArrayRef
    };
    let flags = |f: &dyn Fn(&Step) -> bool| {
        Arc::new(BooleanArray::from_iter(rows.iter().map(|r| Some(f(r))))) as ArrayRef
    };
    let list = |f: &dyn Fn(&Step) -> Vec<f64>| {
        Arc::new(ListArray::from_iter_primitive::<Float64Type, _, _>(
            rows.iter().map(|r| Some(f(r).into_iter().map(Some))),
        )) as ArrayRef
    };
    let ints = |f: &dyn Fn(&Step) -> i64| {
        Arc::new(Int64Array::from_iter_values(rows.iter().map(f))) as ArrayRef
    };
    let cols: Vec<(&str, ArrayRef)> = vec![
        ("episode", ints(&|r| r.episode as i64)),
        ("step", ints(&|r| r.t as i64)),
        ("reward", f64s(&|r| r.reward)),
        ("terminated", flags(&|r| r.terminated)),
        ("truncated", flags(&|r| r.truncated)),
        ("score_0", f64s(&|r| r.score[0])),
        ("score_1", f64s(&|r| r.score[1])),
        (obs_list, list(&|r| r.obs.to_vec())),
        (next_list, list(&|r| r.next[..next_width].to_vec())),
    ];
    crate::util::named_batch(cols)
}

fn write_parquet(path: &std::path::Path, b: &RecordBatch) {
    let props = parquet::file::properties::WriterProperties::builder()
        .set_max_row_group_row_count(Some(64))
        .build();
    let mut w = parquet::arrow::ArrowWriter::try_new(
        std::fs::File::create(path).unwrap(),
        b.schema(),
        Some(props),
    )
    .unwrap();
    w.write(b).unwrap();
    w.close().unwrap();
}

/// A value network reading a list column `obs_list`: its features are the list's elements.
fn list_value_net(dir: &Dir, obs_list: &str) -> String {
    let features: Vec<String> = (0..3).map(|k| format!("{obs_list}[{k}]")).collect();
    let desc = serde_json::json!({
        "schema": "gradaudit.policy/1",
        "family": "mlp_value",
        "features": features,
        "tensors": {"v.w": [W], "v.b": [B]},
        "layers": [{"weight": "v.w", "bias": "v.b", "activation": "identity"}],
    });
    dir.write(
        &format!("value_{obs_list}.json"),
        desc.to_string().as_bytes(),
    )
}

// Source: the parquet crate (the Apache Arrow project's writer) writes the file. The same
// episodes as CSV columns and as Parquet list columns, under each name the next observation
// is found by, must give the same figures; the list elements' names differ, nothing else.
#[test]
fn parquet_list_columns_give_the_audit_of_the_csv_columns() {
    let dir = Dir::new("next-obs-parquet");
    let rows = rollouts(60);
    let net = value_net(&dir);
    let log = dir.write("rover.csv", csv(&rows, true, None).as_bytes());
    let want = audit(&log, &["--value-net", &net]);
    let cases: [(&str, &str, &[&str]); 5] = [
        ("obs", "next_obs", &[]),
        ("obs", "next_observations", &[]),
        (
            "observation.state",
            "next.observation.state",
            &["--col", "obs=observation.state"],
        ),
        ("state", "next_state", &["--col", "obs=state"]),
        (
            "state",
            "s_next",
            &["--col", "obs=state", "--col", "next_obs=s_next"],
        ),
    ];
    for (obs, next, cols) in cases {
        let p = dir.path(&format!("{next}.parquet"));
        write_parquet(&p, &batch(&rows, obs, next, 3));
        let p = p.to_string_lossy().into_owned();
        let net = list_value_net(&dir, obs);
        let mut extra = vec!["--value-net", net.as_str()];
        extra.extend_from_slice(cols);
        let got = audit(&p, &extra);
        assert_eq!(
            got["input"]["value_net"]["bootstrap"], "logged_next_observation",
            "{next}"
        );
        same_figures(&got, &want);
        assert_eq!(got["estimators"], want["estimators"], "{next}: bit for bit");
    }
}

// Next observations that are not the obs vector one step later are refused (exit 2), naming
// the file and the columns; so are prefixed columns whose indices do not pair up.
#[test]
fn next_observations_of_another_width_are_refused() {
    let dir = Dir::new("next-obs-bad");
    let rows = rollouts(10);
    let text = csv(&rows, true, None);
    // The header loses next_obs_2, each row its last field.
    let narrow: String = text
        .replace(",next_obs_2", "")
        .lines()
        .enumerate()
        .map(|(i, l)| {
            if i == 0 {
                format!("{l}\n")
            } else {
                let (head, _) = l.rsplit_once(',').unwrap();
                format!("{head}\n")
            }
        })
        .collect();
    let log = dir.write("narrow.csv", narrow.as_bytes());
    let (code, _, err) = run(&["inspect", &log]);
    assert_eq!(code, 2, "{err}");
    for part in [
        "narrow.csv",
        "'next_obs_0' .. 'next_obs_1'",
        "'obs_0' .. 'obs_2', 3 values",
        "do not match the obs columns",
    ] {
        assert!(err.contains(part), "{part}: {err}");
    }
    let shifted = dir.write(
        "shifted.csv",
        text.replace("next_obs_2", "next_obs_3").as_bytes(),
    );
    let (code, _, err) = run(&["audit", &shifted]);
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains("shifted.csv") && err.contains("element for element"),
        "{err}"
    );
    let p = dir.path("narrow.parquet");
    write_parquet(&p, &batch(&rows, "obs", "next_obs", 2));
    let p = p.to_string_lossy().into_owned();
    let (code, _, err) = run(&["inspect", &p]);
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains("narrow.parquet, column 9 ('next_obs')")
            && err.contains("'next_obs[0]' .. 'next_obs[1]'"),
        "{err}"
    );
}

// inspect says where a value network would take the bootstrap state.
#[test]
fn inspect_names_the_bootstrap_state() {
    let dir = Dir::new("next-obs-inspect");
    let rows = rollouts(10);
    let with = dir.write("with.csv", csv(&rows, true, None).as_bytes());
    let (code, out, err) = run(&["inspect", &with]);
    assert_eq!(code, 0, "{err}");
    assert!(
        out.contains(
            "bootstrap state  for --value-net: logged next observation (next_obs_0, next_obs_1, \
             next_obs_2)"
        ),
        "{out}"
    );
    assert!(
        out.contains("next_obs    <- next_obs_0, next_obs_1, next_obs_2"),
        "{out}"
    );
    let without = dir.write("without.csv", csv(&rows, false, None).as_bytes());
    let (_, out, _) = run(&["inspect", &without]);
    assert!(
        out.contains(
            "bootstrap state  for --value-net: last observation (the log has no \
             next-observation columns)"
        ),
        "{out}"
    );
    let (_, html, _) = run(&["inspect", &with, "--format", "html"]);
    assert!(
        html.contains("Bootstrap state for --value-net: logged next observation"),
        "{html}"
    );
    let j = run_json(&["inspect", &with, "--format", "json"]);
    assert!(
        j["bootstrap_state"]
            .as_str()
            .unwrap()
            .starts_with("logged next observation")
    );
}
