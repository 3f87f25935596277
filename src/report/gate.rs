//! Rendering of a gate result: a human summary, Markdown for a pull-request comment, and JSON.

use super::table::num;
use crate::gate::{At, Bound, GateReport, Outcome, RegressionOutcome};

fn measured(o: &Outcome) -> String {
    let bound = match o.bound {
        Bound::Min(v) => format!(">= {}", num(v)),
        Bound::Max(v) => format!("<= {}", num(v)),
    };
    match (o.measured, o.margin) {
        (Some(m), Some(g)) => format!("measured {}, bound {bound}, margin {}", num(m), num(g)),
        (Some(m), None) => format!("measured {}, bound {bound}", num(m)),
        _ => o.detail.clone().unwrap_or_default(),
    }
}

pub fn regression_line(r: &RegressionOutcome) -> String {
    // A change from a baseline near 0 can overflow to an infinite percentage: never printed.
    let change = match r.worse_pct.filter(|w| w.is_finite()) {
        Some(w) if w >= 0.0 => format!("{w:.1}% worse"),
        Some(w) => format!("{:.1}% better", -w),
        None if r.worse_pct.is_some() => "the change overflowed the range of f64".to_string(),
        None => r.detail.clone().unwrap_or_default(),
    };
    format!(
        "{} {}: baseline {}, now {} ({change}; tolerance {}%)",
        r.estimator,
        r.stat.key(),
        r.baseline.map_or("-".into(), num),
        r.current.map_or("-".into(), num),
        r.tolerance_pct
    )
}

/// The result words: a check "holds" or "breaks" (the gate's own words, saying what was checked).
pub fn result_word(ok: bool) -> &'static str {
    if ok { "holds" } else { "breaks" }
}

/// The one-line result: whether every check holds, or how many break.
pub fn verdict(g: &GateReport) -> String {
    if g.passed {
        format!("gate holds: all {} checks hold", g.checks())
    } else {
        format!(
            "gate breaks: {} of {} checks break",
            g.failures(),
            g.checks()
        )
    }
}

pub fn render_text(g: &GateReport) -> String {
    let mut out = super::table::preamble(&g.audit).join("\n");
    out.push('\n');
    for line in g.audit.warnings.lines() {
        out.push_str(&format!("warning: {line}\n"));
    }
    for o in &g.outcomes {
        let mark = result_word(o.passed);
        out.push_str(&format!(
            "{mark:<6}  {} {}: {}\n",
            o.estimator,
            o.rule,
            measured(o)
        ));
    }
    if let Some(file) = &g.baseline_file {
        out.push_str(&format!("baseline {file}:\n"));
        for note in &g.baseline_notes {
            out.push_str(&format!("  note: {note}\n"));
        }
    }
    for r in &g.regressions {
        let mark = result_word(r.passed);
        out.push_str(&format!("{mark:<6}  {}\n", regression_line(r)));
    }
    out.push_str(&verdict(g));
    out.push('\n');
    out
}

pub fn render_markdown(g: &GateReport) -> String {
    let icon = |ok: bool| if ok { "holds" } else { "**breaks**" };
    let mut out = format!("### gradaudit gate: {}\n\n", verdict(g));
    for line in &super::table::preamble(&g.audit)[1..] {
        out.push_str(&format!("- {}\n", line.trim()));
    }
    out.push('\n');
    if !g.outcomes.is_empty() {
        out.push_str("| result | estimator | rule | measured | margin |\n|---|---|---|---|---|\n");
        for o in &g.outcomes {
            out.push_str(&format!(
                "| {} | `{}` | {} | {} | {} |\n",
                icon(o.passed),
                o.estimator,
                o.rule,
                o.measured
                    .map_or_else(|| o.detail.clone().unwrap_or_default(), num),
                o.margin.map_or("-".into(), num)
            ));
        }
        out.push('\n');
    }
    if !g.regressions.is_empty() {
        out.push_str(&format!(
            "Against baseline `{}`:\n\n| result | check |\n|---|---|\n",
            g.baseline_file.as_deref().unwrap_or("")
        ));
        for r in &g.regressions {
            out.push_str(&format!(
                "| {} | {} |\n",
                icon(r.passed),
                regression_line(r)
            ));
        }
        for note in &g.baseline_notes {
            out.push_str(&format!("\n- note: {note}"));
        }
        out.push('\n');
    }
    for line in g.audit.warnings.lines() {
        out.push_str(&format!("- warning: {line}\n"));
    }
    out
}

pub fn render_json(g: &GateReport) -> String {
    let mut s = serde_json::to_string_pretty(g).expect("gate report serialises");
    s.push('\n');
    s
}

/// JUnit XML: one test case per rule and estimator (and per regression check), in one suite.
pub fn render_junit(g: &GateReport) -> String {
    let mut cases = String::new();
    for o in &g.outcomes {
        let at = if o.at == At::Interval {
            "interval"
        } else {
            "point"
        };
        cases.push_str(&case(
            &format!("gradaudit.gate.{}", o.estimator),
            &o.rule,
            (!o.passed).then(|| {
                (
                    measured(o),
                    format!("{} {} evaluated at the {at}", o.estimator, o.rule),
                )
            }),
        ));
    }
    for r in &g.regressions {
        cases.push_str(&case(
            &format!("gradaudit.regression.{}", r.estimator),
            &format!("{} no more than {}% worse", r.stat.key(), r.tolerance_pct),
            (!r.passed).then(|| (regression_line(r), regression_line(r))),
        ));
    }
    format!(
        "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n\
         <testsuites name=\"gradaudit\" tests=\"{n}\" failures=\"{f}\" errors=\"0\">\n\
         <testsuite name=\"gradaudit gate {file}\" tests=\"{n}\" failures=\"{f}\" errors=\"0\" skipped=\"0\">\n\
         {cases}</testsuite>\n</testsuites>\n",
        n = g.checks(),
        f = g.failures(),
        file = xml(&g.audit.input.file),
    )
}

fn case(class: &str, name: &str, failure: Option<(String, String)>) -> String {
    match failure {
        None => format!(
            "<testcase classname=\"{}\" name=\"{}\"/>\n",
            xml(class),
            xml(name)
        ),
        Some((message, body)) => format!(
            "<testcase classname=\"{}\" name=\"{}\">\n<failure message=\"{}\" type=\"gate\">{}</failure>\n</testcase>\n",
            xml(class),
            xml(name),
            xml(&message),
            xml(&body)
        ),
    }
}

/// Escapes text for XML attributes and content.
fn xml(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&apos;"),
            c if (c as u32) < 0x20 && !matches!(c, '\n' | '\t' | '\r') => {}
            c => out.push(c),
        }
    }
    out
}
