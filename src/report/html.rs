//! `--format html`: one self-contained page per report (audit, sweep, gate, inspect,
//! crosscheck; merge shares audit's) that a
//! team can attach to a pull request or open in a meeting. Everything is inline: the
//! stylesheet (html/style.css: light and dark schemes from the reader's system setting, and a
//! print layout), the figures as SVG (html/figures.rs), and a short plain script
//! (html/sort.js) that only adds sorting by a click on a table header; with scripting off the
//! page reads the same, its tables already sorted. No element refers to a URL: the page works
//! offline and leaks nothing when opened.
//!
//! The page is written as well-formed XML as well as HTML (every element closed, void elements
//! self-closed, text escaped), so a test can parse it with an XML parser; the script and the
//! stylesheet contain no `<` or `&` for the same reason.
//!
//! Layout of an audit page: the verdict in one sentence, the facts of the log, warnings, the
//! MSE figure with "how to read this" beside it, the estimator table (reference marked, biases
//! within resampling noise set apart), notes and skipped estimators, the settings and seed.

mod crosscheck;
mod figures;
mod inspect;

use super::AuditReport;
use super::columns::{COLUMNS, Cell};
use super::groups::{Group, groups};
use super::significance::p_text;
use super::table::{cell_text, critic_line, num};
use crate::gate::GateReport;
use crate::sweep::SweepReport;
use std::fmt::Write;

pub use crosscheck::crosscheck;
pub use inspect::inspect;

const STYLE: &str = include_str!("html/style.css");
const SCRIPT: &str = include_str!("html/sort.js");

/// Escapes text for HTML (and XML) content and attribute values.
pub fn esc(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            // Control characters are not allowed in XML 1.0.
            c if (c as u32) < 0x20 && !matches!(c, '\n' | '\t') => {}
            c => out.push(c),
        }
    }
    out
}

/// A sentence from a report's one-line text: capital first letter, a full stop at the end.
fn sentence(text: &str) -> String {
    let mut chars = text.trim().chars();
    let mut s: String = chars
        .next()
        .map(|c| c.to_uppercase().chain(chars).collect())
        .unwrap_or_default();
    if !s.ends_with('.') {
        s.push('.');
    }
    s
}

/// The whole page around `body`.
fn page(title: &str, body: &str) -> String {
    format!(
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\"/>\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\"/>\n\
         <meta name=\"color-scheme\" content=\"light dark\"/>\n\
         <meta name=\"generator\" content=\"gradaudit {}\"/>\n<title>{}</title>\n\
         <style>\n{STYLE}</style>\n</head>\n<body>\n<main>\n{body}</main>\n\
         <script>\n{SCRIPT}</script>\n</body>\n</html>\n",
        env!("CARGO_PKG_VERSION"),
        esc(title)
    )
}

fn footer(schema: &str) -> String {
    format!(
        "<footer>Written by gradaudit {} (JSON schema <code>{schema}</code>). This page is \
         self-contained: it loads nothing from the network.</footer>\n",
        env!("CARGO_PKG_VERSION")
    )
}

/// A list section; nothing when `items` is empty.
fn list(title: &str, items: &[String]) -> String {
    if items.is_empty() {
        return String::new();
    }
    let lis: String = items
        .iter()
        .map(|i| format!("<li>{}</li>\n", esc(i)))
        .collect();
    format!(
        "<h3>{}</h3>\n<ul class=\"notes\">\n{lis}</ul>\n",
        esc(title)
    )
}

/// A figure with its "how to read this" beside it.
fn figure(id: &str, title: &str, svg: &str, caption: &str, howto: &[&str]) -> String {
    let ps: String = howto.iter().map(|p| format!("<p>{p}</p>\n")).collect();
    format!(
        "<section id=\"{id}\">\n<h2>{}</h2>\n<div class=\"fig-row\">\n<figure>\n{svg}\n\
         <figcaption>{caption}</figcaption>\n</figure>\n<aside class=\"howto\">\n\
         <h3>How to read this</h3>\n{ps}</aside>\n</div>\n</section>\n",
        esc(title)
    )
}

/// A figure's key: a swatch and its label per entry, kept together on a line, then `tail`.
fn legend(entries: &[(&str, &str)], tail: &str) -> String {
    let mut s: String = entries
        .iter()
        .map(|(class, label)| {
            format!(
                "<span class=\"k\"><span class=\"key {class}\"></span>{}</span> ",
                esc(label)
            )
        })
        .collect();
    if !tail.is_empty() {
        s.push_str("– ");
        s.push_str(&esc(tail));
    }
    s
}

/// `data-v` for sorting: the number, or empty for an undefined figure.
fn data_v(x: Option<f64>) -> String {
    x.filter(|v| v.is_finite())
        .map_or(String::new(), |v| format!("{v}"))
}

/// The facts about the log and the run, under the verdict.
fn facts(r: &AuditReport) -> String {
    let i = &r.input;
    let mut s = format!(
        "<p class=\"facts\">{} episodes, {} steps ({} terminated, {} truncated); score \
         dimension {} (from {}).",
        i.episodes, i.steps, i.terminated, i.truncated, i.score_dim, i.scores_from
    );
    if let Some(line) = critic_line(&i.critic) {
        let _ = write!(s, " {}.", esc(&sentence(&line)).trim_end_matches('.'));
    }
    s.push_str("</p>\n");
    if let Some(v) = &i.value_net {
        let line = format!(
            "Value network {} explains {} of the return variance; {}",
            v.file,
            super::table::value_net_share(v),
            v.note
        );
        let _ = writeln!(s, "<p class=\"facts\">{}</p>", esc(&sentence(&line)));
    }
    if let Some(sk) = &i.sketch {
        let _ = writeln!(s, "<p class=\"facts\">{}</p>", esc(&sentence(&sk.note)));
    }
    s
}

fn warnings(w: &crate::warnings::Warnings) -> String {
    if w.is_empty() {
        return String::new();
    }
    format!(
        "<section id=\"warnings\">\n<h2>Warnings</h2>\n{}</section>\n",
        list("Counted while reading the log", &w.lines())
    )
}

/// One figure cell of the estimator table, with the interval or z beneath where it helps.
fn figure_cell(key: &str, g: &Group, cell: Cell) -> String {
    let e = g.first();
    let text = cell_text(cell);
    let value = match key {
        "mse" => e.mse,
        "bias_sq" => e.bias_sq,
        "variance" => e.variance,
        "snr" => e.snr,
        "ess" => e.ess,
        "cosine_half" => e.cosine_half,
        "gradient_norm" => e.gradient_norm,
        "episodes_for_snr" => e.episodes_for_snr.map(|n| n as f64),
        _ => text.trim_end_matches('?').parse().ok(),
    };
    let iv = |i: Option<crate::stats::Interval>| {
        i.map_or(String::new(), |i| {
            format!("<small>{} – {}</small>", num(i.low), num(i.high))
        })
    };
    let (class, sub) = match key {
        "bias_sq" if e.bias_sq.is_some_and(|b| b > 0.0) && !e.bias_detected => (
            " class=\"unsure\" title=\"within resampling noise: it may be zero\"",
            e.bias_p_adjusted.map_or(String::new(), |p| {
                format!("<small>adj. p {}, may be 0</small>", p_text(p))
            }),
        ),
        "bias_sq" if e.bias_detected => (
            " class=\"detected\"",
            e.bias_p_adjusted.map_or(String::new(), |p| {
                format!("<small>adj. p {}, detected</small>", p_text(p))
            }),
        ),
        "gradient_norm" => ("", iv(e.gradient_norm_interval)),
        "cosine_half" => ("", iv(e.cosine_half_interval)),
        _ => ("", String::new()),
    };
    format!(
        "<td{class} data-v=\"{}\"><span class=\"v\">{}</span>{sub}</td>",
        data_v(value),
        esc(&text)
    )
}

/// The estimator table: a row per group of identical estimators, the reference marked.
fn estimator_table(r: &AuditReport, groups: &[Group]) -> String {
    // Interval ends are shown under their figure, not as columns.
    let shown: Vec<_> = COLUMNS
        .iter()
        .filter(|c| !(c.key.ends_with("_low") || c.key.ends_with("_high")))
        .collect();
    let mut s = format!(
        "<div class=\"scroll\"><table id=\"estimators\" class=\"sortable\">\n<caption>Sorted \
         by MSE, lowest first; under |g| and cos_half their {}% intervals. Estimators \
         identical by construction share a row.</caption>\n<thead><tr>",
        r.settings.confidence * 100.0
    );
    for c in &shown {
        let _ = write!(s, "<th scope=\"col\">{}</th>", esc(c.title));
    }
    s.push_str("</tr></thead>\n<tbody>\n");
    for g in groups {
        let class = if g.reference() { " class=\"ref\"" } else { "" };
        let tag = if g.reference() {
            "<span class=\"tag\">reference</span>"
        } else {
            ""
        };
        let _ = write!(
            s,
            "<tr{class} data-names=\"{}\"><th scope=\"row\">{}{tag}</th>",
            esc(&g.names()),
            esc(&g.names())
        );
        for c in shown.iter().filter(|c| c.key != "estimator") {
            s.push_str(&figure_cell(c.key, g, (c.cell)(g.first())));
        }
        s.push_str("</tr>\n");
    }
    s.push_str("</tbody>\n</table></div>\n");
    s
}

/// The settings and seed, as a definition list.
fn settings(pairs: &[(&str, String)]) -> String {
    let mut s =
        String::from("<section id=\"settings\">\n<h2>Settings</h2>\n<dl class=\"settings\">\n");
    for (k, v) in pairs {
        let _ = writeln!(s, "<dt>{}</dt><dd><code>{}</code></dd>", esc(k), esc(v));
    }
    s.push_str("</dl>\n</section>\n");
    s
}

fn audit_settings(r: &AuditReport) -> String {
    let st = &r.settings;
    settings(&[
        ("log", r.input.file.clone()),
        ("gamma", st.gamma.to_string()),
        ("reference", st.reference.clone()),
        ("resamples", st.resamples.to_string()),
        ("seed", st.seed.to_string()),
        ("confidence", st.confidence.to_string()),
        ("target snr", st.target_snr.to_string()),
        ("half splits", st.splits.to_string()),
        ("scores from", r.input.scores_from.clone()),
    ])
}

const BARS_HOWTO: &[&str] = &[
    "Each bar is the squared error (MSE) of one update of this log's batch size, split into \
     <b>bias^2</b> (left, red) and <b>variance</b> (right, blue). Shorter is better.",
    "A <b>hatched</b> bias is within resampling noise: the log cannot tell it from zero. A \
     solid one is detected (z &#8805; 2).",
    "Variance shrinks as 1/N with more episodes per update; bias does not. A bias-dominated \
     bar stays long however much data you add.",
    "The reference (marked) is unbiased by assumption; every bias is measured against it.",
];

/// The audit's sections after the header: figure, table, notes, settings.
fn audit_sections(r: &AuditReport) -> String {
    let groups = groups(r);
    let mut s = figure(
        "fig-mse",
        "Where each estimator's error comes from",
        &figures::audit_bars(&groups, r.input.episodes),
        &legend(
            &[
                ("bias", "bias^2 (detected)"),
                ("unsure", "bias^2 within resampling noise"),
                ("var", "variance"),
            ],
            "the number at a bar's end is its MSE.",
        ),
        BARS_HOWTO,
    );
    s.push_str("<section id=\"table\">\n<h2>Estimators</h2>\n");
    s.push_str(&estimator_table(r, &groups));
    s.push_str(
        "<p class=\"facts\">A bias^2 in <i>grey italics with ?</i> is within resampling \
         noise (its p-value adjusted across the table is above the level) and may be zero; a \
         <b>bold</b> one is detected. snr above 1: the update points mostly the right way. \
         ess: how many episodes of the reference give the same error. episodes@snr: the \
         batch size that reaches the target snr.</p>\n",
    );
    s.push_str("</section>\n");
    // The bias test and its control, the noise scale and the baseline comparison: the same
    // lines as the table and Markdown formats.
    s.push_str(&format!(
        "<section id=\"significance\">\n<h2>Significance</h2>\n{}</section>\n",
        list(
            "The bias test, the noise scale and the baseline",
            &super::significance::lines(r)
        )
    ));
    let mut notes: Vec<String> = Vec::new();
    for g in &groups {
        notes.extend(
            g.first()
                .notes
                .iter()
                .map(|n| format!("{}: {n}", g.names())),
        );
    }
    let skipped: Vec<String> = r
        .skipped
        .iter()
        .map(|k| format!("{}: {}", k.name, k.reason))
        .collect();
    if !notes.is_empty() || !skipped.is_empty() {
        s.push_str("<section id=\"notes\">\n<h2>Notes</h2>\n");
        s.push_str(&list("Per estimator", &notes));
        s.push_str(&list("Skipped estimators", &skipped));
        s.push_str("</section>\n");
    }
    s.push_str(&audit_settings(r));
    s
}

/// `audit --format html`.
pub fn audit(r: &AuditReport) -> String {
    let mut body = format!(
        "<header>\n<p class=\"kicker\">gradaudit {}</p>\n\
         <h1 id=\"verdict\">{}</h1>\n{}</header>\n",
        super::table::subject(&r.input, |f| format!("<code>{}</code>", esc(f))),
        esc(&sentence(&r.verdict.text)),
        facts(r)
    );
    body.push_str(&warnings(&r.warnings));
    body.push_str(&audit_sections(r));
    body.push_str(&footer(r.tool.schema));
    let title = super::table::subject(&r.input, str::to_string);
    page(&format!("gradaudit {title}"), &body)
}

/// The sweep's headline: the recommendation and whether the log separates the settings.
fn sweep_headline(r: &SweepReport) -> String {
    let c = &r.choice;
    let key = r.settings.over.key();
    match (c.recommended, c.best) {
        (Some(rec), Some(best)) => {
            let (rl, bl) = (&r.points[rec].label, &r.points[best].label);
            if c.band.len() == r.points.len() && r.points.len() > 1 {
                format!(
                    "Recommended: {key} = {rl}, the least biased setting, but this log cannot \
                     tell the settings apart: every grid point lies within one standard error \
                     of the lowest MSE ({key} = {bl})."
                )
            } else {
                format!(
                    "Recommended: {key} = {rl}, the least biased setting within one standard \
                     error of the lowest MSE ({key} = {bl})."
                )
            }
        }
        _ => sentence(&c.text),
    }
}

const SWEEP_HOWTO: &[&str] = &[
    "The <b>black</b> curve is the MSE of one update at each setting; the grey-blue \
     <b>band</b> around it is its bootstrap interval. Where the bands of two settings \
     overlap, this log cannot rank them.",
    "<b>Red</b> is bias^2 (against the reference), <b>blue</b> the variance. Moving toward \
     the conservative side usually trades bias for variance.",
    "The <b>green</b> columns are the settings whose MSE is within one standard error of \
     the lowest; the circled one is recommended: the least biased of them, since bias does \
     not shrink with more episodes and variance does.",
    "The axis is logarithmic: zero values sit on its floor.",
];

fn sweep_table(r: &SweepReport) -> String {
    let mut s = String::from(
        "<div class=\"scroll\"><table id=\"points\" class=\"sortable\">\n<caption>One row per \
         grid point, in grid order; under mse its interval and standard error.</caption>\n\
         <thead><tr><th scope=\"col\">point</th><th scope=\"col\" class=\"text\">estimator</th>\
         <th scope=\"col\">bias^2</th><th scope=\"col\">variance</th><th scope=\"col\">mse</th>\
         <th scope=\"col\">snr</th><th scope=\"col\">ess</th><th scope=\"col\">episodes@snr</th>\
         <th scope=\"col\" class=\"text\">mark</th></tr></thead>\n<tbody>\n",
    );
    for (i, p) in r.points.iter().enumerate() {
        s.push_str(&sweep_row(r, i, p));
    }
    s.push_str("</tbody>\n</table></div>\n");
    s
}

fn sweep_row(r: &SweepReport, i: usize, p: &crate::sweep::SweepPoint) -> String {
    let c = &r.choice;
    let (class, mark) = if c.recommended == Some(i) {
        (" class=\"rec\"", "recommended")
    } else if c.best == Some(i) {
        (" class=\"inband\"", "lowest MSE")
    } else if c.band.contains(&i) {
        (" class=\"inband\"", "within 1 se")
    } else {
        ("", "")
    };
    let fig = |x: Option<f64>| x.filter(|v| v.is_finite()).map_or("-".into(), num);
    let td = |x: Option<f64>, sub: String| {
        format!("<td data-v=\"{}\">{}{sub}</td>", data_v(x), esc(&fig(x)))
    };
    let unsure = p.bias_sq.is_some_and(|b| b > 0.0) && !p.bias_detected;
    let bias = if unsure {
        format!(
            "<td class=\"unsure\" data-v=\"{}\"><span class=\"v\">{}?</span></td>",
            data_v(p.bias_sq),
            esc(&fig(p.bias_sq))
        )
    } else {
        td(p.bias_sq, String::new())
    };
    let mse_sub = match (p.mse_interval, p.mse_se) {
        (Some(iv), se) => format!(
            "<small>{} – {}{}</small>",
            num(iv.low),
            num(iv.high),
            se.map_or(String::new(), |s| format!(", se {}", num(s)))
        ),
        _ => String::new(),
    };
    let eps = if p.bias_limited {
        "<td data-v=\"\">bias-limited</td>".to_string()
    } else {
        let n = p.episodes_for_snr;
        format!(
            "<td data-v=\"{}\">{}</td>",
            data_v(n.map(|n| n as f64)),
            n.map_or("-".into(), |n| n.to_string())
        )
    };
    format!(
        "<tr{class} data-point=\"{}\"><th scope=\"row\">{}</th><td class=\"text\">{}</td>{bias}\
         {}{}{}{}{eps}<td class=\"mark\">{mark}</td></tr>\n",
        esc(&p.label),
        esc(&p.label),
        esc(&p.estimator),
        td(p.variance, String::new()),
        td(p.mse, mse_sub),
        td(p.snr, String::new()),
        td(p.ess, String::new()),
    )
}

/// `sweep --format html`.
pub fn sweep(r: &SweepReport) -> String {
    let st = &r.settings;
    let i = &r.input;
    let mut body = format!(
        "<header>\n<p class=\"kicker\">gradaudit sweep of <code>{}</code> over {}</p>\n\
         <h1 id=\"verdict\">{}</h1>\n<p class=\"facts\">{} episodes, {} steps; score dimension \
         {}; estimator family {}, bias against {}; {}.</p>\n</header>\n",
        esc(&i.file),
        st.over.key(),
        esc(&sweep_headline(r)),
        i.episodes,
        i.steps,
        i.score_dim,
        esc(&st.family),
        esc(&st.reference),
        esc(st.over.conservative_side())
    );
    body.push_str(&warnings(&r.warnings));
    body.push_str(&figure(
        "fig-curves",
        &format!("Bias and variance over {}", st.over.key()),
        &super::curves::sweep_svg(r, super::curves::Target::Page),
        &legend(
            &[
                ("mse", "MSE"),
                ("band", &format!("MSE {}% interval", st.confidence * 100.0)),
                ("bias", "bias^2"),
                ("var", "variance"),
                ("se", "within one standard error of the lowest MSE"),
                ("rec", "recommended"),
            ],
            "",
        ),
        SWEEP_HOWTO,
    ));
    body.push_str("<section id=\"table\">\n<h2>Grid points</h2>\n");
    body.push_str(&sweep_table(r));
    let _ = writeln!(
        body,
        "<p class=\"facts\">{}</p>\n</section>",
        esc(&sentence(&r.choice.text))
    );
    let notes: Vec<String> = r
        .points
        .iter()
        .flat_map(|p| p.notes.iter().map(move |n| format!("{}: {n}", p.label)))
        .collect();
    if !notes.is_empty() {
        body.push_str("<section id=\"notes\">\n<h2>Notes</h2>\n");
        body.push_str(&list("Per grid point", &notes));
        body.push_str("</section>\n");
    }
    body.push_str(&settings(&[
        ("log", i.file.clone()),
        ("swept", st.over.key().to_string()),
        ("gamma", st.gamma.to_string()),
        ("reference", st.reference.clone()),
        (
            "resamples (shared by every point)",
            st.resamples.to_string(),
        ),
        ("seed", st.seed.to_string()),
        ("confidence", st.confidence.to_string()),
        ("target snr", st.target_snr.to_string()),
    ]));
    body.push_str(&footer(r.tool.schema));
    page(&format!("gradaudit sweep of {}", i.file), &body)
}

/// The gate's checks table: one row per rule and estimator, then the regression checks.
fn gate_checks(g: &GateReport) -> String {
    use super::gate::result_word;
    let mut s = String::from(
        "<section id=\"checks\">\n<h2>Checks</h2>\n<div class=\"scroll\"><table id=\"rules\" \
         class=\"sortable\">\n<thead><tr><th scope=\"col\">result</th><th scope=\"col\" \
         class=\"text\">estimator</th><th scope=\"col\" class=\"text\">rule</th>\
         <th scope=\"col\">measured</th><th scope=\"col\">margin</th><th scope=\"col\" \
         class=\"text\">detail</th></tr></thead>\n<tbody>\n",
    );
    for o in &g.outcomes {
        let class = if o.passed { "pass" } else { "fail" };
        let _ = writeln!(
            s,
            "<tr data-result=\"{class}\"><th scope=\"row\" class=\"{class}\">{}</th><td \
             class=\"text\"><code>{}</code></td><td class=\"text\">{}</td><td data-v=\"{}\">{}\
             </td><td data-v=\"{}\">{}</td><td class=\"text\">{}</td></tr>",
            result_word(o.passed),
            esc(&o.estimator),
            esc(&o.rule),
            data_v(o.measured),
            o.measured.map_or("-".into(), num),
            data_v(o.margin),
            o.margin.map_or("-".into(), num),
            esc(o.detail.as_deref().unwrap_or(""))
        );
    }
    s.push_str("</tbody>\n</table></div>\n");
    if !g.regressions.is_empty() {
        let items: Vec<String> = g
            .regressions
            .iter()
            .map(|r| {
                format!(
                    "{}: {}",
                    result_word(r.passed),
                    super::gate::regression_line(r)
                )
            })
            .collect();
        let title = format!(
            "Against the baseline {}",
            g.baseline_file.as_deref().unwrap_or("")
        );
        s.push_str(&list(&title, &items));
        s.push_str(&list("Baseline notes", &g.baseline_notes));
    }
    s.push_str("</section>\n");
    s
}

/// `gate --format html`: the result, the checks, then the audit they were checked on.
pub fn gate(g: &GateReport) -> String {
    let a = &g.audit;
    let class = if g.passed { "pass" } else { "fail" };
    let mut body = format!(
        "<header>\n<p class=\"kicker\">gradaudit gate on <code>{}</code></p>\n\
         <h1 id=\"verdict\" class=\"{class}\">{}</h1>\n{}</header>\n",
        esc(&a.input.file),
        esc(&sentence(&super::gate::verdict(g))),
        facts(a)
    );
    body.push_str(&warnings(&a.warnings));
    body.push_str(&gate_checks(g));
    let _ = writeln!(
        body,
        "<p class=\"facts\">The audit the rules were checked on follows. {}</p>",
        esc(&sentence(&a.verdict.text))
    );
    body.push_str(&audit_sections(a));
    body.push_str(&footer(g.tool.schema));
    page(&format!("gradaudit gate on {}", a.input.file), &body)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn text_is_escaped_for_html_and_xml() {
        assert_eq!(
            esc("a<b & \"c\" 'd'>"),
            "a&lt;b &amp; &quot;c&quot; &#39;d&#39;&gt;"
        );
        assert_eq!(esc("x\u{1}y"), "xy");
        assert_eq!(sentence("lowest MSE: gae:0.5"), "Lowest MSE: gae:0.5.");
        assert_eq!(sentence("done."), "Done.");
    }

    #[test]
    fn stylesheet_and_script_stay_xml_text_and_offline() {
        for part in [STYLE, SCRIPT] {
            assert!(!part.contains('<') && !part.contains('&'), "{part}");
            assert!(!part.contains("http") && !part.contains("@import"));
        }
    }
}
