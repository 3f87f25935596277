//! Hardening against non-finite figures: logs whose sums overflow f64 (values of +-1e308),
//! astronomically large figures (scores near 1e200, rewards near 1e152), and degenerate options.
//! The rule checked: a figure derived from an overflowed or undefined one is undefined (null,
//! a dash, an empty cell), an undefined figure never satisfies a rule unless the rule allows it,
//! and no format prints NaN or inf (JSON is checked by parsing it).

use crate::util::{Dir, demo, gradaudit, run};
use std::time::Duration;

fn fixture(name: &str) -> String {
    format!("{}/tests/fixtures/bad/{name}", env!("CARGO_MANIFEST_DIR"))
}

/// Whether `text` holds a word NaN, inf or infinity (any case), as Rust, C or JSON writers
/// would print a non-finite number.
pub fn prints_non_finite(text: &str) -> bool {
    text.split(|c: char| !c.is_ascii_alphanumeric())
        .any(|w| matches!(w.to_ascii_lowercase().as_str(), "nan" | "inf" | "infinity"))
}

/// Parses JSON output: serde_json's Value holds only finite numbers, so parsing is the check;
/// the text is searched too, for a NaN written as a bare token.
fn parse(out: &str) -> serde_json::Value {
    assert!(!prints_non_finite(out), "non-finite token in JSON: {out}");
    serde_json::from_str(out).expect("the output is JSON")
}

/// Runs to exit `code`, with no panic, and output free of NaN and inf; returns stdout.
fn expect(args: &[&str], code: i32) -> String {
    let (got, out, err) = run(args);
    assert_eq!(got, code, "{args:?}: {err}{out}");
    assert!(!err.contains("panicked"), "{args:?}: {err}");
    assert!(!prints_non_finite(&out), "{args:?}: NaN or inf in\n{out}");
    out
}

const FAST: [&str; 4] = ["--resamples", "200", "--splits", "10"];

#[test]
fn sweep_overflowed_sums_do_not_panic() {
    let sums = fixture("overflow_sums.csv");
    let out = expect(&["sweep", &sums, "--over", "gamma", "--format", "json"], 0);
    let v = parse(&out);
    // No point has a defined MSE, so there is no choice (it used to panic in the band logic).
    assert!(v["choice"]["best"].is_null() && v["choice"]["recommended"].is_null());
    assert_eq!(v["choice"]["band"].as_array().unwrap().len(), 0);
    assert!(
        v["choice"]["text"]
            .as_str()
            .unwrap()
            .contains("no grid point has a defined MSE")
    );
    for p in v["points"].as_array().unwrap() {
        for key in ["bias_sq", "variance", "mse", "episodes_for_snr"] {
            assert!(p[key].is_null(), "{key}: {p}");
        }
    }
    let table = expect(&["sweep", &sums, "--over", "gamma"], 0);
    assert!(
        table.contains("(chart: every figure is undefined)"),
        "{table}"
    );
    let values = fixture("overflow_values.csv");
    for over in ["lambda", "nstep"] {
        let mut args = vec!["sweep", values.as_str(), "--over", over, "--format", "json"];
        args.extend(FAST);
        parse(&expect(&args, 0));
    }
}

/// The rover demo with a policy whose scores overflow: log_sigma -1000 (1/sigma^2 = e^2000),
/// sigma 1e-320 (sigma^2 underflows to 0) and W 1e308 (the mean overflows). The sweep used to
/// panic; the score is refused where it first stops being a finite number.
#[test]
fn sweep_with_overflowing_policy_scores_does_not_panic() {
    let dir = Dir::new("overflow-policy");
    let base: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(demo("docking_rover.policy.json")).unwrap())
            .unwrap();
    let variants: [(&str, &str, serde_json::Value); 3] = [
        ("log_sigma", "gamma", serde_json::json!([-1000.0, -1000.0])),
        ("sigma", "lambda", serde_json::json!([1e-320, 1e-320])),
        (
            "W",
            "nstep",
            serde_json::json!([[1e308, 0.0], [0.0, 1e308]]),
        ),
    ];
    let rover = demo("docking_rover.csv");
    for (key, over, value) in variants {
        let mut policy = base.clone();
        let obj = policy.as_object_mut().unwrap();
        if key == "sigma" {
            obj.remove("log_sigma");
        }
        obj.insert(key.to_string(), value);
        let file = dir.write(&format!("{key}.json"), policy.to_string().as_bytes());
        let mut args = vec![
            "sweep",
            rover.as_str(),
            "--policy",
            file.as_str(),
            "--scores-from",
            "policy",
            "--over",
            over,
            "--format",
            "json",
        ];
        args.extend(FAST);
        let (code, _, err) = run(&args);
        assert!(!err.contains("panicked"), "{key}: {err}");
        // Refused where the score first overflows, naming the log, the episode and the step.
        assert_eq!(code, 2, "{key}: {err}");
        assert!(err.contains("docking_rover.csv"), "{key}: {err}");
        assert!(err.contains("episode 'rover-0000'"), "{key}: {err}");
        assert!(err.contains("step 0"), "{key}: {err}");
        assert!(err.contains("not a finite number"), "{key}: {err}");
        assert!(!prints_non_finite(&err), "{key}: {err}");
    }
}

#[test]
fn gate_never_passes_on_undefined_figure() {
    let values = fixture("overflow_values.csv");
    let v = parse(&expect(&["audit", &values, "--format", "json"], 0));
    let td = v["estimators"]
        .as_array()
        .unwrap()
        .iter()
        .find(|e| e["name"] == "td")
        .expect("td audited");
    // Its sums overflowed: every figure derived from them is undefined, bias_sq too (it was 0,
    // from max(NaN, 0)), and episodes_for_snr (it was 1).
    for key in [
        "gradient",
        "variance",
        "bias_sq",
        "mse",
        "snr",
        "ess",
        "episodes_for_snr",
    ] {
        assert!(td[key].is_null(), "td {key}: {td}");
    }
    assert_eq!(td["bias_detected"], false);
    let notes = td["notes"].to_string();
    assert!(notes.contains("overflowed"), "{notes}");
    assert!(
        !notes.contains("zero error") && !notes.contains("zero signal"),
        "{notes}"
    );

    let gate = |rule: &str, code: i32| {
        let mut args = vec!["gate", values.as_str(), "--require", rule];
        args.extend(FAST);
        expect(&args, code)
    };
    let out = gate("td:episodes_for_snr<=10", 1);
    assert!(out.contains("breaks  td episodes_for_snr <= 10"), "{out}");
    assert!(out.contains("undefined"), "{out}");
    gate("td:mse<=1e300@interval", 1);
    gate("td:variance<=1e300", 1);
    gate("td:relative_bias<=1e300", 1);
    // Allowed explicitly: passes, and says so.
    let out = gate("td:episodes_for_snr<=10?", 0);
    assert!(out.contains("(allowed)"), "{out}");
}

#[test]
fn gate_at_interval_end_never_passes_on_undefined_figure() {
    let values = fixture("overflow_values.csv");
    let mut args = vec![
        "gate",
        values.as_str(),
        "--require",
        "*:episodes_for_snr<=10@interval",
        "--format",
        "json",
    ];
    args.extend(FAST);
    let v = parse(&expect(&args, 1));
    let outcomes = v["outcomes"].as_array().unwrap();
    for o in outcomes {
        if o["measured"].is_null() {
            assert_eq!(o["passed"], false, "{o}");
        }
    }
    // At the interval end td's planning figure is undefined (it was NaN.max(1) = 1, a pass).
    let td = outcomes.iter().find(|o| o["estimator"] == "td").unwrap();
    assert!(td["measured"].is_null() && td["passed"] == false, "{td}");
    assert!(
        v["audit"]["estimators"]
            .as_array()
            .unwrap()
            .iter()
            .all(|e| { e["mse"].is_null() == e["bias_sq"].is_null() })
    );
}

/// Runs with a time limit: a plot of astronomical figures must finish (plotters' tick search
/// never ended on an infinite axis range).
fn plot(args: &[&str]) -> String {
    let out = gradaudit()
        .args(args)
        .timeout(Duration::from_secs(120))
        .output()
        .expect("finishes within the time limit");
    assert_eq!(
        out.status.code(),
        Some(0),
        "{args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}

#[test]
fn plot_of_astronomical_figures_finishes() {
    let dir = Dir::new("astronomical-plot");
    let cases = [
        ("audit", "astronomical_scores.csv", "a.svg"),
        ("audit", "astronomical_rewards.csv", "b.svg"),
        ("audit", "overflow_sums.csv", "c.svg"),
        ("sweep", "astronomical_rewards.csv", "d.svg"),
        ("sweep", "overflow_values.csv", "e.svg"),
    ];
    for (command, log, svg) in cases {
        let path = dir.path(svg);
        let (log, p) = (fixture(log), path.to_str().unwrap().to_string());
        let mut args = vec![command, log.as_str(), "--plot", p.as_str()];
        if command == "sweep" {
            args.extend(["--over", "lambda"]);
        }
        args.extend(FAST);
        plot(&args);
        let text = std::fs::read_to_string(&path).unwrap();
        let doc = roxmltree::Document::parse(&text).expect("well-formed SVG");
        let words: String = doc
            .descendants()
            .filter_map(|n| n.text())
            .collect::<Vec<_>>()
            .join(" ");
        assert!(!prints_non_finite(&words), "{svg}: {words}");
        for node in doc.descendants() {
            for a in node.attributes() {
                assert!(
                    !prints_non_finite(a.value()),
                    "{svg}: {}={}",
                    a.name(),
                    a.value()
                );
            }
        }
        if svg == "b.svg" {
            // MSEs up to 7.5e304 (rewards near 1e152, squared): the axis is in units of 1e304.
            assert!(words.contains("in units of 1e304"), "{words}");
        }
    }
}

#[test]
fn no_format_prints_nan_or_inf() {
    let logs = [
        "overflow_sums.csv",
        "overflow_values.csv",
        "astronomical_scores.csv",
        "astronomical_rewards.csv",
    ];
    for log in logs {
        let log = fixture(log);
        for format in ["table", "json", "csv", "markdown"] {
            let mut args = vec!["audit", log.as_str(), "--format", format];
            args.extend(FAST);
            let out = expect(&args, 0);
            assert!(!out.contains("explain -inf"), "{out}");
            if format == "json" {
                let v = parse(&out);
                let text = v["verdict"]["text"].as_str().unwrap();
                if v["verdict"]["best"].is_null() {
                    assert!(text.contains("no estimator has a defined MSE"), "{text}");
                }
            }
            let mut args = vec!["sweep", log.as_str(), "--over", "gamma", "--format", format];
            args.extend(FAST);
            let out = expect(&args, 0);
            if format == "json" {
                parse(&out);
            }
        }
        for format in ["text", "markdown", "json"] {
            let mut args = vec![
                "gate",
                log.as_str(),
                "--require",
                "*:mse<=1e300",
                "--format",
                format,
            ];
            args.extend(FAST);
            let (code, out, err) = run(&args);
            assert!(code == 0 || code == 1, "{err}");
            assert!(!prints_non_finite(&out), "{out}");
            if format == "json" {
                parse(&out);
            }
        }
    }
}

#[test]
fn verdict_never_says_nan_or_zero_percent_of_mse() {
    for log in [
        "overflow_sums.csv",
        "overflow_values.csv",
        "astronomical_scores.csv",
    ] {
        let log = fixture(log);
        let mut args = vec!["audit", log.as_str()];
        args.extend(FAST);
        let out = expect(&args, 0);
        let verdict = out.lines().find(|l| l.starts_with("verdict:")).unwrap();
        assert!(
            !verdict.contains("NaN%") && !verdict.contains(" 0% of its MSE"),
            "{verdict}"
        );
        assert!(!out.contains("zero error"), "{out}");
    }
}

#[test]
fn splits_zero_is_refused() {
    let log = demo("docking_rover.csv");
    for command in ["audit", "gate"] {
        let (code, _, err) = run(&[command, &log, "--splits", "0"]);
        assert_eq!(code, 2, "{err}");
        assert!(err.contains("--splits 0"), "{err}");
        assert!(err.contains("at least one"), "{err}");
    }
}

#[test]
fn grid_step_too_small_for_the_size_limit_says_so() {
    let log = demo("docking_rover.csv");
    let (code, _, err) = run(&["sweep", &log, "--over", "lambda", "--grid", "0:1:1e-300"]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("too small"), "{err}");
    assert!(err.contains("at most 10000"), "{err}");
    assert!(!err.contains("empty"), "{err}");
}

#[test]
fn regression_check_never_passes_on_undefined_figure() {
    // A baseline written from an overflowed audit (null variance, bias_sq and mse) is read,
    // and a regression check on a figure undefined now fails, whatever the baseline held.
    let dir = Dir::new("overflow-baseline");
    let values = fixture("overflow_values.csv");
    let mut audit = vec!["audit", values.as_str(), "--format", "json"];
    audit.extend(FAST);
    let base = dir.write("base.json", expect(&audit, 0).as_bytes());
    let gate = |spec: &str| {
        let mut args = vec![
            "gate",
            values.as_str(),
            "--baseline",
            &base,
            "--regress",
            spec,
        ];
        args.extend(FAST);
        expect(&args, if spec.starts_with("td") { 1 } else { 0 })
    };
    let out = gate("td:mse:10");
    assert!(out.contains("breaks  td mse"), "{out}");
    assert!(out.contains("undefined here and in the baseline"), "{out}");
    let out = gate("rtg:mse:10");
    assert!(out.contains("holds   rtg mse"), "{out}");
}
