//! Exporter tests on a small hand-built report.

use super::table::num;

#[test]
fn numbers_keep_four_significant_digits() {
    assert_eq!(num(0.0), "0");
    assert_eq!(num(1234.5678), "1235");
    assert_eq!(num(0.012344), "0.01234");
    assert_eq!(num(12.0), "12.00");
    assert_eq!(num(123456.0), "1.235e5");
    assert_eq!(num(-2.5e-7), "-2.500e-7");
}

use super::{EstimatorRow, ReferenceFigures, Verdict, sort_rows};
use crate::stats::{EstimatorStats, Interval, Signal};

const UNIT: Interval = Interval {
    low: 0.5,
    high: 2.0,
};

/// Statistics of a well-behaved estimator: gradient (1, 1), variance 1, bias^2 0.5.
fn stats() -> EstimatorStats {
    EstimatorStats {
        gradient: vec![1.0, 1.0],
        gradient_norm: 2f64.sqrt(),
        gradient_norm_interval: UNIT,
        variance: 1.0,
        bias_sq: 0.5,
        bias_sq_interval: UNIT,
        bias_z: Some(3.0),
        bias_p: Some(0.001),
        bias_p_adjusted: Some(0.004),
        repeats_a_test: false,
        bias_detected: true,
        bias_norm_interval: UNIT,
        mse: 1.5,
        snr: Some(2.0),
        ess: Some(10.0),
        cosine_half: Some(0.5),
        cosine_half_interval: Some(UNIT),
        episodes_for_snr: Some(4),
        bias_limited: false,
        noise_scale: Some(3.0),
        notes: vec![],
        per_coord: None,
    }
}

fn signal() -> Signal {
    Signal {
        signal: 3.0,
        signal_interval: UNIT,
        reference_variance: 1.0,
        per_coord: None,
    }
}

/// What the statistics made of sums that overflowed: an infinite gradient, a NaN variance, and
/// max(NaN, 0) = 0 for bias_sq with the "zero error" notes that follow from it.
fn overflowed() -> EstimatorStats {
    EstimatorStats {
        gradient: vec![f64::INFINITY, 1.0],
        gradient_norm: f64::INFINITY,
        variance: f64::NAN,
        bias_sq: 0.0,
        mse: f64::NAN,
        snr: None,
        ess: None,
        episodes_for_snr: Some(1),
        notes: vec![
            "snr and ess undefined: this estimator's gradient has zero error (it is constant \
             across resamples and equal to the reference)"
                .into(),
        ],
        ..stats()
    }
}

#[test]
fn row_derived_from_overflowed_figures_is_undefined() {
    let refs = ReferenceFigures::of(&stats(), &signal());
    assert!(refs.defined);
    let row = EstimatorRow::new("td".into(), false, overflowed(), &refs);
    assert_eq!(
        (row.gradient.clone(), row.variance, row.bias_sq, row.mse),
        (None, None, None, None)
    );
    assert_eq!((row.episodes_for_snr, row.snr, row.ess), (None, None, None));
    assert!(!row.bias_detected && !row.bias_limited);
    assert!(row.bias_z.is_none() && row.bias_sq_interval.is_none());
    assert!(
        !row.notes.iter().any(|n| n.contains("zero error")),
        "{:?}",
        row.notes
    );
    assert!(row.notes.iter().any(|n| n.contains("overflowed")));
    // The JSON has nulls, never a number derived from the overflow.
    let json = serde_json::to_value(&row).unwrap();
    assert!(json["bias_sq"].is_null() && json["episodes_for_snr"].is_null());
}

#[test]
fn an_overflowed_reference_leaves_only_an_estimators_own_figures() {
    let refs = ReferenceFigures::of(&overflowed(), &signal());
    assert!(!refs.defined && refs.signal.is_none() && refs.variance.is_none());
    let row = EstimatorRow::new("rtg".into(), false, stats(), &refs);
    // Its own gradient and spread stand; the bias against the reference and all that follows
    // from it (mse, snr, ess, planning) do not.
    assert_eq!(row.variance, Some(1.0));
    assert_eq!(row.gradient, Some(vec![1.0, 1.0]));
    assert_eq!((row.bias_sq, row.mse, row.snr), (None, None, None));
    assert_eq!((row.ess, row.episodes_for_snr), (None, None));
    assert_eq!(row.cosine_half, Some(0.5));
}

#[test]
fn verdict_without_a_defined_mse_says_so() {
    let refs = ReferenceFigures::of(&overflowed(), &signal());
    let mut rows = vec![
        EstimatorRow::new("b".into(), false, overflowed(), &refs),
        EstimatorRow::new("a".into(), true, overflowed(), &refs),
    ];
    sort_rows(&mut rows);
    let v = Verdict::from_rows(&rows, refs.signal);
    assert_eq!((v.best, v.dominated_by), (None, None));
    assert!(
        v.text.contains("no estimator has a defined MSE"),
        "{}",
        v.text
    );
    assert!(!v.text.contains('%'), "{}", v.text);
}

#[test]
fn rows_with_undefined_mse_sort_last_and_zero_mse_is_not_a_share() {
    let refs = ReferenceFigures::of(&stats(), &signal());
    let zero = EstimatorStats {
        variance: 0.0,
        bias_sq: 0.0,
        mse: 0.0,
        snr: None,
        ..stats()
    };
    let mut rows = vec![
        EstimatorRow::new("broken".into(), false, overflowed(), &refs),
        EstimatorRow::new("fine".into(), false, stats(), &refs),
        EstimatorRow::new("exact".into(), false, zero, &refs),
    ];
    sort_rows(&mut rows);
    let names: Vec<&str> = rows.iter().map(|r| r.name.as_str()).collect();
    assert_eq!(names, ["exact", "fine", "broken"]);
    let v = Verdict::from_rows(&rows, refs.signal);
    assert_eq!(v.best.as_deref(), Some("exact"));
    assert!(!v.text.contains("% of its MSE"), "{}", v.text);
    assert!(v.text.contains("MSE 0"), "{}", v.text);
    // Without the zero row: fine is variance-dominated, 1 / 1.5 = 67% of its MSE.
    let v = Verdict::from_rows(&rows[1..], refs.signal);
    assert!(
        v.text.contains("variance-dominated, 67% of its MSE"),
        "{}",
        v.text
    );
}

#[test]
fn csv_cells_of_non_finite_figures_are_empty() {
    assert_eq!(super::finite_cell(Some(f64::NAN)), "");
    assert_eq!(super::finite_cell(Some(f64::NEG_INFINITY)), "");
    assert_eq!(super::finite_cell(None), "");
    assert_eq!(super::finite_cell(Some(0.25)), "0.25");
    assert_eq!(
        super::table::cell_text(super::columns::Cell::Num(Some(f64::INFINITY))),
        "-"
    );
}

#[test]
fn a_saturated_batch_size_is_undefined() {
    // 1e310 episodes saturate to u64::MAX in the statistics: not a batch size to report.
    let refs = ReferenceFigures::of(&stats(), &signal());
    let huge = EstimatorStats {
        episodes_for_snr: Some(u64::MAX),
        ..stats()
    };
    let row = EstimatorRow::new("rtg".into(), false, huge, &refs);
    assert_eq!(row.episodes_for_snr, None);
    assert!(
        row.notes
            .iter()
            .any(|n| n.starts_with("episodes_for_snr undefined"))
    );
    let row = EstimatorRow::new("rtg".into(), false, stats(), &refs);
    assert_eq!(row.episodes_for_snr, Some(4));
}
