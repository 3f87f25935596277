//! The demo logs with a training stack's own advantage column (README, "Checking a stack's
//! own advantages"), and `audit --estimators column:HEADER`.

use crate::util::{demo, run, run_json};

#[test]
fn demo_correct_column_agrees_and_faulty_one_is_named() {
    let (code, out, err) = run(&[
        "crosscheck",
        &demo("docking_rover_adv.csv"),
        "--advantage",
        "adv",
        "--returns",
        "value_target",
    ]);
    assert_eq!(code, 0, "{err}");
    assert!(out.contains("AGREES"), "{out}");
    let (code, out, _) = run(&[
        "crosscheck",
        &demo("docking_rover_adv_fault.csv"),
        "--advantage",
        "adv",
        "--format",
        "markdown",
    ]);
    assert_eq!(code, 1);
    assert!(
        out.contains("explained by truncation_as_termination"),
        "{out}"
    );
}

// A logged correct gae:0.95 column (printed exactly, shortest round-trip text) is the same
// return proxy as gae:0.95, so its gradient is the same to 1e-12 (each gradient is
// sum_t Psi_t s_t with identical Psi_t; only the summation may differ in the last bits).
#[test]
fn logged_gae_column_gives_the_gae_gradient() {
    let path = crate::crosscheck::exact_gae_log();
    let rep = run_json(&[
        "audit",
        &path.1,
        "--estimators",
        "column:adv,gae:0.95",
        "--resamples",
        "50",
        "--format",
        "json",
    ]);
    let rows = rep["estimators"].as_array().unwrap();
    let grad = |name: &str| -> Vec<f64> {
        rows.iter().find(|r| r["name"] == name).unwrap()["gradient"]
            .as_array()
            .unwrap()
            .iter()
            .map(|x| x.as_f64().unwrap())
            .collect()
    };
    let (a, b) = (grad("column:adv"), grad("gae:0.95"));
    assert_eq!(a.len(), 2);
    for (x, y) in a.iter().zip(&b) {
        assert!((x - y).abs() <= 1e-12 * (1.0 + y.abs()), "{x} vs {y}");
    }
}

/// The JSON contract of `gradaudit.crosscheck/1`: every field known, nothing more (fields are
/// declared to be checked for presence and type, not all of them read).
#[allow(dead_code)]
mod wire {
    use serde::Deserialize;
    use std::collections::BTreeMap;

    #[derive(Deserialize)]
    #[serde(deny_unknown_fields)]
    pub struct Report {
        pub tool: Tool,
        pub input: Input,
        pub claim: Claim,
        pub agree: bool,
        pub columns: Vec<Column>,
        pub warnings: BTreeMap<String, serde_json::Value>,
    }
    #[derive(Deserialize)]
    #[serde(deny_unknown_fields)]
    pub struct Tool {
        pub name: String,
        pub version: String,
        pub schema: String,
    }
    #[derive(Deserialize)]
    #[serde(deny_unknown_fields)]
    pub struct Input {
        pub file: String,
        pub rows: u64,
        pub episodes: u64,
        pub steps: u64,
        pub terminated: u64,
        pub truncated: u64,
        pub environments: u64,
    }
    #[derive(Deserialize)]
    #[serde(deny_unknown_fields)]
    pub struct Claim {
        pub estimator: String,
        pub gamma: f64,
        pub lambda: Option<f64>,
        pub n: Option<u64>,
    }
    #[derive(Deserialize)]
    #[serde(deny_unknown_fields)]
    pub struct Column {
        pub column: String,
        pub kind: String,
        pub status: String,
        pub steps: u64,
        pub tolerance: Tolerance,
        pub agreement: Agreement,
        pub variants: Vec<Variant>,
        pub explained_by: Vec<String>,
        pub worst_rows: Vec<Row>,
    }
    #[derive(Deserialize)]
    #[serde(deny_unknown_fields)]
    pub struct Tolerance {
        pub source: String,
        pub unit: Option<f64>,
        pub column_precision: String,
        pub input_precision: String,
        pub min: Option<f64>,
        pub max: Option<f64>,
    }
    #[derive(Deserialize)]
    #[serde(deny_unknown_fields)]
    pub struct Agreement {
        pub max_abs_error: Option<f64>,
        pub max_rel_error: Option<f64>,
        pub steps_differing: u64,
        pub unchecked_steps: u64,
        pub share_differing: Option<f64>,
        pub episodes_differing: u64,
        pub first_difference: Option<Row>,
        pub episodes: Vec<EpisodeCount>,
    }
    #[derive(Deserialize)]
    #[serde(deny_unknown_fields)]
    pub struct Row {
        pub line: u64,
        pub episode: String,
        pub step: u64,
        pub logged: f64,
        pub reference: Option<f64>,
        pub difference: Option<f64>,
        pub tolerance: Option<f64>,
    }
    #[derive(Deserialize)]
    #[serde(deny_unknown_fields)]
    pub struct EpisodeCount {
        pub episode: String,
        pub first_line: u64,
        pub steps: u64,
        pub differing: u64,
    }
    #[derive(Deserialize)]
    #[serde(deny_unknown_fields)]
    pub struct Variant {
        pub name: String,
        pub description: String,
        pub explains: bool,
        pub steps_matching: u64,
        pub affected_steps: u64,
        pub affected_episodes: u64,
        pub first_affected_line: Option<u64>,
        pub parameters: BTreeMap<String, f64>,
    }
}

#[test]
fn json_report_follows_its_schema_and_out_writes_it() {
    let dir = crate::util::Dir::new("cc_json");
    let out = dir.path("report.json");
    let out = out.to_str().unwrap();
    let (code, stdout, err) = run(&[
        "crosscheck",
        &demo("docking_rover_adv_fault.csv"),
        "--advantage",
        "adv",
        "--returns",
        "value_target",
        "--format",
        "json",
        "--out",
        out,
    ]);
    assert_eq!(code, 1, "{err}");
    assert!(stdout.is_empty());
    let r: wire::Report = serde_json::from_str(&std::fs::read_to_string(out).unwrap()).unwrap();
    assert_eq!(r.tool.schema, "gradaudit.crosscheck/1");
    assert!(!r.tool.version.is_empty() && r.tool.name == "gradaudit");
    assert!(!r.agree);
    assert_eq!((r.input.episodes, r.input.truncated), (150, 18));
    assert_eq!(r.claim.estimator, "gae:0.95");
    assert_eq!(r.claim.lambda, Some(0.95));
    assert_eq!(r.columns.len(), 2);
    for c in &r.columns {
        assert_eq!(
            c.explained_by,
            vec!["truncation_as_termination".to_string()]
        );
        // The fault touches exactly the steps of the 18 truncated episodes.
        let v = c.variants.iter().find(|v| v.explains).unwrap();
        assert_eq!(v.affected_episodes, 18);
        assert_eq!(v.affected_steps, c.agreement.steps_differing);
        assert_eq!(
            v.first_affected_line,
            c.agreement.first_difference.as_ref().map(|f| f.line)
        );
    }
}
