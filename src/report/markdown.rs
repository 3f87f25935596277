//! Markdown rendering of an audit, for pull-request comments and notebooks.

use super::AuditReport;
use super::columns::COLUMNS;
use super::table::{cell_text, critic_line, preamble, value_net_share};

pub fn render(r: &AuditReport) -> String {
    let pre = preamble(r);
    let mut out = format!("### {}\n\n", pre[0]);
    for line in &pre[1..] {
        out.push_str(&format!("- {}\n", line.trim()));
    }
    // The critic's quality (recorded or --fit-value) and the --value-net line, as the
    // terminal and HTML reports give them.
    if let Some(line) = critic_line(&r.input.critic) {
        out.push_str(&format!("- {line}\n"));
    }
    if let Some(v) = &r.input.value_net {
        out.push_str(&format!(
            "- value network `{}`: explains {} of the return variance; {}\n",
            v.file.replace('`', "'"),
            value_net_share(v),
            v.note
        ));
    }
    out.push('\n');
    if let Some(sk) = &r.input.sketch {
        out.push_str(&format!("**Note:** {}\n\n", sk.note));
    }
    if !r.warnings.is_empty() {
        out.push_str("**Warnings**\n\n");
        for line in r.warnings.lines() {
            out.push_str(&format!("- {line}\n"));
        }
        out.push('\n');
    }
    // A pipe in a header or cell (`|g|`) would end the cell: escaped as `\|` (GFM tables).
    let escape = |t: &str| t.replace('|', "\\|");
    let titles: Vec<String> = COLUMNS.iter().map(|c| escape(c.title)).collect();
    out.push_str(&format!("| {} |\n", titles.join(" | ")));
    // Names left, figures right-aligned.
    out.push_str(&format!("|---|{}\n", "--:|".repeat(titles.len() - 1)));
    let groups = super::groups::groups(r);
    for g in &groups {
        let cells: Vec<String> = COLUMNS
            .iter()
            .map(|c| {
                if c.key == "estimator" {
                    escape(&g.label())
                } else {
                    escape(&cell_text((c.cell)(g.first())))
                }
            })
            .collect();
        out.push_str(&format!("| {} |\n", cells.join(" | ")));
    }
    out.push('\n');
    for g in &groups {
        for note in &g.first().notes {
            out.push_str(&format!("- note ({}): {note}\n", g.names()));
        }
    }
    for line in super::significance::lines(r) {
        out.push_str(&format!("- {line}\n"));
    }
    for s in &r.skipped {
        out.push_str(&format!("- skipped `{}`: {}\n", s.name, s.reason));
    }
    out.push_str(&format!("\n**Verdict:** {}\n", r.verdict.text));
    out
}
