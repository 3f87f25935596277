//! Terminal table of an audit: header lines, warnings, one row per estimator, the verdict.

use super::AuditReport;
use super::columns::{COLUMNS, Cell, Column};
use super::groups::{Group, groups};
use super::layout::{Align, Grid, WIDTH, wrap};

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
        format!("gradaudit {}", subject(i, str::to_string)),
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

/// What a report is of, after "gradaudit ": `audit of LOG`, or for a merge `merge of N
/// shards (A, B) of LOGS`; `name` formats each file name (plain text, or HTML code).
pub fn subject(i: &super::InputSummary, name: impl Fn(&str) -> String) -> String {
    if i.shards.is_empty() {
        return format!("audit of {}", name(&i.file));
    }
    let shards: Vec<String> = i.shards.iter().map(|s| name(&s.shard)).collect();
    let mut logs: Vec<String> = Vec::new();
    for s in &i.shards {
        let log = name(&s.log);
        if !logs.contains(&log) {
            logs.push(log);
        }
    }
    let n = shards.len();
    format!(
        "merge of {n} shard{} ({}) of {}",
        if n == 1 { "" } else { "s" },
        few(&shards),
        few(&logs)
    )
}

/// Up to three names in full; more as the first and the last.
fn few(names: &[String]) -> String {
    match names {
        [a, _, _, _, ..] => format!("{a} .. {}", names[names.len() - 1]),
        _ => names.join(", "),
    }
}

pub fn render(r: &AuditReport) -> String {
    render_with(r, false)
}

/// Interval ends not in the main column list, shown in the interval block and the wide table.
const INTERVALS: &[Column] = &[
    Column {
        title: "|g-g_ref| low",
        key: "bias_norm_low",
        cell: |r| Cell::Num(r.bias_norm_interval.map(|i| i.low)),
    },
    Column {
        title: "|g-g_ref| high",
        key: "bias_norm_high",
        cell: |r| Cell::Num(r.bias_norm_interval.map(|i| i.high)),
    },
    Column {
        title: "cos_half low",
        key: "cosine_half_low",
        cell: |r| Cell::Num(r.cosine_half_interval.map(|i| i.low)),
    },
    Column {
        title: "cos_half high",
        key: "cosine_half_high",
        cell: |r| Cell::Num(r.cosine_half_interval.map(|i| i.high)),
    },
];

/// Whether a column holds an interval end (it goes to the interval block by default).
fn is_interval(c: &Column) -> bool {
    c.key.ends_with("_low") || c.key.ends_with("_high")
}

/// One table of the given columns, a row per group of identical estimators.
fn grid(groups: &[Group], columns: &[&Column]) -> String {
    let headers = columns.iter().map(|c| c.title.to_string()).collect();
    let aligns = columns
        .iter()
        .map(|c| {
            if c.key == "estimator" {
                Align::Left
            } else {
                Align::Number
            }
        })
        .collect();
    let rows = groups
        .iter()
        .map(|g| {
            columns
                .iter()
                .map(|c| {
                    if c.key == "estimator" {
                        g.label()
                    } else {
                        cell_text((c.cell)(g.first()))
                    }
                })
                .collect()
        })
        .collect();
    Grid {
        headers,
        aligns,
        rows,
    }
    .render()
}

/// The terminal report. By default the table fits 100 columns: the figures first, the interval
/// ends in a second block below; `wide` puts every column in one table.
pub fn render_with(r: &AuditReport, wide: bool) -> String {
    let mut out: String = preamble(r).iter().map(|l| wrap(l, WIDTH, "    ")).collect();
    if let Some(sk) = &r.input.sketch {
        out.push_str(&wrap(&format!("note: {}", sk.note), WIDTH, "  "));
    }
    if let Some(line) = critic_line(&r.input.critic) {
        out.push_str(&wrap(&line, WIDTH, "  "));
    }
    if let Some(v) = &r.input.value_net {
        out.push_str(&wrap(
            &format!(
                "value network {} (explains {} of the return variance): {}",
                v.file,
                value_net_share(v),
                v.note
            ),
            WIDTH,
            "  ",
        ));
    }
    if !r.warnings.is_empty() {
        out.push_str("warnings:\n");
        for line in r.warnings.lines() {
            out.push_str(&wrap(&format!("  - {line}"), WIDTH, "    "));
        }
    }
    let groups = groups(r);
    let all: Vec<&Column> = COLUMNS.iter().chain(INTERVALS).collect();
    out.push('\n');
    if wide {
        out.push_str(&grid(&groups, &all));
    } else {
        let main: Vec<&Column> = COLUMNS.iter().filter(|c| !is_interval(c)).collect();
        out.push_str(&grid(&groups, &main));
        let ends: Vec<&Column> = std::iter::once(&COLUMNS[0])
            .chain(all.iter().copied().filter(|c| is_interval(c)))
            .collect();
        // Streamed (Poisson) and merged audits keep no per-episode rows for the jackknife, so
        // their cosine_half interval is the spread of the split cosines (src/audit/cosine.rs).
        let cos = if r.settings.resampling == "poisson" {
            "spread of the split cosines"
        } else {
            "episode jackknife"
        };
        out.push_str(&format!(
            "\n{}% intervals (bootstrap; cos_half: {cos}; --wide puts them in the table above):\n",
            r.settings.confidence * 100.0
        ));
        out.push_str(&grid(&groups, &ends));
    }
    out.push('\n');
    for g in groups.iter().filter(|g| !g.first().notes.is_empty()) {
        for note in &g.first().notes {
            out.push_str(&wrap(&format!("note ({}): {note}", g.names()), WIDTH, "  "));
        }
    }
    for line in super::significance::lines(r) {
        out.push_str(&wrap(&line, WIDTH, "  "));
    }
    // Estimators skipped for the same reason on one line (a log without a critic skips ten).
    let mut reasons: Vec<(&str, Vec<&str>)> = Vec::new();
    for s in &r.skipped {
        match reasons.iter_mut().find(|(why, _)| *why == s.reason) {
            Some((_, names)) => names.push(&s.name),
            None => reasons.push((&s.reason, vec![&s.name])),
        }
    }
    for (why, names) in reasons {
        let line = format!("skipped {}: {why}", names.join(", "));
        out.push_str(&wrap(&line, WIDTH, "  "));
    }
    out.push_str(&wrap(&format!("verdict: {}", r.verdict.text), WIDTH, "  "));
    out
}

/// One line on the critics' quality, when there is a critic.
/// The share of the return variance a value network explains (`--value-net`), three
/// decimals, or "an undefined share": the same figure in every format.
pub fn value_net_share(v: &crate::critic::net::ValueNetSummary) -> String {
    v.explained_variance
        .filter(|x| x.is_finite())
        .map_or("an undefined share".to_string(), |x| format!("{x:.3}"))
}

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
