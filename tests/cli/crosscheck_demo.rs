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
