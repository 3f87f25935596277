//! `crosscheck --format html`: a training stack's logged columns against the reference, as a
//! page. At the top one sentence says whether every column agrees and, where one differs, which
//! fault of the catalogue explains it; then the log's facts, warnings, a table with a row per
//! checked column, "how to read this", and per column its tolerance, agreement, first
//! difference, the episodes with the most differing steps, the faults checked (the explaining
//! ones marked) or the worst rows, and its verdict; the settings last. Same house style as the
//! other pages (html.rs): inline stylesheet, no URL, sorting by script only as an extra.

use super::{data_v, esc, footer, page, settings, warnings};
use crate::report::crosscheck::{
    ColumnReport, CrosscheckReport, Row, VariantResult, agreement_text, params_text, row_text,
    short, tolerance_text, verdict,
};
use crate::report::table::num;
use std::fmt::Write;

/// A figure's text: `-` when undefined.
fn fig(x: Option<f64>) -> String {
    x.filter(|v| v.is_finite()).map_or("-".into(), num)
}

/// A numeric cell with its sort key.
fn td(x: Option<f64>) -> String {
    format!("<td data-v=\"{}\">{}</td>", data_v(x), esc(&fig(x)))
}

/// The faults that explain a column, joined for a sentence.
fn explaining(c: &ColumnReport) -> String {
    let names: Vec<&str> = c
        .variants
        .iter()
        .filter(|v| v.explains)
        .map(|v| v.name)
        .collect();
    names.join(" or ")
}

/// The headline: one sentence over every checked column.
pub(super) fn headline(r: &CrosscheckReport) -> String {
    let claim = format!("{} at gamma {}", r.claim.estimator, short(r.claim.gamma));
    let names: Vec<&str> = r.columns.iter().map(|c| c.column.as_str()).collect();
    if r.agree {
        let what = if names.len() == 1 {
            format!("The logged column {}", names[0])
        } else {
            format!("Every logged column ({})", names.join(", "))
        };
        return format!("{what} agrees with {claim} on every step, within its tolerance.");
    }
    let parts: Vec<String> = r
        .columns
        .iter()
        .map(|c| match c.status {
            "agrees" => format!("{} agrees", c.column),
            "explained" => format!("{} differs, explained by {}", c.column, explaining(c)),
            _ => format!(
                "{} differs and no fault of the catalogue explains it",
                c.column
            ),
        })
        .collect();
    let differing = r.columns.iter().all(|c| c.status != "agrees");
    let first = explaining(&r.columns[0]);
    if differing
        && names.len() > 1
        && !first.is_empty()
        && r.columns.iter().all(|c| explaining(c) == first)
    {
        let both = if names.len() == 2 {
            "both"
        } else {
            "every one"
        };
        return format!(
            "The logged columns {} do not follow {claim}: {first} explains {both}.",
            names.join(" and ")
        );
    }
    let all = if differing {
        "do not follow"
    } else {
        "do not all follow"
    };
    if let [c] = r.columns.as_slice() {
        let why = match c.status {
            "explained" => format!("{} explains the difference", explaining(c)),
            _ => "no fault of the catalogue explains the difference".into(),
        };
        return format!(
            "The logged column {} does not follow {claim}: {why}.",
            c.column
        );
    }
    format!("The logged columns {all} {claim}: {}.", parts.join("; "))
}

fn status_class(c: &ColumnReport) -> &'static str {
    if c.status == "agrees" { "pass" } else { "fail" }
}

/// One row per checked column: its status and how far it is from the reference.
fn summary_table(r: &CrosscheckReport) -> String {
    let mut s = String::from(
        "<div class=\"scroll\"><table id=\"columns\" class=\"sortable\">\n<caption>One row per \
         checked column, in the order given; a step differs when it lies beyond its tolerance \
         (under the count, its share of the steps).</caption>\n<thead><tr><th \
         scope=\"col\">column</th><th scope=\"col\" class=\"text\">status</th><th \
         scope=\"col\">steps</th><th scope=\"col\">differing</th><th \
         scope=\"col\">episodes</th><th scope=\"col\">max abs error</th><th scope=\"col\">max \
         rel error</th><th scope=\"col\">first line</th><th scope=\"col\" \
         class=\"text\">explained by</th></tr></thead>\n<tbody>\n",
    );
    for (k, c) in r.columns.iter().enumerate() {
        let a = &c.agreement;
        let first = a.first_difference.as_ref().map(|f| f.line as f64);
        let share = a.share_differing.map_or(String::new(), |x| {
            format!("<small>{:.2}%</small>", 100.0 * x)
        });
        let _ = writeln!(
            s,
            "<tr data-column=\"{}\"><th scope=\"row\"><a href=\"#col-{k}\"><code>{}</code></a>\
             <small>{}</small></th><td class=\"text {}\">{}</td><td data-v=\"{}\">{}</td>\
             <td data-v=\"{}\">{}{share}</td><td data-v=\"{}\">{}</td>{}{}<td data-v=\"{}\">{}\
             </td><td class=\"text\">{}</td></tr>",
            esc(&c.column),
            esc(&c.column),
            c.kind,
            status_class(c),
            c.status,
            c.steps,
            c.steps,
            a.steps_differing,
            a.steps_differing,
            a.episodes_differing,
            a.episodes_differing,
            td(a.max_abs_error),
            td(a.max_rel_error),
            data_v(first),
            first.map_or("-".into(), |l| l.to_string()),
            esc(&explaining(c).replace(" or ", ", or "))
        );
    }
    s.push_str("</tbody>\n</table></div>\n");
    s
}

const HOWTO: &[&str] = &[
    "Each logged column is recomputed from the log's own rewards, values, end flags and \
     bootstrap values with the claimed computation. <b>agrees</b>: every step lies within its \
     tolerance. <b>explained</b>: it differs, and a known fault, recomputed the way faulty code \
     would, matches every step. <b>unexplained</b>: it differs and no fault of the catalogue \
     matches; the worst rows are listed.",
    "A step's tolerance comes from the data: the precision the column and its inputs were \
     written with (float32 at best) and the size of the terms summed into it, with a factor 2 \
     of slack. A correct float32 column stays well inside it.",
    "In a column's faults table, <b>matching</b> counts the steps within tolerance of the \
     fault, <b>affected</b> the steps where the fault changes the reference; a fault explains \
     the column when it matches every step and changes at least one. Two faults that change \
     the same steps alike are both named: the log cannot tell them apart.",
    "Exit code 0 when every column agrees, 1 when one differs, so a CI job can stop on it.",
];

fn howto() -> String {
    let ps: String = HOWTO.iter().map(|p| format!("<p>{p}</p>\n")).collect();
    format!("<aside class=\"howto\">\n<h3>How to read this</h3>\n{ps}</aside>\n")
}

fn variant_row(v: &VariantResult) -> String {
    let (class, word) = if v.explains {
        (" class=\"named\"", "<b class=\"fail\">yes</b>")
    } else {
        ("", "no")
    };
    let first = v.first_affected_line.map(|l| l as f64);
    // One fitted value a line: the parameter names are long.
    let fitted: String = params_text(&v.parameters)
        .split(' ')
        .map(|p| format!("<span class=\"fit\">{}</span>", esc(p)))
        .collect();
    format!(
        "<tr{class} data-variant=\"{}\"><th scope=\"row\" class=\"fault\"><code>{}</code>\
         <small>{}</small></th><td class=\"text\">{word}</td><td data-v=\"{}\">{}</td>\
         <td data-v=\"{}\">{}</td><td data-v=\"{}\">{}</td><td data-v=\"{}\">{}</td>\
         <td class=\"text\">{}</td></tr>\n",
        v.name,
        v.name,
        esc(&v.description),
        v.steps_matching,
        v.steps_matching,
        v.affected_steps,
        v.affected_steps,
        v.affected_episodes,
        v.affected_episodes,
        data_v(first),
        first.map_or("-".into(), |l| l.to_string()),
        fitted
    )
}

fn faults_table(k: usize, c: &ColumnReport) -> String {
    let mut s = format!(
        "<div class=\"scroll\"><table id=\"faults-{k}\" class=\"sortable\">\n<caption>The \
         faults checked against <code>{}</code>, in catalogue order, each with what the faulty \
         code does; the ones that explain it are shaded and marked yes.</caption>\n<thead><tr><th scope=\"col\">fault</th><th scope=\"col\" \
         class=\"text\">explains</th><th scope=\"col\">matching</th><th \
         scope=\"col\">affected</th><th scope=\"col\">episodes</th><th scope=\"col\">first \
         line</th><th scope=\"col\" class=\"text\">fitted</th></tr></thead>\n<tbody>\n",
        esc(&c.column)
    );
    for v in &c.variants {
        s.push_str(&variant_row(v));
    }
    s.push_str("</tbody>\n</table></div>\n");
    s
}

fn row_cells(w: &Row) -> String {
    format!(
        "<tr><th scope=\"row\">{}</th><td class=\"text\">{}</td><td>{}</td>{}{}{}{}</tr>\n",
        w.line,
        esc(&w.episode),
        w.step,
        td(Some(w.logged)),
        td(w.reference),
        td(w.difference),
        td(w.tolerance)
    )
}

fn worst_table(k: usize, c: &ColumnReport) -> String {
    let rows: String = c.worst_rows.iter().map(row_cells).collect();
    format!(
        "<div class=\"scroll\"><table id=\"worst-{k}\">\n<caption>The rows furthest beyond \
         their tolerance.</caption>\n<thead><tr><th scope=\"col\">line</th><th scope=\"col\" \
         class=\"text\">episode</th><th scope=\"col\">step</th><th scope=\"col\">logged</th>\
         <th scope=\"col\">reference</th><th scope=\"col\">difference</th><th \
         scope=\"col\">tolerance</th></tr></thead>\n<tbody>\n{rows}</tbody>\n</table></div>\n"
    )
}

/// A column's findings: facts, the episodes most affected, the faults or the worst rows.
fn column_section(k: usize, c: &ColumnReport) -> String {
    let mut s = format!(
        "<section id=\"col-{k}\" data-column=\"{}\">\n<h2>Column <code>{}</code> ({}): \
         <span class=\"{}\">{}</span></h2>\n<p><b>{}</b></p>\n<dl class=\"settings\">\n\
         <dt>tolerance</dt><dd>{}</dd>\n<dt>agreement</dt><dd>{}</dd>\n",
        esc(&c.column),
        esc(&c.column),
        c.kind,
        status_class(c),
        c.status,
        esc(&super::sentence(&verdict(c))),
        esc(&tolerance_text(c)),
        esc(&agreement_text(c))
    );
    if let Some(f) = &c.agreement.first_difference {
        let _ = writeln!(s, "<dt>first difference</dt><dd>{}</dd>", esc(&row_text(f)));
    }
    let eps: Vec<String> = c
        .agreement
        .episodes
        .iter()
        .map(|e| {
            format!(
                "{} (line {}): {} of {} steps",
                e.episode, e.first_line, e.differing, e.steps
            )
        })
        .collect();
    if !eps.is_empty() {
        let _ = writeln!(
            s,
            "<dt>most differing episodes</dt><dd>{}</dd>",
            esc(&eps.join("; "))
        );
    }
    s.push_str("</dl>\n");
    if !c.variants.is_empty() {
        s.push_str(&faults_table(k, c));
    }
    if !c.worst_rows.is_empty() {
        s.push_str(&worst_table(k, c));
    }
    s.push_str("</section>\n");
    s
}

fn crosscheck_settings(r: &CrosscheckReport) -> String {
    let mut pairs = vec![
        ("log", r.input.log.file.clone()),
        ("claimed computation", r.claim.estimator.clone()),
        ("gamma", short(r.claim.gamma)),
    ];
    if let Some(l) = r.claim.lambda {
        pairs.push(("lambda", short(l)));
    }
    if let Some(n) = r.claim.n {
        pairs.push(("n", n.to_string()));
    }
    for c in &r.columns {
        let rule = match c.tolerance.source {
            "data" => "from the data".to_string(),
            _ => format!("--tolerance {}", fig(c.tolerance.max)),
        };
        pairs.push((
            "column checked",
            format!("{} ({}; {rule})", c.column, c.kind),
        ));
    }
    settings(&pairs)
}

/// `crosscheck --format html`.
pub fn crosscheck(r: &CrosscheckReport) -> String {
    let i = &r.input;
    let envs = if i.environments > 0 {
        format!(", {} environments", i.environments)
    } else {
        String::new()
    };
    let mut body = format!(
        "<header>\n<p class=\"kicker\">gradaudit crosscheck of <code>{}</code></p>\n\
         <h1 id=\"verdict\" class=\"{}\">{}</h1>\n<p class=\"facts\">{} episodes, {} steps ({} \
         terminated, {} truncated){envs}; claimed computation {} at gamma {}; exit code {}.\
         </p>\n</header>\n",
        esc(&i.log.file),
        if r.agree { "pass" } else { "fail" },
        esc(&headline(r)),
        i.log.episodes,
        i.log.steps,
        i.log.terminated,
        i.log.truncated,
        esc(&r.claim.estimator),
        short(r.claim.gamma),
        if r.agree { 0 } else { 1 }
    );
    body.push_str(&warnings(&r.warnings));
    body.push_str("<section id=\"summary\">\n<h2>Checked columns</h2>\n");
    body.push_str(&summary_table(r));
    body.push_str(&howto());
    body.push_str("</section>\n");
    for (k, c) in r.columns.iter().enumerate() {
        body.push_str(&column_section(k, c));
    }
    body.push_str(&crosscheck_settings(r));
    body.push_str(&footer(r.tool.schema));
    page(&format!("gradaudit crosscheck of {}", i.log.file), &body)
}
