//! Terminal table of an audit: header lines, warnings, one row per estimator, the verdict.

use super::AuditReport;
use super::columns::{COLUMNS, Cell};
use comfy_table::{Table, presets};

/// A number for people: 4 significant digits, scientific outside [1e-3, 1e5).
pub fn num(x: f64) -> String {
    if x == 0.0 {
        return "0".into();
    }
    if !x.is_finite() {
        return "n/a".into();
    }
    let a = x.abs();
    if (1e-3..1e5).contains(&a) {
        let digits = (3 - a.log10().floor() as i32).max(0) as usize;
        format!("{x:.digits$}")
    } else {
        format!("{x:.3e}")
    }
}

/// A cell for people; undefined figures show as a dash (their reason is in the notes).
pub fn cell_text(cell: Cell) -> String {
    match cell {
        Cell::Num(Some(x)) if x.is_finite() => num(x),
        Cell::Count(Some(n)) => n.to_string(),
        Cell::Num(_) | Cell::Count(None) => "-".into(),
        Cell::Text(t) => t,
    }
}

/// The lines above the table: what was audited and how.
pub fn preamble(r: &AuditReport) -> Vec<String> {
    let i = &r.input;
    let s = &r.settings;
    vec![
        format!("gradaudit audit of {}", i.file),
        format!(
            "  {} episodes, {} steps ({} terminated, {} truncated), score dimension {} (from {})",
            i.episodes, i.steps, i.terminated, i.truncated, i.score_dim, i.scores_from
        ),
        format!(
            "  gamma {}, {} resamples{}, seed {}, reference {}, {}% intervals, target snr {}",
            s.gamma,
            s.resamples,
            if s.resampling == "poisson" {
                " (Poisson weights)"
            } else {
                ""
            },
            s.seed,
            s.reference,
            s.confidence * 100.0,
            s.target_snr
        ),
    ]
}

pub fn render(r: &AuditReport) -> String {
    let mut out = preamble(r).join("\n");
    out.push('\n');
    if let Some(sk) = &r.input.sketch {
        out.push_str(&format!("note: {}\n", sk.note));
    }
    if let Some(line) = critic_line(&r.input.critic) {
        out.push_str(&format!("{line}\n"));
    }
    if !r.warnings.is_empty() {
        out.push_str("warnings:\n");
        for line in r.warnings.lines() {
            out.push_str(&format!("  - {line}\n"));
        }
    }
    let mut table = Table::new();
    table.load_style(presets::UTF8_BORDERS_ONLY);
    table.set_header(COLUMNS.iter().map(|c| c.title));
    for row in &r.estimators {
        table.add_row(COLUMNS.iter().map(|c| cell_text((c.cell)(row))));
    }
    out.push_str(&table.to_string());
    out.push('\n');
    for row in r.estimators.iter().filter(|row| !row.notes.is_empty()) {
        for note in &row.notes {
            out.push_str(&format!("note ({}): {note}\n", row.name));
        }
    }
    if let Some(line) = bias_legend(r) {
        out.push_str(&line);
        out.push('\n');
    }
    for s in &r.skipped {
        out.push_str(&format!("skipped {}: {}\n", s.name, s.reason));
    }
    out.push_str(&format!("verdict: {}\n", r.verdict.text));
    out
}

/// Explains the '?' marker: which biases resampling noise could explain, with their z.
pub fn bias_legend(r: &AuditReport) -> Option<String> {
    let unsure: Vec<String> = r
        .estimators
        .iter()
        .filter(|e| e.bias_sq.is_some_and(|b| b > 0.0) && !e.bias_detected)
        .map(|e| format!("{} {:.1}", e.name, e.bias_z.unwrap_or(0.0)))
        .collect();
    (!unsure.is_empty()).then(|| {
        format!(
            "?: bias^2 within resampling noise (z < {}), it may be zero; z: {}",
            crate::stats::BIAS_Z,
            unsure.join(", ")
        )
    })
}

/// One line on the critics' quality, when there is a critic.
pub fn critic_line(c: &crate::critic::CriticQuality) -> Option<String> {
    // An explained variance of -inf (a critic whose errors overflowed) is undefined too.
    let ev = |x: Option<f64>| {
        x.filter(|v| v.is_finite())
            .map_or("undefined".to_string(), |v| format!("{v:.3}"))
    };
    match (c.recorded_explained_variance, c.fitted_folds) {
        (None, None) => None,
        (rec, None) => Some(format!(
            "critic: recorded values explain {} of the return variance",
            ev(rec)
        )),
        (rec, Some(k)) => Some(format!(
            "critic: fitted by {k}-fold cross-fitted ridge regression on {} features, explained \
             variance {}{}",
            c.fitted_features.unwrap_or(0),
            ev(c.fitted_explained_variance),
            rec.map_or(String::new(), |r| format!(
                " (the recorded critic, ignored: {})",
                ev(Some(r))
            ))
        )),
    }
}
