//! `sweep`: formats, the plot file, and usage errors.

use crate::util::{Dir, demo, run, run_json, strings};

#[test]
fn lambda_sweep_in_every_format_with_a_plot() {
    let dir = Dir::new("sweep");
    let plot = dir.path("lambda.svg");
    let p = plot.to_str().unwrap();
    let rover = demo("docking_rover.csv");
    let base = [
        "sweep",
        rover.as_str(),
        "--over",
        "lambda",
        "--resamples",
        "200",
        "--splits",
        "10",
    ];
    let mut args = base.to_vec();
    args.extend(["--plot", p]);
    let (code, out, err) = run(&args);
    assert_eq!(code, 0, "{err}");
    assert!(out.contains("<- recommended"), "{out}");
    assert!(out.contains("choice: lowest MSE at lambda = "), "{out}");
    assert!(out.contains("(lambda; log scale;"), "{out}");
    let svg = std::fs::read_to_string(&plot).unwrap();
    roxmltree::Document::parse(&svg).expect("well-formed SVG");
    let mut json = base.to_vec();
    json.extend(["--format", "json"]);
    let (_, out, _) = run(&json);
    let v: serde_json::Value = serde_json::from_str(&out).unwrap();
    let points = v["points"].as_array().unwrap();
    assert_eq!(points.len(), 21);
    assert_eq!(points[20]["estimator"], "gae:1");
    let rec = v["choice"]["recommended"].as_u64().unwrap() as usize;
    assert!(
        v["choice"]["band"]
            .as_array()
            .unwrap()
            .iter()
            .any(|b| b.as_u64() == Some(rec as u64))
    );
    let mut csv = base.to_vec();
    csv.extend(["--format", "csv", "--grid", "0,0.5,1"]);
    let (_, out, _) = run(&csv);
    let mut r = csv::Reader::from_reader(out.as_bytes());
    assert_eq!(r.records().count(), 3);
    let mut md = base.to_vec();
    md.extend(["--format", "markdown"]);
    let (_, out, _) = run(&md);
    assert!(out.contains("**Choice:**"));
}

#[test]
fn nstep_and_gamma_sweeps() {
    let rover = demo("docking_rover.csv");
    let v = run_json(&[
        "sweep",
        &rover,
        "--over",
        "nstep",
        "--resamples",
        "100",
        "--format",
        "json",
    ]);
    let labels = strings(&v["points"], "label");
    assert_eq!(labels, ["1", "2", "4", "8", "16", "32", "64", "full"]);
    let diverter = demo("parcel_diverter.csv");
    let (code, out, err) = run(&["sweep", &diverter, "--over", "gamma", "--resamples", "100"]);
    assert_eq!(code, 0, "{err}");
    assert!(out.contains("estimator family rtg_discounted"), "{out}");
}

#[test]
fn sweep_usage_errors() {
    let diverter = demo("parcel_diverter.csv");
    let (code, _, err) = run(&["sweep", &diverter, "--over", "lambda"]);
    assert_eq!(code, 2);
    assert!(err.contains("needs the value column"), "{err}");
    let rover = demo("docking_rover.csv");
    for bad in [
        vec!["--over", "lambda", "--grid", "0,2"],
        vec!["--over", "nstep", "--grid", "0"],
        vec!["--over", "lambda", "--estimators", "rtg"],
        vec!["--over", "gamma", "--estimator", "whitened"],
        vec!["--over", "sideways"],
    ] {
        let mut args = vec!["sweep", rover.as_str()];
        args.extend(bad.iter().copied());
        let (code, _, err) = run(&args);
        assert_eq!(code, 2, "{bad:?}: {err}");
        assert!(!err.contains("panicked"), "{err}");
    }
}

#[test]
fn audit_plot_is_written() {
    let dir = Dir::new("auditplot");
    let plot = dir.path("bars.svg");
    let rover = demo("docking_rover.csv");
    let (code, _, err) = run(&[
        "audit",
        &rover,
        "--resamples",
        "100",
        "--plot",
        plot.to_str().unwrap(),
    ]);
    assert_eq!(code, 0, "{err}");
    let svg = std::fs::read_to_string(&plot).unwrap();
    let doc = roxmltree::Document::parse(&svg).expect("well-formed SVG");
    let texts: Vec<&str> = doc
        .descendants()
        .filter_map(|n| n.text())
        .map(str::trim)
        .collect();
    assert!(texts.contains(&"rtg (ref)"), "{texts:?}");
    assert!(texts.contains(&"variance"));
}
