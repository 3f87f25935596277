//! Markdown rendering of an audit, for pull-request comments and notebooks.

use super::AuditReport;
use super::columns::COLUMNS;
use super::table::{cell_text, preamble};

pub fn render(r: &AuditReport) -> String {
    let pre = preamble(r);
    let mut out = format!("### {}\n\n", pre[0]);
    for line in &pre[1..] {
        out.push_str(&format!("- {}\n", line.trim()));
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
    let titles: Vec<&str> = COLUMNS.iter().map(|c| c.title).collect();
    out.push_str(&format!("| {} |\n", titles.join(" | ")));
    out.push_str(&format!("|{}\n", "---|".repeat(titles.len())));
    for row in &r.estimators {
        let cells: Vec<String> = COLUMNS
            .iter()
            .map(|c| cell_text((c.cell)(row)).replace('|', "\\|"))
            .collect();
        out.push_str(&format!("| {} |\n", cells.join(" | ")));
    }
    out.push('\n');
    for row in &r.estimators {
        for note in &row.notes {
            out.push_str(&format!("- note ({}): {note}\n", row.name));
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
