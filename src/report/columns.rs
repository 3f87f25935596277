//! The estimator table's columns, defined once for the terminal table, Markdown and CSV.

use super::EstimatorRow;

/// One cell: a number (None when undefined) or text.
pub enum Cell {
    Num(Option<f64>),
    Count(Option<u64>),
    Text(String),
}

pub struct Column {
    /// Header in the table and Markdown.
    pub title: &'static str,
    /// Header in CSV (machine-friendly).
    pub key: &'static str,
    pub cell: fn(&EstimatorRow) -> Cell,
}

pub const COLUMNS: &[Column] = &[
    Column {
        title: "estimator",
        key: "estimator",
        cell: |r| {
            Cell::Text(if r.reference {
                format!("{} (ref)", r.name)
            } else {
                r.name.clone()
            })
        },
    },
    Column {
        title: "mse",
        key: "mse",
        cell: |r| Cell::Num(r.mse),
    },
    Column {
        title: "bias^2",
        key: "bias_sq",
        cell: |r| {
            // A bias that resampling noise could explain is marked with '?' (see the legend).
            match r.bias_sq {
                Some(b) if b > 0.0 && !r.bias_detected => {
                    Cell::Text(format!("{}?", super::table::num(b)))
                }
                b => Cell::Num(b),
            }
        },
    },
    Column {
        title: "variance",
        key: "variance",
        cell: |r| Cell::Num(r.variance),
    },
    Column {
        title: "snr",
        key: "snr",
        cell: |r| Cell::Num(r.snr),
    },
    Column {
        title: "ess",
        key: "ess",
        cell: |r| Cell::Num(r.ess),
    },
    Column {
        title: "cos_half",
        key: "cosine_half",
        cell: |r| Cell::Num(r.cosine_half),
    },
    Column {
        title: "episodes@snr",
        key: "episodes_for_snr",
        cell: |r| {
            if r.bias_limited {
                Cell::Text("bias-limited".into())
            } else {
                Cell::Count(r.episodes_for_snr)
            }
        },
    },
    Column {
        title: "|g|",
        key: "gradient_norm",
        cell: |r| Cell::Num(r.gradient_norm),
    },
    Column {
        title: "|g| low",
        key: "gradient_norm_low",
        cell: |r| Cell::Num(r.gradient_norm_interval.map(|i| i.low)),
    },
    Column {
        title: "|g| high",
        key: "gradient_norm_high",
        cell: |r| Cell::Num(r.gradient_norm_interval.map(|i| i.high)),
    },
];
