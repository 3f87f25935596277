//! `audit`: the JSON contract, the other formats, determinism, output files and usage errors.

use crate::util::{Dir, demo, gradaudit, run, strings};
use std::collections::BTreeMap;

fn audit_json(args: &[&str]) -> serde_json::Value {
    let mut all = vec!["audit"];
    all.extend_from_slice(args);
    all.extend_from_slice(&["--format", "json", "--resamples", "300"]);
    let (code, out, err) = run(&all);
    assert_eq!(code, 0, "{err}");
    serde_json::from_str(&out).expect("valid JSON")
}

#[test]
fn json_carries_the_documented_fields() {
    let v = audit_json(&[&demo("docking_rover.csv")]);
    assert_eq!(v["input"]["episodes"], 150);
    assert_eq!(v["input"]["score_dim"], 8);
    assert!(v["input"]["steps"].as_u64().unwrap() > 150);
    assert_eq!(v["settings"]["gamma"], 0.99);
    assert_eq!(v["settings"]["resamples"], 300);
    assert_eq!(v["settings"]["reference"], "rtg");
    assert!(v["settings"]["seed"].is_u64());
    let names = strings(&v["estimators"], "name");
    for want in [
        "rtg", "total", "gae:0.95", "gae:1", "gae:0", "nstep:5", "td", "whitened",
    ] {
        assert!(names.contains(&want), "{want} in {names:?}");
    }
    let mses: Vec<f64> = v["estimators"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["mse"].as_f64().unwrap())
        .collect();
    assert!(mses.windows(2).all(|w| w[0] <= w[1]), "sorted by mse");
    for e in v["estimators"].as_array().unwrap() {
        assert_eq!(e["gradient"].as_array().unwrap().len(), 8);
        for key in [
            "variance",
            "bias_sq",
            "mse",
            "snr",
            "ess",
            "cosine_half",
            "episodes_for_snr",
        ] {
            assert!(e.get(key).is_some(), "{key} present in {e}");
        }
        let mse = e["mse"].as_f64().unwrap();
        let sum = e["bias_sq"].as_f64().unwrap() + e["variance"].as_f64().unwrap();
        assert!((mse - sum).abs() <= 1e-12 * mse.max(1.0));
    }
    let skipped = strings(&v["skipped"], "name");
    assert_eq!(skipped, vec!["q", "advantage_q"]);
}

#[test]
fn gae_one_and_zero_equal_their_identities_in_the_report() {
    // GAE paper (Schulman et al. 2015, eqs. 17-18): gae:0 = td; on terminated episodes
    // gae:1 = rtg_discounted - value = value_baseline. The diverter log has no critic, so the
    // rover log is used; its truncated episodes carry a bootstrap value, which makes gae:1
    // differ from value_baseline there, but never gae:0 from td or nstep:1.
    let v = audit_json(&[&demo("docking_rover.csv")]);
    let by: BTreeMap<String, Vec<f64>> = v["estimators"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| {
            let g = e["gradient"]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap());
            (e["name"].as_str().unwrap().to_string(), g.collect())
        })
        .collect();
    for (a, b) in [("gae:0", "td"), ("nstep:1", "td")] {
        for (x, y) in by[a].iter().zip(&by[b]) {
            assert!((x - y).abs() < 1e-9, "{a} vs {b}");
        }
    }
}

#[test]
fn table_csv_and_markdown() {
    let rover = demo("docking_rover.csv");
    let (code, out, _) = run(&["audit", &rover, "--resamples", "200"]);
    assert_eq!(code, 0);
    assert!(out.contains("rtg (ref)"));
    assert!(out.contains("verdict: lowest MSE: "));
    assert!(out.contains("skipped q, advantage_q: needs the q column"));
    let (_, csv, _) = run(&["audit", &rover, "--resamples", "200", "--format", "csv"]);
    let mut rdr = csv::Reader::from_reader(csv.as_bytes());
    let headers = rdr.headers().unwrap().clone();
    assert_eq!(&headers[0], "estimator");
    assert!(headers.iter().any(|h| h == "bias_sq"));
    let records: Vec<csv::StringRecord> = rdr.records().map(Result::unwrap).collect();
    // 16 estimators the rover's columns allow, plus minvar_total (issue 14).
    assert_eq!(records.len(), 17);
    let detected = headers.iter().position(|h| h == "bias_detected").unwrap();
    for r in &records {
        assert_eq!(r.len(), headers.len());
        assert!(["true", "false"].contains(&&r[detected]));
        r[1].parse::<f64>().expect("mse is a plain number");
    }
    let (_, md, _) = run(&[
        "audit",
        &rover,
        "--resamples",
        "200",
        "--format",
        "markdown",
    ]);
    assert!(md.contains("| estimator | mse |"));
    assert!(md.contains("**Verdict:**"));
}

#[test]
fn identical_json_for_one_and_two_threads() {
    let rover = demo("docking_rover.csv");
    let out = |threads: &str| {
        gradaudit()
            .args(["audit", &rover, "--format", "json", "--resamples", "500"])
            .env("RAYON_NUM_THREADS", threads)
            .output()
            .unwrap()
            .stdout
    };
    assert_eq!(out("1"), out("2"));
}

/// Interleaves the rows of different episodes pseudo-randomly, keeping each episode's own
/// row order (what parallel robots writing to one file produce).
fn interleave(text: &str, seed: u64) -> String {
    let mut lines = text.lines();
    let header = lines.next().unwrap();
    let mut groups: BTreeMap<String, Vec<&str>> = BTreeMap::new();
    for l in lines {
        groups
            .entry(l.split(',').next().unwrap().to_string())
            .or_default()
            .push(l);
    }
    let mut queues: Vec<std::collections::VecDeque<&str>> =
        groups.into_values().map(Into::into).collect();
    let mut state = seed;
    let mut out = format!("{header}\n");
    while !queues.is_empty() {
        state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        let i = (state >> 33) as usize % queues.len();
        out.push_str(queues[i].pop_front().unwrap());
        out.push('\n');
        if queues[i].is_empty() {
            queues.swap_remove(i);
        }
    }
    out
}

#[test]
fn identical_json_when_rows_are_shuffled_between_episodes() {
    let dir = Dir::new("shuffle");
    let text = std::fs::read_to_string(demo("docking_rover.csv")).unwrap();
    let mixed = interleave(&text, 42);
    assert_ne!(mixed, text);
    let p = dir.write("mixed.csv", mixed.as_bytes());
    let mut a = audit_json(&[&demo("docking_rover.csv")]);
    let mut b = audit_json(&[&p]);
    a["input"]["file"] = "".into();
    b["input"]["file"] = "".into();
    assert_eq!(a, b);
}

#[test]
fn out_file_is_written_whole_and_bad_paths_fail_early() {
    let dir = Dir::new("out");
    let target = dir.path("report.json");
    let t = target.to_str().unwrap();
    let rover = demo("docking_rover.csv");
    let (code, out, _) = run(&[
        "audit",
        &rover,
        "--resamples",
        "100",
        "--format",
        "json",
        "--out",
        t,
    ]);
    assert_eq!(code, 0);
    assert!(out.is_empty());
    let v: serde_json::Value = serde_json::from_slice(&std::fs::read(&target).unwrap()).unwrap();
    assert_eq!(v["settings"]["resamples"], 100);
    // No temporary file is left beside it.
    assert_eq!(std::fs::read_dir(dir.tmp.path()).unwrap().count(), 1);
    let (code, _, err) = run(&["audit", &rover, "--out", "/nonexistent-dir/r.json"]);
    assert_eq!(code, 2);
    assert!(err.contains("/nonexistent-dir/r.json"), "{err}");
}

#[test]
fn usage_and_data_errors_exit_2() {
    let dir = Dir::new("usage");
    let noscore = dir.write("noscore.csv", b"episode,reward,terminated\na,1,1\nb,1,1\n");
    let (code, _, err) = run(&["audit", &noscore]);
    assert_eq!(code, 2);
    assert!(err.contains("no score columns"), "{err}");
    let one = dir.write("one.csv", b"episode,reward,terminated,score_0\na,1,1,1\n");
    let (code, _, err) = run(&["audit", &one]);
    assert_eq!(code, 2);
    assert!(err.contains("at least 2"), "{err}");
    let rover = demo("docking_rover.csv");
    for bad in [
        vec!["--gamma", "1.5"],
        vec!["--estimators", "gae:2"],
        vec!["--reference", "whitened"],
        vec!["--confidence", "1"],
        vec!["--resamples", "1"],
        vec!["--col", "nonsense"],
    ] {
        let mut args = vec!["audit", rover.as_str()];
        args.extend(bad.iter().copied());
        let (code, _, err) = run(&args);
        assert_eq!(code, 2, "{bad:?}: {err}");
        assert!(!err.contains("panicked"));
    }
    let diverter = demo("parcel_diverter.csv");
    let (code, _, err) = run(&["audit", &diverter, "--reference", "td"]);
    assert_eq!(code, 2);
    assert!(err.contains("value"), "{err}");
}

#[test]
fn few_episodes_warn_and_undefined_figures_are_null() {
    let dir = Dir::new("few");
    // Five identical one-step episodes: every estimator is constant across resamples.
    let p = dir.write(
        "few.csv",
        b"episode,reward,terminated,score_0\na,1,1,1\nb,1,1,1\nc,1,1,1\nd,1,1,1\ne,1,1,1\n",
    );
    let v = audit_json(&[&p, "--estimators", "rtg,total,whitened"]);
    assert_eq!(v["warnings"]["few_episodes"]["count"], 1);
    let rtg = v["estimators"]
        .as_array()
        .unwrap()
        .iter()
        .find(|e| e["name"] == "rtg")
        .unwrap();
    assert_eq!(rtg["variance"], 0.0);
    assert!(rtg["snr"].is_null());
    assert!(rtg["ess"].is_null());
    assert!(!rtg["notes"].as_array().unwrap().is_empty());
}

#[test]
fn open_episodes_respect_the_memory_budget() {
    let rover = demo("docking_rover.csv");
    let (code, _, err) = run(&["inspect", &rover, "--max-memory", "0"]);
    assert_eq!(code, 2);
    assert!(
        err.contains("line 2") && err.contains("memory budget of 0 MB"),
        "{err}"
    );
    assert!(err.contains("terminated or truncated"), "{err}");
}

#[test]
fn too_many_columns_is_refused() {
    let dir = Dir::new("columns");
    let mut header = String::from("episode,reward");
    for j in 0..100_000 {
        header.push_str(&format!(",score_{j}"));
    }
    let p = dir.write("wide.csv", format!("{header}\n").as_bytes());
    let (code, _, err) = run(&["inspect", &p]);
    assert_eq!(code, 2);
    assert!(
        err.contains("100002 columns, more than the limit of 100000"),
        "{err}"
    );
}

#[test]
fn a_failed_run_leaves_an_existing_report_untouched() {
    let dir = Dir::new("keep");
    let report = dir.write("report.json", b"{\"previous\": true}\n");
    let bad = dir.write("bad.csv", b"episode,reward,terminated,score_0\na,x,1,1\n");
    let (code, _, _) = run(&["audit", &bad, "--out", &report]);
    assert_eq!(code, 2);
    assert_eq!(
        std::fs::read_to_string(&report).unwrap(),
        "{\"previous\": true}\n"
    );
    // A target that cannot be replaced (a folder): a clean error, and no temporary file left.
    let folder = dir.path("a-folder");
    std::fs::create_dir(&folder).unwrap();
    let rover = demo("docking_rover.csv");
    let (code, _, err) = run(&[
        "audit",
        &rover,
        "--resamples",
        "50",
        "--out",
        folder.to_str().unwrap(),
    ]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("a-folder"), "{err}");
    let left: Vec<_> = std::fs::read_dir(dir.tmp.path())
        .unwrap()
        .map(|e| e.unwrap().file_name())
        .collect();
    assert_eq!(left.len(), 3, "{left:?}");
}
