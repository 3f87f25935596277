//! `--policy`: scores from a policy file, and the choice between logged and computed scores.

use crate::util::{Dir, demo, run, run_json, strings};

#[test]
fn audit_with_a_policy_matches_the_logged_scores() {
    let rover = demo("docking_rover.csv");
    let policy = demo("docking_rover.policy.json");
    let base = [
        "audit",
        rover.as_str(),
        "--resamples",
        "200",
        "--format",
        "json",
        "--estimators",
        "rtg,gae:0.9",
    ];
    let (code, cols, err) = run(&base);
    assert_eq!(code, 0, "{err}");
    let mut with = base.to_vec();
    with.extend(["--policy", policy.as_str(), "--scores-from", "policy"]);
    let (code, pol, err) = run(&with);
    assert_eq!(code, 0, "{err}");
    let (a, b): (serde_json::Value, serde_json::Value) = (
        serde_json::from_str(&cols).unwrap(),
        serde_json::from_str(&pol).unwrap(),
    );
    assert_eq!(b["input"]["scores_from"], "policy");
    assert_eq!(b["input"]["parameters"][0], "W[0,0]");
    assert_eq!(b["input"]["parameters"][7], "log_sigma[1]");
    assert_eq!(a["input"]["parameters"][0], "score_0");
    crate::util::assert_same_variances(&a, &b, 1e-9);
}

#[test]
fn both_score_sources_need_a_choice() {
    let rover = demo("docking_rover.csv");
    let policy = demo("docking_rover.policy.json");
    let (code, _, err) = run(&["audit", &rover, "--policy", &policy]);
    assert_eq!(code, 2);
    assert!(
        err.contains("--scores-from policy or --scores-from columns"),
        "{err}"
    );
}

#[test]
fn a_log_without_scores_audits_with_a_policy() {
    let dir = Dir::new("noscores");
    // The diverter log with its score columns removed.
    let text = std::fs::read_to_string(demo("parcel_diverter.csv")).unwrap();
    let header: Vec<&str> = text.lines().next().unwrap().split(',').collect();
    let keep: Vec<usize> = (0..header.len())
        .filter(|&i| !header[i].starts_with("score_"))
        .collect();
    let stripped: String = text
        .lines()
        .map(|l| {
            let f: Vec<&str> = l.split(',').collect();
            keep.iter().map(|&i| f[i]).collect::<Vec<_>>().join(",") + "\n"
        })
        .collect();
    let log = dir.write("noscores.csv", stripped.as_bytes());
    let (code, _, err) = run(&["audit", &log]);
    assert_eq!(code, 2);
    assert!(err.contains("--policy FILE"), "{err}");
    let policy = demo("parcel_diverter.policy.json");
    let (code, out, err) = run(&["audit", &log, "--policy", &policy, "--resamples", "100"]);
    assert_eq!(code, 0, "{err}");
    assert!(out.contains("score dimension 5 (from policy)"), "{out}");
    // A discrete action outside its range is an error naming the episode and step.
    let bad = stripped.replacen(
        "\ngate-0000,0,1,0,-0.541576,0.382969,0.284788,0,0.408552,0",
        "\ngate-0000,0,1,0,-0.541576,0.382969,0.284788,0,0.408552,3",
        1,
    );
    assert_ne!(bad, stripped);
    let bad_log = dir.write("bad.csv", bad.as_bytes());
    let (code, _, err) = run(&["audit", &bad_log, "--policy", &policy]);
    assert_eq!(code, 2);
    assert!(
        err.contains("episode 'gate-0000'") && err.contains("outside the discrete range"),
        "{err}"
    );
}

#[test]
fn fit_value_gives_a_critic_to_a_log_without_one() {
    let diverter = demo("parcel_diverter.csv");
    let v = run_json(&[
        "audit",
        &diverter,
        "--fit-value",
        "--resamples",
        "100",
        "--format",
        "json",
    ]);
    let names = strings(&v["estimators"], "name");
    for want in ["value_baseline", "td", "gae:0.95", "nstep:5"] {
        assert!(names.contains(&want), "{want} in {names:?}");
    }
    assert_eq!(v["input"]["critic"]["fitted_folds"], 5);
    assert!(
        v["input"]["critic"]["fitted_explained_variance"]
            .as_f64()
            .unwrap()
            > 0.0
    );
    assert!(v["input"]["critic"]["recorded_explained_variance"].is_null());
    let rover = demo("docking_rover.csv");
    let (code, out, _) = run(&["inspect", &rover, "--fit-value", "--format", "json"]);
    assert_eq!(code, 0);
    let v: serde_json::Value = serde_json::from_str(&out).unwrap();
    let (rec, fit) = (
        v["critic"]["recorded_explained_variance"].as_f64().unwrap(),
        v["critic"]["fitted_explained_variance"].as_f64().unwrap(),
    );
    assert!(
        fit > rec,
        "the demo's recorded critic is deliberately poor: {rec} vs {fit}"
    );
    let (code, _, err) = gradaudit_stdin(&["audit", "-", "--fit-value"]);
    assert_eq!(code, 2);
    assert!(err.contains("reads the log twice"), "{err}");
}

fn gradaudit_stdin(args: &[&str]) -> (i32, String, String) {
    let out = crate::util::gradaudit()
        .args(args)
        .write_stdin("episode,reward,score_0\na,1,1\n")
        .output()
        .unwrap();
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into(),
        String::from_utf8_lossy(&out.stderr).into(),
    )
}
