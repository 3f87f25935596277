//! `inspect --format html`: how the log was read, as a page: the counts in one sentence at the
//! top, episode lengths and returns, which header got which role, the critic, the warnings and
//! (with --policy) the policy's layout.

use super::{esc, footer, list, page, settings};
use crate::inspect::{InspectReport, Summary};
use crate::report::table::{critic_line, num};
use std::fmt::Write;

fn summary_row(name: &str, s: &Option<Summary>) -> String {
    match s {
        Some(s) => {
            let cells: String = [Some(s.mean), s.sd, Some(s.min), Some(s.median), Some(s.max)]
                .iter()
                .map(|x| {
                    format!(
                        "<td data-v=\"{}\">{}</td>",
                        x.map_or(String::new(), |v| v.to_string()),
                        x.map_or("-".into(), num)
                    )
                })
                .collect();
            format!("<tr><th scope=\"row\">{name}</th>{cells}</tr>\n")
        }
        None => {
            format!("<tr><th scope=\"row\">{name}</th><td colspan=\"5\">no episodes</td></tr>\n")
        }
    }
}

fn columns_table(r: &InspectReport) -> String {
    let mut s = String::from(
        "<div class=\"scroll\"><table id=\"columns\" class=\"sortable\">\n<thead><tr><th scope=\"col\">role</th>\
         <th scope=\"col\" class=\"text\">headers</th><th scope=\"col\" class=\"text\">column \
         numbers</th></tr></thead>\n\
         <tbody>\n",
    );
    for a in &r.columns {
        let numbers: Vec<String> = a.columns.iter().map(|c| c.to_string()).collect();
        let _ = writeln!(
            s,
            "<tr><th scope=\"row\">{}</th><td class=\"text\"><code>{}</code></td>\
             <td class=\"text\">{}</td></tr>",
            esc(&a.role),
            esc(&a.headers.join(", ")),
            esc(&numbers.join(", "))
        );
    }
    s.push_str("</tbody>\n</table></div>\n");
    s
}

/// The headline: what was read, and whether anything needs attention.
fn headline(r: &InspectReport) -> String {
    let warnings = r.warnings.lines().len();
    let tail = match warnings {
        0 => "no warnings".to_string(),
        1 => "1 warning (below)".to_string(),
        n => format!("{n} warnings (below)"),
    };
    let scores = if r.score_dim == 0 {
        "no score columns (audit will need them or --policy)".to_string()
    } else {
        format!("score dimension {}", r.score_dim)
    };
    format!(
        "{} episodes ({} terminated, {} truncated) in {} steps; {scores}; {tail}.",
        r.episodes, r.terminated, r.truncated, r.steps
    )
}

pub fn inspect(r: &InspectReport) -> String {
    let mut body = format!(
        "<header>\n<p class=\"kicker\">gradaudit inspect of <code>{}</code></p>\n\
         <h1 id=\"verdict\">{}</h1>\n<p class=\"facts\">{} rows; {} truncated episodes carry a \
         bootstrap value.</p>\n</header>\n",
        esc(&r.file),
        esc(&headline(r)),
        r.rows,
        r.truncated_with_bootstrap
    );
    if !r.warnings.is_empty() {
        body.push_str("<section id=\"warnings\">\n<h2>Warnings</h2>\n");
        body.push_str(&list("Counted while reading the log", &r.warnings.lines()));
        body.push_str("</section>\n");
    }
    body.push_str(
        "<section id=\"episodes\">\n<h2>Episodes</h2>\n<div class=\"scroll\"><table \
         id=\"summary\">\n<thead><tr><th scope=\"col\"></th><th scope=\"col\">mean</th>\
         <th scope=\"col\">sd</th><th scope=\"col\">min</th><th scope=\"col\">median</th>\
         <th scope=\"col\">max</th></tr></thead>\n<tbody>\n",
    );
    body.push_str(&summary_row("length (steps)", &r.episode_length));
    body.push_str(&summary_row("return (undiscounted)", &r.episode_return));
    body.push_str("</tbody>\n</table></div>\n</section>\n");
    body.push_str("<section id=\"roles\">\n<h2>Columns</h2>\n");
    body.push_str(&columns_table(r));
    if !r.unused_columns.is_empty() {
        let _ = writeln!(
            body,
            "<p class=\"facts\">Ignored (no role): <code>{}</code></p>",
            esc(&r.unused_columns.join(", "))
        );
    }
    if let Some(line) = critic_line(&r.critic) {
        let _ = writeln!(
            body,
            "<p class=\"facts\">{} (returns at gamma {}).</p>",
            esc(&line),
            r.gamma
        );
    }
    body.push_str("</section>\n");
    if let Some(p) = &r.policy {
        let _ = writeln!(
            body,
            "<section id=\"policy\">\n<h2>Policy</h2>\n<pre>{}</pre>\n</section>",
            esc(&p.render_text())
        );
    }
    body.push_str(&settings(&[
        ("log", r.file.clone()),
        ("gamma of the critic check", r.gamma.to_string()),
    ]));
    body.push_str(&footer(r.tool.schema));
    page(&format!("gradaudit inspect of {}", r.file), &body)
}
