//! Sweep checks: its end points against the audit (GAE paper identities) and the bias-variance
//! trade-off on a problem with a known critic error.

use super::*;
use crate::stats::mse::at_least_0;
use crate::testkit::{Lq, reader};

fn sweep(text: &str, over: Over, spec: &str, resamples: usize) -> SweepReport {
    sweep_at(text, over, spec, resamples, AuditConfig::default().gamma)
}

fn sweep_at(text: &str, over: Over, spec: &str, resamples: usize, gamma: f64) -> SweepReport {
    let audit = AuditConfig {
        gamma,
        resamples,
        splits: 10,
        ..AuditConfig::default()
    };
    let grid = parse_grid(over, spec, Estimator::RtgDiscounted, audit.gamma).unwrap();
    run(
        reader(text),
        &SweepConfig {
            audit,
            over,
            grid,
            family: Estimator::RtgDiscounted,
        },
    )
    .unwrap()
}

fn close(a: f64, b: f64) -> bool {
    (a - b).abs() <= 1e-9 * a.abs().max(b.abs()).max(1e-12)
}

// GAE paper (Schulman et al. 2015, eqs. 17-18): at lambda = 1 the sweep's point is gae:1 and
// at lambda = 0 it is td; with the same seed and resamples the figures match the audit's.
#[test]
fn end_points_equal_the_audits_gae_1_and_td() {
    let text = std::fs::read_to_string(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/demo-data/docking_rover.csv"
    ))
    .unwrap();
    let s = sweep(&text, Over::Lambda, "0,0.5,1", 400);
    let cfg = AuditConfig {
        resamples: 400,
        splits: 10,
        estimators: Some(Estimator::parse_list("td,gae:0.5,gae:1").unwrap()),
        ..AuditConfig::default()
    };
    let a = audit::run(reader(&text), &cfg).unwrap();
    let row = |name: &str| a.estimators.iter().find(|e| e.name == name).unwrap();
    for (point, name) in [
        (&s.points[0], "td"),
        (&s.points[1], "gae:0.5"),
        (&s.points[2], "gae:1"),
    ] {
        let r = row(name);
        assert!(
            close(point.variance.unwrap(), r.variance.unwrap()),
            "{name}: {} vs {}",
            point.variance.unwrap(),
            r.variance.unwrap()
        );
        assert!(close(point.bias_sq.unwrap(), r.bias_sq.unwrap()), "{name}");
        assert!(close(point.mse.unwrap(), r.mse.unwrap()), "{name}");
    }
}

// The trade-off stated in the GAE paper (Schulman et al. 2015, section 3): with an imperfect
// critic, small lambda is biased and low-variance, lambda = 1 unbiased and high-variance. On
// the LQ problem with a critic at 0.6 times the true value (testkit::Lq derives the true value
// in closed form), far from the optimal gain so the gradient is large, and gamma = 1 so that
// gae:1 is unbiased for the undiscounted reference: bias^2 must fall and variance rise as
// lambda goes from 0 to 1, and the MSE-minimising lambda lies strictly inside the grid.
#[test]
fn bias_falls_and_variance_rises_with_lambda() {
    let lq = Lq {
        k: -0.2,
        sigma: 0.5,
        h: 12,
    };
    let text = lq.log(1500, 0.6, 17);
    let s = sweep_at(&text, Over::Lambda, "0,0.25,0.5,0.75,0.9,1", 600, 1.0);
    let bias: Vec<f64> = s.points.iter().map(|p| p.bias_sq.unwrap()).collect();
    let var: Vec<f64> = s.points.iter().map(|p| p.variance.unwrap()).collect();
    for w in bias.windows(2).take(4) {
        assert!(w[0] > w[1], "bias^2 should fall with lambda: {bias:?}");
    }
    for w in var.windows(2) {
        assert!(w[0] < w[1], "variance should rise with lambda: {var:?}");
    }
    assert!(
        s.points[0].bias_detected,
        "a 40% critic error is a detectable bias"
    );
    let best = s.choice.best.unwrap();
    assert!(
        best > 0 && best < s.points.len() - 1,
        "interior optimum, got {best}: {:?}",
        s.points.iter().map(|p| p.mse.unwrap()).collect::<Vec<_>>()
    );
    assert!(s.choice.band.contains(&s.choice.recommended.unwrap()));
    assert!(
        s.choice.recommended.unwrap() >= best,
        "the recommendation leans to larger lambda"
    );
}

// Sweeping gamma keeps the reference undiscounted: at gamma = 1, rtg_discounted is rtg itself,
// so its bias is exactly 0 and its variance equals the reference's.
#[test]
fn gamma_sweep_keeps_an_undiscounted_reference() {
    let lq = Lq {
        k: -0.5,
        sigma: 0.5,
        h: 8,
    };
    let text = lq.log(400, 1.0, 3);
    let s = sweep(&text, Over::Gamma, "0.5,0.9,1", 300);
    let last = s.points.last().unwrap();
    assert_eq!(last.bias_sq.unwrap(), 0.0);
    assert!(s.points[0].bias_sq.unwrap() > 0.0);
    assert_eq!(s.settings.reference, "rtg");
}

#[test]
fn grids_parse_and_reject() {
    let g = parse_grid(Over::Lambda, "0:1:0.05", Estimator::RtgDiscounted, 0.99).unwrap();
    assert_eq!(g.len(), 21);
    assert_eq!(g[3].label, "0.15");
    assert_eq!(g[20].estimator, Estimator::Gae(1.0));
    let n = parse_grid(Over::Nstep, "8,1,full", Estimator::RtgDiscounted, 0.99).unwrap();
    assert_eq!(
        n.iter().map(|p| p.label.as_str()).collect::<Vec<_>>(),
        ["1", "8", "full"]
    );
    assert_eq!(n[2].estimator, Estimator::Gae(1.0));
    assert!(parse_grid(Over::Lambda, "0,1.5", Estimator::Rtg, 0.99).is_err());
    assert!(parse_grid(Over::Nstep, "0", Estimator::Rtg, 0.99).is_err());
    assert!(parse_grid(Over::Lambda, "1:0:0.1", Estimator::Rtg, 0.99).is_err());
    assert!(parse_grid(Over::Lambda, "0.5,0.5", Estimator::Rtg, 0.99).is_err());
}

// The stand-alone SVG is well-formed XML (parsed by roxmltree, a general-purpose XML library)
// holding the three series, the MSE interval as a band, the one-SE region, the recommended-point
// marker and a key naming each; it is the HTML page's drawing (the same elements) in a file of
// its own.
#[test]
fn svg_is_well_formed_and_complete() {
    let lq = Lq {
        k: -0.5,
        sigma: 0.5,
        h: 6,
    };
    let s = sweep(&lq.log(200, 0.7, 9), Over::Lambda, "0,0.5,1", 100);
    let svg = crate::report::svg::sweep_plot(&s).unwrap();
    let doc = roxmltree::Document::parse(&svg).expect("well-formed XML");
    let texts: Vec<&str> = doc
        .descendants()
        .filter_map(|n| n.text())
        .map(str::trim)
        .collect();
    for want in [
        "bias^2",
        "variance",
        "MSE",
        "MSE 95% interval",
        "within one standard error of the lowest MSE",
        "GAE lambda",
    ] {
        assert!(texts.contains(&want), "{want} in {texts:?}");
    }
    assert!(
        texts
            .iter()
            .any(|t| t.starts_with("recommended: lambda = "))
    );
    let class = |tag: &str, class: &str| {
        doc.descendants()
            .filter(|n| {
                n.has_tag_name(tag)
                    && n.attribute("class")
                        .is_some_and(|c| c.split(' ').any(|w| w == class))
            })
            .count()
    };
    // Three curves and their three key entries; a dot per point and series.
    assert_eq!(class("path", "line"), 3 + 3);
    assert_eq!(class("circle", "dot"), 3 * 3);
    // The MSE interval band over the three points, and its key swatch.
    assert!(s.points.iter().all(|p| p.mse_interval.is_some()));
    assert_eq!(class("polygon", "band"), 1);
    assert_eq!(class("rect", "band"), 1);
    // One column per point within one SE, plus the key's swatch; the marker and its key.
    assert_eq!(class("rect", "se"), s.choice.band.len() + 1);
    assert_eq!(class("circle", "rec"), 2);
    // The same drawing as the HTML page's.
    let page = crate::report::curves::sweep_svg(&s, crate::report::curves::Target::Page);
    let inner = |text: &str| {
        let d = roxmltree::Document::parse(text).unwrap();
        d.descendants()
            .find(|n| n.has_tag_name("polygon"))
            .and_then(|n| n.attribute("points"))
            .unwrap()
            .to_string()
    };
    assert_eq!(inner(&svg), inner(&page));
}

fn point(label: &str, value: f64, mse: Option<f64>, bias_sq: Option<f64>) -> SweepPoint {
    SweepPoint {
        label: label.into(),
        value: Some(value),
        estimator: format!("gae:{label}"),
        gamma: 0.99,
        bias_sq,
        bias_detected: false,
        variance: mse.zip(bias_sq).map(|(m, b)| m - b),
        mse,
        mse_se: mse.map(|_| 0.1),
        mse_interval: None,
        snr: None,
        ess: None,
        episodes_for_snr: None,
        bias_limited: false,
        notes: vec![],
    }
}

#[test]
fn sweep_overflowed_sums_do_not_panic() {
    // Every point undefined (sums beyond 1e308): no choice, instead of a panic in the band.
    let none = [point("0", 0.0, None, None), point("1", 1.0, None, None)];
    let c = choose(&none, Over::Lambda);
    assert_eq!((c.best, c.recommended), (None, None));
    assert!(c.band.is_empty());
    assert!(
        c.text.contains("no grid point has a defined MSE"),
        "{}",
        c.text
    );
    // Undefined points take no part; an MSE near f64::MAX whose band limit overflows to
    // infinity still gives a choice among the defined points.
    let mut some = [
        point("0", 0.0, None, None),
        point("0.5", 0.5, Some(f64::MAX), Some(1.0)),
        point("1", 1.0, Some(f64::MAX), Some(0.5)),
    ];
    some[1].mse_se = Some(f64::MAX); // limit = MAX + MAX = inf
    let c = choose(&some, Over::Lambda);
    assert_eq!(c.band, vec![1, 2]);
    assert_eq!(c.recommended, Some(2));
    assert!(
        c.text.contains("1 point(s) have no defined MSE"),
        "{}",
        c.text
    );
}

#[test]
fn grid_step_too_small_for_the_size_limit() {
    let family = Estimator::RtgDiscounted;
    for spec in ["0:1:1e-300", "0:1:5e-324", "0:1:0.00001"] {
        let e = parse_grid(Over::Lambda, spec, family, 0.99).unwrap_err();
        assert!(
            e.contains("too small") && e.contains("at most 10000"),
            "{e}"
        );
    }
    // The quoted smallest step is enough: 1.001e-4 gives 9991 points.
    assert_eq!(
        parse_grid(Over::Lambda, "0:1:1.001e-4", family, 0.99)
            .unwrap()
            .len(),
        9991
    );
}

#[test]
fn clamping_at_zero_keeps_an_overflow_visible() {
    assert_eq!(at_least_0(-2.0), 0.0);
    assert_eq!(at_least_0(3.0), 3.0);
    assert!(at_least_0(f64::NAN).is_nan());
    assert_eq!(at_least_0(f64::INFINITY), f64::INFINITY);
}
