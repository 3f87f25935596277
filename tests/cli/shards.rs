//! `gradaudit shard` and `gradaudit merge` (issue 16): shards of a log merge into the report of
//! the single-process Poisson audit of the whole log, whatever the split; overlapping shards
//! and shards of different settings are refused; the Dask recipe (scripts/dask_shards.py)
//! gives the same report.

use crate::util::{Dir, demo, run, run_json};
use serde_json::Value;

/// Fast settings: the comparison is of arithmetic, not of statistical quality.
const FAST: [&str; 4] = ["--resamples", "300", "--splits", "40"];

/// The demo rover log split by episode: `assign(i)` is the shard of the i-th episode (in file
/// order); each shard's episodes are written in reverse order, so no shard keeps the file's.
fn split(dir: &Dir, k: usize, assign: impl Fn(usize) -> usize) -> Vec<String> {
    let text = std::fs::read_to_string(demo("docking_rover.csv")).expect("demo log");
    let mut lines = text.lines();
    let header = lines.next().expect("header");
    let mut episodes: Vec<(String, Vec<&str>)> = Vec::new();
    for line in lines {
        let id = line.split(',').next().expect("episode column").to_string();
        match episodes.last_mut() {
            Some((last, rows)) if *last == id => rows.push(line),
            _ => episodes.push((id, vec![line])),
        }
    }
    let mut parts = vec![vec![header.to_string()]; k];
    for (i, (_, rows)) in episodes.iter().enumerate().rev() {
        parts[assign(i) % k].extend(rows.iter().map(|r| r.to_string()));
    }
    parts
        .iter()
        .enumerate()
        .map(|(s, lines)| {
            dir.write(
                &format!("part{s}.csv"),
                (lines.join("\n") + "\n").as_bytes(),
            )
        })
        .collect()
}

/// Writes one shard per part with `extra` options; returns the shard paths.
fn shards(dir: &Dir, parts: &[String], extra: &[&str]) -> Vec<String> {
    parts
        .iter()
        .enumerate()
        .map(|(s, part)| {
            let out = dir
                .path(&format!("part{s}.shard"))
                .to_string_lossy()
                .into_owned();
            let mut args = vec!["shard", part.as_str(), "--out", out.as_str(), "-q"];
            args.extend(FAST);
            args.extend(extra);
            let (code, _, err) = run(&args);
            assert_eq!(code, 0, "{err}");
            out
        })
        .collect()
}

fn merge_json(shards: &[String]) -> Value {
    let mut args = vec!["merge"];
    args.extend(shards.iter().map(String::as_str));
    args.extend(["--format", "json"]);
    run_json(&args)
}

/// The single-process Poisson audit of the whole rover demo, with `extra` options.
fn single_json(extra: &[&str]) -> Value {
    let log = demo("docking_rover.csv");
    let mut args = vec![
        "audit",
        log.as_str(),
        "--resampling",
        "poisson",
        "--format",
        "json",
    ];
    args.extend(FAST);
    args.extend(extra);
    run_json(&args)
}

/// Largest relative difference between the numbers of two reports (estimator rows matched by
/// name, the input file name skipped); panics on any other difference.
fn max_rel_diff(a: &Value, b: &Value, path: &str) -> f64 {
    match (a, b) {
        (Value::Object(x), Value::Object(y)) => {
            assert_eq!(x.len(), y.len(), "{path}: fields");
            x.iter()
                .filter(|(k, _)| !(path == "/input" && k.as_str() == "file"))
                .map(|(k, v)| max_rel_diff(v, &y[k], &format!("{path}/{k}")))
                .fold(0.0, f64::max)
        }
        (Value::Array(x), Value::Array(y)) if path == "/estimators" => {
            assert_eq!(x.len(), y.len(), "{path}: rows");
            x.iter()
                .map(|row| {
                    let other = y
                        .iter()
                        .find(|r| r["name"] == row["name"])
                        .unwrap_or_else(|| panic!("{path}: no row {}", row["name"]));
                    max_rel_diff(row, other, &format!("{path}/{}", row["name"]))
                })
                .fold(0.0, f64::max)
        }
        (Value::Array(x), Value::Array(y)) => {
            assert_eq!(x.len(), y.len(), "{path}: length");
            x.iter()
                .zip(y)
                .enumerate()
                .map(|(i, (u, v))| max_rel_diff(u, v, &format!("{path}/{i}")))
                .fold(0.0, f64::max)
        }
        (Value::Number(x), Value::Number(y)) if x.is_f64() || y.is_f64() => {
            let (x, y) = (x.as_f64().expect("f64"), y.as_f64().expect("f64"));
            let scale = x.abs().max(y.abs());
            if scale == 0.0 {
                0.0
            } else {
                (x - y).abs() / scale
            }
        }
        _ => {
            assert_eq!(a, b, "{path}");
            0.0
        }
    }
}

// The merged report equals the single-process `audit --resampling poisson` of the whole log:
// the replicate weights depend only on (seed, replicate, id hash), so the shards' sums add up
// to the single pass's sums; the check is the arithmetic claim of resample/poisson.rs (1e-12
// relative on every figure), for K = 1, 2 and 7 shards and three ways to assign episodes.
#[test]
fn merged_shards_equal_the_single_poisson_audit() {
    let single = single_json(&[]);
    assert_eq!(single["settings"]["resampling"], "poisson");
    let assignments: [(&str, &dyn Fn(usize) -> usize); 3] = [
        ("alternating", &|i| i),
        ("scattered", &|i| (i * 2_654_435_761) >> 7),
        ("ranges", &|i| i / 22),
    ];
    for k in [1usize, 2, 7] {
        for (name, assign) in &assignments {
            let dir = Dir::new(&format!("shards-{k}-{name}"));
            let parts = split(&dir, k, assign);
            let merged = merge_json(&shards(&dir, &parts, &[]));
            let worst = max_rel_diff(&merged, &single, "");
            eprintln!("K = {k}, {name}: largest relative difference {worst:.2e}");
            assert!(worst <= 1e-12, "K = {k}, {name}: {worst}");
            assert_eq!(merged["input"]["episodes"], 150);
        }
    }
}

#[test]
fn overlapping_shards_are_refused() {
    let dir = Dir::new("shards-overlap");
    let parts = split(&dir, 2, |i| i);
    let mut files = shards(&dir, &parts, &[]);
    // A third shard holding the first part again.
    let again_dir = Dir::new("shards-overlap-again");
    let again = again_dir.write("again.csv", &std::fs::read(&parts[0]).unwrap());
    files.extend(shards(&again_dir, &[again], &[]));
    let mut args = vec!["merge"];
    args.extend(files.iter().map(String::as_str));
    let (code, _, err) = run(&args);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains(&files[0]) && err.contains(&files[2]), "{err}");
    assert!(err.contains("share 75 episode(s)"), "{err}");
    // A shard given twice is the same mistake.
    let (code, _, err) = run(&["merge", &files[1], &files[1]]);
    assert_eq!(code, 2);
    assert!(err.contains("share 75 episode(s)"), "{err}");
}

#[test]
fn shards_of_different_settings_are_refused_with_every_difference() {
    let dir = Dir::new("shards-settings");
    let parts = split(&dir, 2, |i| i);
    let a = shards(&dir, &parts[..1], &[]);
    let b_dir = Dir::new("shards-settings-b");
    let b = shards(&b_dir, &parts[1..], &["--gamma", "0.9", "--seed", "5"]);
    let (code, _, err) = run(&["merge", &a[0], &b[0]]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("gamma: 0.99 vs 0.9"), "{err}");
    assert!(err.contains("seed: 20240917 vs 5"), "{err}");
}

#[test]
fn merge_renders_every_audit_format_and_the_plot() {
    let dir = Dir::new("shards-formats");
    let parts = split(&dir, 2, |i| i);
    let files = shards(&dir, &parts, &[]);
    let plot = dir.path("merged.svg").to_string_lossy().into_owned();
    for (format, marker) in [
        ("table", "gradaudit merge of 2 shards"),
        ("markdown", "|"),
        ("csv", "estimator,"),
    ] {
        let (code, out, err) = run(&["merge", &files[0], &files[1], "--format", format]);
        assert_eq!(code, 0, "{err}");
        assert!(out.contains(marker), "{format}: {out}");
        assert!(out.contains("gae:0.5"), "{format}");
    }
    let (code, _, err) = run(&["merge", &files[0], &files[1], "--plot", &plot]);
    assert_eq!(code, 0, "{err}");
    assert!(std::fs::read_to_string(&plot).unwrap().contains("<svg"));
}

#[test]
fn a_file_that_is_not_a_shard_is_refused_by_name() {
    let dir = Dir::new("shards-bad");
    let bad = dir.write("bad.shard", b"not a shard at all");
    let (code, _, err) = run(&["merge", &bad]);
    assert_eq!(code, 2);
    assert!(
        err.contains("bad.shard") && err.contains("gradaudit.shard/2"),
        "{err}"
    );
    let policy = demo("reaching_arm.safetensors");
    let (code, _, err) = run(&["merge", &policy]);
    assert_eq!(code, 2);
    assert!(err.contains("lacks `format`"), "{err}");
}

// The Dask recipe (scripts/dask_shards.py: a LocalCluster maps `gradaudit shard` over the
// files, then one `gradaudit merge`) gives the single-process Poisson report, to the same
// 1e-12 as the merge itself. Needs python3 with dask and distributed (`bash scripts/test`
// installs them); without python3 the test says so and passes.
#[test]
fn dask_recipe_gives_the_single_process_report() {
    let python = std::process::Command::new("python3")
        .arg("--version")
        .output();
    if python.is_err() {
        eprintln!("SKIPPED dask_recipe_gives_the_single_process_report: python3 is not installed");
        return;
    }
    let dir = Dir::new("shards-dask");
    let parts = split(&dir, 3, |i| i / 50);
    let out = dir.path("report.json").to_string_lossy().into_owned();
    let script = format!("{}/scripts/dask_shards.py", env!("CARGO_MANIFEST_DIR"));
    let shard_dir = dir.path("shards").to_string_lossy().into_owned();
    let done = std::process::Command::new("python3")
        .args([&script, "--gradaudit", env!("CARGO_BIN_EXE_gradaudit")])
        .args([
            "--shards-dir",
            &shard_dir,
            "--out",
            &out,
            "--format",
            "json",
        ])
        .args(["--shard-args", &FAST.join(" "), "--workers", "2"])
        .args(&parts)
        .output()
        .expect("python3 runs");
    let err = String::from_utf8_lossy(&done.stderr);
    assert!(
        done.status.success(),
        "the Dask recipe failed (dask and distributed missing? `bash scripts/test` installs \
         them): {err}"
    );
    assert!(err.contains("3 shards on 2 workers"), "{err}");
    let merged: Value = serde_json::from_str(&std::fs::read_to_string(&out).unwrap()).unwrap();
    let worst = max_rel_diff(&merged, &single_json(&[]), "");
    assert!(worst <= 1e-12, "{worst}");
}

// The Poisson audit is bit-identical for 1 and 2 threads: blocks of 64 episodes and chunks of
// 128 replicate rows are fixed, whatever the thread count.
#[test]
fn poisson_audit_is_the_same_for_any_thread_count() {
    let log = demo("docking_rover.csv");
    let mut outs = Vec::new();
    for threads in ["1", "2"] {
        let out = crate::util::gradaudit()
            .env("RAYON_NUM_THREADS", threads)
            .args(["audit", &log, "--resampling", "poisson", "--format", "json"])
            .args(FAST)
            .output()
            .expect("runs");
        assert!(out.status.success());
        outs.push(out.stdout);
    }
    assert_eq!(outs[0], outs[1]);
}

// Format version 2 (the moment columns of the noise scale's interval, the bias test's
// settings): a version-1 file is refused by name, saying why and what to do, not misread.
#[test]
fn a_version_one_shard_is_refused_with_the_reason() {
    let dir = Dir::new("shards-v1");
    let parts = split(&dir, 1, |_| 0);
    let files = shards(&dir, &parts, &[]);
    let mut bytes = std::fs::read(&files[0]).unwrap();
    let (new, old) = (b"gradaudit.shard/2", b"gradaudit.shard/1");
    let at = bytes
        .windows(new.len())
        .position(|w| w == new)
        .expect("the format string is in the header");
    bytes[at..at + old.len()].copy_from_slice(old);
    let v1 = dir.write("old.shard", &bytes);
    let (code, _, err) = run(&["merge", &v1]);
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains("old.shard")
            && err.contains("version 1 lacks")
            && err.contains("write the shards again"),
        "{err}"
    );
}

// Issue 14's figures through shards: the minimum-variance baselines (their per-replicate
// sufficient sums are sums, so they add across shards like mean_baseline's), the bias test's
// p-values and decisions under BH, and the noise scale with its BC interval: the merge of 2
// shards equals the single Poisson pass to 1e-12 on every figure.
#[test]
fn shards_carry_the_minvar_baselines_p_values_and_noise_scale() {
    let extra = [
        "--estimators",
        "rtg,total,mean_baseline,value_baseline,minvar_total,minvar_rtg",
        "--multiplicity",
        "bh",
    ];
    let single = single_json(&extra);
    let dir = Dir::new("shards-issue14");
    let parts = split(&dir, 2, |i| i);
    let merged = merge_json(&shards(&dir, &parts, &extra));
    let worst = max_rel_diff(&merged, &single, "");
    assert!(worst <= 1e-12, "{worst}");
    assert_eq!(merged["significance"]["multiplicity"], "bh");
    for name in ["minvar_total", "minvar_rtg"] {
        let row = merged["estimators"]
            .as_array()
            .unwrap()
            .iter()
            .find(|r| r["name"] == name)
            .unwrap_or_else(|| panic!("{name} audited"));
        assert!(row["variance"].as_f64().unwrap() > 0.0, "{name}");
        assert!(row["bias_p"].as_f64().is_some(), "{name}");
    }
    let ns = &merged["noise_scale"][0];
    assert!(
        ns["episodes_interval"]["low"].as_f64().unwrap() > 0.0,
        "{ns}"
    );
    assert!(
        ns["note"].as_str().unwrap().starts_with("BC interval"),
        "{ns}"
    );
    assert!(merged["baseline_gap"]["optimal"] == "minvar_rtg");
}
