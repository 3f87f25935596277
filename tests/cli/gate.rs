//! `gate`: exit codes for passing and failing rule sets, baseline comparison, JUnit output and
//! undefined statistics.

use crate::util::{Dir, demo, run};

const FAST: [&str; 4] = ["--resamples", "300", "--splits", "20"];

fn gate(extra: &[&str]) -> (i32, String, String) {
    let rover = demo("docking_rover.csv");
    let mut args = vec!["gate", rover.as_str()];
    args.extend_from_slice(&FAST);
    args.extend_from_slice(extra);
    run(&args)
}

#[test]
fn passing_rules_exit_0_and_failing_rules_exit_1() {
    let (code, out, err) = gate(&[
        "--require",
        "gae:0.5:snr>=2",
        "--require",
        "rtg:cosine_half>=0.1",
    ]);
    assert_eq!(code, 0, "{out}{err}");
    assert!(out.contains("gate holds: all 2 checks hold"), "{out}");
    let (code, out, _) = gate(&["--require", "gae:0.5:snr>=2", "--require", "rtg:snr>=1000"]);
    assert_eq!(code, 1);
    assert!(out.contains("breaks  rtg snr >= 1000"), "{out}");
    assert!(out.contains("bound >= 1000, margin -"), "{out}");
    assert!(out.contains("gate breaks: 1 of 2 checks break"), "{out}");
}

#[test]
fn rules_file_and_star_rules() {
    let dir = Dir::new("rulesfile");
    let rules = dir.write(
        "rules.json",
        br#"{"schema": "gradaudit.rules/1", "rules": [
              {"estimator": "*", "stat": "ess", "min": 1},
              {"estimator": "gae:0.8", "stat": "cosine_half", "min": 0.2}
           ]}"#,
    );
    let (code, out, err) = gate(&["--rules", &rules, "--format", "json"]);
    assert_eq!(code, 0, "{err}");
    let v: serde_json::Value = serde_json::from_str(&out).unwrap();
    let outcomes = v["outcomes"].as_array().unwrap();
    // `*` covers all 18 audited estimators (17 defaults, minvar_total among them, plus
    // gae:0.8, which the rule named).
    assert_eq!(
        outcomes.iter().filter(|o| o["rule"] == "ess >= 1").count(),
        18
    );
    assert!(outcomes.iter().any(|o| o["estimator"] == "gae:0.8"));
    assert_eq!(v["passed"], true);
    assert_eq!(v["audit"]["tool"]["schema"], "gradaudit.audit/1");
}

#[test]
fn junit_counts_match_and_failures_are_marked() {
    let dir = Dir::new("junit");
    let junit = dir.path("gate.xml");
    let j = junit.to_str().unwrap();
    let (code, _, _) = gate(&[
        "--require",
        "rtg:snr>=1000",
        "--require",
        "rtg:ess>=1",
        "--require",
        "td:snr>=1000",
        "--junit",
        j,
    ]);
    assert_eq!(code, 1);
    let xml = std::fs::read_to_string(&junit).unwrap();
    assert!(xml.starts_with("<?xml"));
    assert!(xml.contains("<testsuite name=\"gradaudit gate "), "{xml}");
    assert!(
        xml.contains("tests=\"3\" failures=\"2\" errors=\"0\""),
        "{xml}"
    );
    assert_eq!(xml.matches("<testcase ").count(), 3);
    assert_eq!(xml.matches("<failure ").count(), 2);
    assert!(
        xml.contains("classname=\"gradaudit.gate.td\" name=\"snr &gt;= 1000\""),
        "{xml}"
    );
}

#[test]
fn undefined_statistic_fails_unless_allowed() {
    let dir = Dir::new("undefined");
    // Identical one-step episodes: zero error everywhere, so snr is undefined.
    let mut text = String::from("episode,reward,terminated,score_0\n");
    for i in 0..25 {
        text.push_str(&format!("e{i},1,1,1\n"));
    }
    let log = dir.write("flat.csv", text.as_bytes());
    let (code, out, _) = run(&[
        "gate",
        &log,
        "--require",
        "rtg:snr>=1",
        "--estimators",
        "rtg",
    ]);
    assert_eq!(code, 1, "{out}");
    assert!(out.contains("snr is undefined"), "{out}");
    let (code, out, _) = run(&[
        "gate",
        &log,
        "--require",
        "rtg:snr>=1?",
        "--estimators",
        "rtg",
    ]);
    assert_eq!(code, 0, "{out}");
    assert!(out.contains("(allowed)"), "{out}");
}

/// The rover log with every reward multiplied by `factor` (variance scales by factor^2).
fn scaled_rover(dir: &Dir, name: &str, factor: f64) -> String {
    let text = std::fs::read_to_string(demo("docking_rover.csv")).unwrap();
    let mut out = String::new();
    for (i, line) in text.lines().enumerate() {
        if i == 0 {
            out.push_str(line);
        } else {
            let mut f: Vec<String> = line.split(',').map(String::from).collect();
            f[2] = (f[2].parse::<f64>().unwrap() * factor).to_string();
            out.push_str(&f.join(","));
        }
        out.push('\n');
    }
    dir.write(name, out.as_bytes())
}

#[test]
fn baseline_improved_regressed_and_incompatible() {
    let dir = Dir::new("baseline");
    let noisy = scaled_rover(&dir, "noisy.csv", 2.0);
    let base = dir.path("base.json");
    let b = base.to_str().unwrap();
    let rover = demo("docking_rover.csv");
    let mut args = vec![
        "audit",
        rover.as_str(),
        "--estimators",
        "rtg,gae:0.5",
        "--format",
        "json",
        "--out",
        b,
    ];
    args.extend_from_slice(&FAST);
    assert_eq!(run(&args).0, 0);
    let check = |log: &str, extra: &[&str]| {
        let mut a = vec!["gate", log, "--estimators", "rtg,gae:0.5", "--baseline", b];
        a.extend_from_slice(&FAST);
        a.extend_from_slice(extra);
        run(&a)
    };
    // Same log: 0% change.
    let (code, out, _) = check(&rover, &[]);
    assert_eq!(code, 0, "{out}");
    assert!(out.contains("rtg variance: baseline"), "{out}");
    assert!(out.contains("(0.0% worse; tolerance 25%)"), "{out}");
    // Rewards doubled: variance x4, 300% worse.
    let (code, out, _) = check(&noisy, &[]);
    assert_eq!(code, 1, "{out}");
    assert!(out.contains("300.0% worse"), "{out}");
    // The other way round: 75% better.
    let noisy_base = dir.path("noisy.json");
    let nb = noisy_base.to_str().unwrap();
    let mut args = vec![
        "audit",
        noisy.as_str(),
        "--estimators",
        "rtg,gae:0.5",
        "--format",
        "json",
        "--out",
        nb,
    ];
    args.extend_from_slice(&FAST);
    assert_eq!(run(&args).0, 0);
    let mut a = vec![
        "gate",
        rover.as_str(),
        "--estimators",
        "rtg,gae:0.5",
        "--baseline",
        nb,
        "--regress",
        "mse:10",
    ];
    a.extend_from_slice(&FAST);
    let (code, out, _) = run(&a);
    assert_eq!(code, 0, "{out}");
    assert!(out.contains("75.0% better"), "{out}");
    // Incompatible: another gamma and estimator set.
    let (code, _, err) = check(&rover, &["--gamma", "0.9"]);
    assert_eq!(code, 2);
    assert!(
        err.contains("not comparable") && err.contains("gamma 0.99 in the baseline, 0.9 now"),
        "{err}"
    );
    let mut a = vec![
        "gate",
        rover.as_str(),
        "--estimators",
        "rtg",
        "--baseline",
        b,
    ];
    a.extend_from_slice(&FAST);
    let (code, _, err) = run(&a);
    assert_eq!(code, 2);
    assert!(err.contains("only in the baseline: [gae:0.5]"), "{err}");
}

#[test]
fn markdown_summary_for_pull_requests() {
    let (code, out, _) = gate(&["--require", "rtg:snr>=1000", "--format", "markdown"]);
    assert_eq!(code, 1);
    assert!(
        out.starts_with("### gradaudit gate: gate breaks: 1 of 1 checks break"),
        "{out}"
    );
    assert!(
        out.contains("| **breaks** | `rtg` | snr >= 1000 |"),
        "{out}"
    );
}

#[test]
fn usage_errors_exit_2() {
    let (code, _, err) = gate(&[]);
    assert_eq!(code, 2);
    assert!(err.contains("nothing to check"), "{err}");
    let (code, _, err) = gate(&["--regress", "variance:25"]);
    assert_eq!(code, 2);
    assert!(err.contains("--baseline"), "{err}");
    let diverter = demo("parcel_diverter.csv");
    let (code, _, err) = run(&["gate", &diverter, "--require", "td:snr>=1"]);
    assert_eq!(code, 2);
    assert!(err.contains("td") && err.contains("value"), "{err}");
    let (code, _, err) = gate(&["--baseline", "/nonexistent/base.json"]);
    assert_eq!(code, 2);
    assert!(err.contains("/nonexistent/base.json"), "{err}");
}
