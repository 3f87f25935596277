//! Issue 14: the bias test's p-values and table-wide decisions in the JSON report, and the
//! gradient noise scale's identity with episodes_for_snr.

use crate::util::{demo, run, run_json};

// McCandlish et al. (2018, eq. 2.9): B_simple = tr(Sigma) / |G|^2 = N V / signal; at target
// snr 1 an unbiased estimator's episodes_for_snr = N V / (signal - 0) is the same expression,
// rounded up (stats/noise.rs). Checked to 1e-12 against the report's own figures.
#[test]
fn noise_scale_equals_episodes_for_snr_at_target_one() {
    let v = run_json(&[
        "audit",
        &demo("docking_rover.csv"),
        "--resamples",
        "300",
        "--target-snr",
        "1",
        "--format",
        "json",
    ]);
    let n = v["input"]["episodes"].as_f64().unwrap();
    let signal = v["signal"].as_f64().unwrap();
    let mut checked = 0;
    for row in v["estimators"].as_array().unwrap() {
        let ns = row["noise_scale"].as_f64().unwrap();
        let want = n * row["variance"].as_f64().unwrap() / signal;
        assert!(
            (ns / want - 1.0).abs() < 1e-12,
            "{}: {ns} vs {want}",
            row["name"]
        );
        if row["bias_sq"].as_f64() == Some(0.0) {
            let planned = row["episodes_for_snr"].as_u64().unwrap();
            assert_eq!(planned, (ns.ceil() as u64).max(1), "{}", row["name"]);
            checked += 1;
        }
    }
    assert!(
        checked >= 2,
        "the reference and at least one more unbiased row"
    );
    let reference = &v["noise_scale"][0];
    assert_eq!(reference["role"], "reference");
    let iv = &reference["episodes_interval"];
    assert!(iv["low"].as_f64().unwrap() <= reference["episodes"].as_f64().unwrap());
}

// Holm (1979): adjusted p >= raw p, and detection follows the adjusted value at the level.
#[test]
fn json_keeps_raw_and_adjusted_p_values() {
    for method in ["holm", "bh"] {
        let v = run_json(&[
            "audit",
            &demo("docking_rover.csv"),
            "--resamples",
            "300",
            "--multiplicity",
            method,
            "--format",
            "json",
        ]);
        let sig = &v["significance"];
        assert_eq!(sig["multiplicity"], method);
        let level = sig["level"].as_f64().unwrap();
        let mut tested = 0;
        for row in v["estimators"].as_array().unwrap() {
            if row["reference"] == true {
                assert!(row["bias_p"].is_null());
                continue;
            }
            let (p, adj) = (
                row["bias_p"].as_f64().unwrap(),
                row["bias_p_adjusted"].as_f64().unwrap(),
            );
            assert!(p > 0.0 && p <= adj && adj <= 1.0, "{}", row["name"]);
            let expect = adj <= level && row["bias_sq"].as_f64().unwrap() > 0.0;
            assert_eq!(row["bias_detected"], expect, "{}", row["name"]);
            tested += 1;
        }
        assert_eq!(sig["tested"], tested);
    }
}

// Every human and machine format carries the decision procedure, the p-values and the noise
// scale: the HTML page has a Significance section and adjusted p-values under the biases, the
// CSV has the p-value columns and the procedure, the Markdown the same lines as the table.
#[test]
fn every_format_says_how_biases_were_decided() {
    let rover = demo("docking_rover.csv");
    let args = ["audit", rover.as_str(), "--resamples", "300", "--format"];
    let fmt = |f: &str| {
        let (code, out, err) = run(&[&args[..], &[f]].concat());
        assert_eq!(code, 0, "{err}");
        out
    };
    let html = fmt("html");
    assert!(
        html.contains("<section id=\"significance\">"),
        "no Significance section"
    );
    assert!(html.contains("Holm family-wise error rate controlled at 0.05"));
    assert!(html.contains("adj. p ") && html.contains("noise scale (reference rtg)"));
    let csv = fmt("csv");
    let header: Vec<&str> = csv.lines().next().unwrap().split(',').collect();
    for col in ["bias_p", "bias_p_adjusted", "bias_control", "noise_scale"] {
        assert!(header.contains(&col), "{col} in {header:?}");
    }
    let control = header.iter().position(|h| *h == "bias_control").unwrap();
    for line in csv.lines().skip(1) {
        assert_eq!(line.split(',').nth(control), Some("holm@0.05"), "{line}");
    }
    let md = fmt("markdown");
    for line in [
        "- bias test: bootstrap null",
        "- noise scale (reference rtg)",
        "- baseline: ",
    ] {
        assert!(md.contains(line), "{line}");
    }
}

// The gate's mse end read at the interval (gate::pessimistic, README "Coverage of the
// intervals"): the larger of the row's mse interval high end and bias_sq's upper end (itself
// the larger of its percentile and its stats/mse.rs ends) plus the variance. Only a gate rule
// read at the interval end asks for those ends; with --resampling poisson they cannot be
// formed and the report says so instead of passing on optimistic ends silently.
#[test]
fn gate_mse_end_comes_from_the_rows_interval_ends() {
    let rover = demo("docking_rover.csv");
    let args = |extra: &[&'static str]| {
        let mut a = vec!["gate", rover.as_str(), "--require", "td:mse<=1e9@interval"];
        a.extend_from_slice(&["--resamples", "300", "--format", "json"]);
        a.extend_from_slice(extra);
        a
    };
    let v = run_json(&args(&[]));
    let row = v["audit"]["estimators"]
        .as_array()
        .unwrap()
        .iter()
        .find(|r| r["name"] == "td")
        .unwrap();
    let f = |x: &serde_json::Value| x.as_f64().expect("a number");
    let b_hi = f(&row["bias_sq_interval"]["high"]).max(f(&row["bias_sq_upper"]));
    let want = f(&row["mse_interval"]["high"]).max(b_hi + f(&row["variance"]));
    let measured = f(&v["outcomes"][0]["measured"]);
    assert!(
        (measured - want).abs() <= 1e-12 * want,
        "{measured} vs {want}"
    );
    assert!(measured > f(&row["mse"]));
    let warned = |v: &serde_json::Value| {
        v["audit"]["warnings"]
            .to_string()
            .contains("percentile_interval_ends")
    };
    assert!(!warned(&v));
    let p = run_json(&args(&["--resampling", "poisson"]));
    assert!(warned(&p), "{}", p["audit"]["warnings"]);
    assert!(p["audit"]["estimators"][0].get("mse_interval").is_none());
}
