//! Rendering of a sweep: a terminal table with a compact log-scale chart of the three curves,
//! CSV, Markdown and JSON.

use super::layout::{Align, Grid, WIDTH, wrap};
use super::table::num;
use crate::sweep::{SweepPoint, SweepReport};

const HEADERS: [&str; 11] = [
    "point",
    "estimator",
    "bias^2",
    "variance",
    "mse",
    "mse low",
    "mse high",
    "snr",
    "ess",
    "episodes@snr",
    "",
];

/// A figure for people: a dash where undefined or not finite.
fn figure(x: Option<f64>) -> String {
    x.filter(|v| v.is_finite()).map_or("-".into(), num)
}

fn cells(r: &SweepReport, i: usize, p: &SweepPoint) -> Vec<String> {
    let mark = if r.choice.recommended == Some(i) {
        "<- recommended"
    } else if r.choice.best == Some(i) {
        "<- min mse"
    } else if r.choice.band.contains(&i) {
        "within 1 se"
    } else {
        ""
    };
    vec![
        p.label.clone(),
        p.estimator.clone(),
        match p.bias_sq {
            Some(b) if b > 0.0 && !p.bias_detected => format!("{}?", num(b)),
            b => figure(b),
        },
        figure(p.variance),
        figure(p.mse),
        figure(p.mse_interval.map(|i| i.low)),
        figure(p.mse_interval.map(|i| i.high)),
        figure(p.snr),
        figure(p.ess),
        if p.bias_limited {
            "bias-limited".into()
        } else {
            p.episodes_for_snr.map_or("-".into(), |n| n.to_string())
        },
        mark.into(),
    ]
}

fn preamble(r: &SweepReport) -> Vec<String> {
    let s = &r.settings;
    vec![
        format!("gradaudit sweep of {} over {}", r.input.file, s.over.key()),
        format!(
            "  {} episodes, {} steps, score dimension {}; estimator family {}",
            r.input.episodes, r.input.steps, r.input.score_dim, s.family
        ),
        format!(
            "  gamma {}, {} resamples (shared by every point), seed {}, reference {}, {}% intervals, target snr {}",
            s.gamma,
            s.resamples,
            s.seed,
            s.reference,
            s.confidence * 100.0,
            s.target_snr
        ),
    ]
}

pub fn render_table(r: &SweepReport) -> String {
    render_table_with(r, false)
}

/// The terminal report; by default within 100 columns (the estimator column, which the point
/// and the family in the preamble already say, is shown with `wide`).
pub fn render_table_with(r: &SweepReport, wide: bool) -> String {
    let mut out: String = preamble(r).iter().map(|l| wrap(l, WIDTH, "    ")).collect();
    for line in r.warnings.lines() {
        out.push_str(&wrap(&format!("warning: {line}"), WIDTH, "  "));
    }
    let shown: Vec<usize> = (0..HEADERS.len()).filter(|&j| wide || j != 1).collect();
    let mut headers: Vec<String> = shown.iter().map(|&j| HEADERS[j].to_string()).collect();
    if let Some(last) = headers.last_mut() {
        *last = "mark".into();
    }
    let grid = Grid {
        headers,
        aligns: shown
            .iter()
            .map(|&j| {
                if j < 2 || j == HEADERS.len() - 1 {
                    Align::Left
                } else {
                    Align::Number
                }
            })
            .collect(),
        rows: r
            .points
            .iter()
            .enumerate()
            .map(|(i, p)| {
                let c = cells(r, i, p);
                shown.iter().map(|&j| c[j].clone()).collect()
            })
            .collect(),
    };
    out.push('\n');
    out.push_str(&grid.render());
    out.push('\n');
    out.push_str(&chart(r));
    if r.points
        .iter()
        .any(|p| p.bias_sq.is_some_and(|b| b > 0.0) && !p.bias_detected)
    {
        out.push_str("?: bias^2 within resampling noise (z < 2): it may be zero\n");
    }
    out.push_str(&wrap(&format!("choice: {}", r.choice.text), WIDTH, "  "));
    out
}

/// A small text chart, log10 scale: b = bias^2, v = variance, m = mse (m wins where marks
/// coincide), * the recommended point's mse. Zero values sit on the bottom row; undefined ones
/// are not drawn.
pub fn chart(r: &SweepReport) -> String {
    const ROWS: usize = 10;
    let series: Vec<[Option<f64>; 3]> = r
        .points
        .iter()
        .map(|p| [p.bias_sq, p.variance, p.mse].map(|x| x.filter(|v| v.is_finite())))
        .collect();
    let positive: Vec<f64> = series
        .iter()
        .flatten()
        .flatten()
        .copied()
        .filter(|x| *x > 0.0)
        .collect();
    if series.iter().flatten().all(Option::is_none) {
        return String::from("(chart: every figure is undefined)\n");
    }
    if positive.is_empty() {
        return String::from("(chart: every figure is zero)\n");
    }
    let lo = positive
        .iter()
        .copied()
        .fold(f64::INFINITY, f64::min)
        .log10();
    let hi = positive
        .iter()
        .copied()
        .fold(f64::NEG_INFINITY, f64::max)
        .log10();
    let span = (hi - lo).max(1e-9);
    // Positive values take rows 0..ROWS-1; zeros get a row of their own below.
    let row_of = |x: f64| -> usize {
        if x <= 0.0 {
            return ROWS;
        }
        let f = (hi - x.log10()) / span;
        ((f * (ROWS - 1) as f64).round() as usize).min(ROWS - 1)
    };
    // Three characters per point, fewer on long grids, so the chart stays within 100 columns.
    let width = (87 / series.len().max(1)).clamp(1, 3);
    let mut grid = vec![vec![' '; series.len() * width]; ROWS + 1];
    for (i, s) in series.iter().enumerate() {
        for (j, mark) in [(0, 'b'), (1, 'v'), (2, 'm')] {
            if let Some(x) = s[j] {
                grid[row_of(x)][i * width + width / 2] = mark;
            }
        }
    }
    if let Some(rec) = r.choice.recommended
        && let Some(m) = series[rec][2]
    {
        grid[row_of(m)][rec * width + width / 2] = '*';
    }
    let mut out = String::new();
    for (i, row) in grid.iter().enumerate() {
        let label = if i == 0 {
            format!("{:>9}", num(10f64.powf(hi)))
        } else if i == ROWS - 1 {
            format!("{:>9}", num(10f64.powf(lo)))
        } else if i == ROWS {
            format!("{:>9}", "0")
        } else {
            " ".repeat(9)
        };
        out.push_str(&format!(
            "{label} |{}\n",
            row.iter().collect::<String>().trim_end()
        ));
    }
    out.push_str(&format!(
        "{} +{}\n",
        " ".repeat(9),
        "-".repeat(series.len() * width)
    ));
    let first = &r.points[0].label;
    let last = &r.points[r.points.len() - 1].label;
    let gap = (series.len() * width)
        .saturating_sub(first.len() + last.len())
        .max(1);
    out.push_str(&format!(
        "{}  {first}{}{last}\n{}  ({}; log scale; b bias^2, v variance, m mse, * recommended)\n",
        " ".repeat(9),
        " ".repeat(gap),
        " ".repeat(9),
        r.settings.over.key()
    ));
    out
}

pub fn render_csv(r: &SweepReport) -> String {
    let mut w = csv::Writer::from_writer(Vec::new());
    w.write_record([
        "point",
        "value",
        "estimator",
        "gamma",
        "bias_sq",
        "bias_detected",
        "variance",
        "mse",
        "mse_se",
        "mse_low",
        "mse_high",
        "snr",
        "ess",
        "episodes_for_snr",
        "bias_limited",
        "best",
        "within_one_se",
        "recommended",
    ])
    .expect("writing to memory");
    let opt = super::finite_cell;
    for (i, p) in r.points.iter().enumerate() {
        w.write_record([
            p.label.clone(),
            opt(p.value),
            p.estimator.clone(),
            p.gamma.to_string(),
            opt(p.bias_sq),
            p.bias_detected.to_string(),
            opt(p.variance),
            opt(p.mse),
            opt(p.mse_se),
            opt(p.mse_interval.map(|i| i.low)),
            opt(p.mse_interval.map(|i| i.high)),
            opt(p.snr),
            opt(p.ess),
            p.episodes_for_snr.map_or(String::new(), |n| n.to_string()),
            p.bias_limited.to_string(),
            (r.choice.best == Some(i)).to_string(),
            r.choice.band.contains(&i).to_string(),
            (r.choice.recommended == Some(i)).to_string(),
        ])
        .expect("writing to memory");
    }
    String::from_utf8(w.into_inner().expect("in-memory writer")).expect("UTF-8")
}

pub fn render_markdown(r: &SweepReport) -> String {
    let pre = preamble(r);
    let mut out = format!("### {}\n\n", pre[0]);
    for l in &pre[1..] {
        out.push_str(&format!("- {}\n", l.trim()));
    }
    let mut headers = HEADERS.to_vec();
    headers[10] = "mark";
    out.push_str(&format!(
        "\n| {} |\n|{}\n",
        headers.join(" | "),
        "---|".repeat(headers.len())
    ));
    for (i, p) in r.points.iter().enumerate() {
        let c = cells(r, i, p);
        out.push_str(&format!("| {} |\n", c.join(" | ")));
    }
    out.push_str(&format!("\n**Choice:** {}\n", r.choice.text));
    out
}

pub fn render_json(r: &SweepReport) -> String {
    let mut s = serde_json::to_string_pretty(r).expect("sweep report serialises");
    s.push('\n');
    s
}
