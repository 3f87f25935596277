//! Rendering of the `inspect` report as a terminal summary or JSON.

use crate::inspect::{InspectReport, Summary};

fn summary_line(name: &str, s: &Option<Summary>) -> String {
    match s {
        Some(s) => format!(
            "{name:<16} mean {}  sd {}  min {}  median {}  max {}",
            super::table::num(s.mean),
            s.sd.map_or("-".into(), super::table::num),
            super::table::num(s.min),
            super::table::num(s.median),
            super::table::num(s.max)
        ),
        None => format!("{name:<16} (no episodes)"),
    }
}

pub fn render_text(r: &InspectReport) -> String {
    let mut out = format!("gradaudit inspect of {}\n", r.file);
    out.push_str(&format!("rows             {}\n", r.rows));
    out.push_str(&format!(
        "episodes         {} ({} terminated, {} truncated of which {} with a bootstrap value)\n",
        r.episodes, r.terminated, r.truncated, r.truncated_with_bootstrap
    ));
    out.push_str(&format!("steps            {}\n", r.steps));
    out.push_str(&summary_line("episode length", &r.episode_length));
    out.push('\n');
    out.push_str(&summary_line("episode return", &r.episode_return));
    out.push('\n');
    out.push_str(&format!(
        "score dimension  {}{}\n",
        r.score_dim,
        if r.score_dim == 0 && r.policy.is_some() {
            " (no score columns: the policy below computes them)"
        } else if r.score_dim == 0 {
            " (no score columns: audit will need them)"
        } else {
            ""
        }
    ));
    out.push_str("columns:\n");
    for a in &r.columns {
        let shown = if a.headers.len() > 4 {
            format!(
                "{} .. {} ({} columns)",
                a.headers[0],
                a.headers[a.headers.len() - 1],
                a.headers.len()
            )
        } else if let Some(w) = a.list_width {
            format!("{} (a list of {w})", a.headers.join(", "))
        } else {
            a.headers.join(", ")
        };
        out.push_str(&format!("  {:<11} <- {shown}\n", a.role));
    }
    if !r.unused_columns.is_empty() {
        out.push_str(&format!("  (ignored)   {}\n", r.unused_columns.join(", ")));
    }
    out.push_str(&format!(
        "end flags        {}: {}\n",
        r.end_flags.convention, r.end_flags.reason
    ));
    if let Some(state) = &r.bootstrap_state {
        out.push_str(&format!("bootstrap state  for --value-net: {state}\n"));
    }
    if let Some(line) = super::table::critic_line(&r.critic) {
        out.push_str(&format!("{line} (returns at gamma {})\n", r.gamma));
    }
    if r.warnings.is_empty() {
        out.push_str("warnings: none\n");
    } else {
        out.push_str("warnings:\n");
        for line in r.warnings.lines() {
            out.push_str(&format!("  - {line}\n"));
        }
    }
    out
}

pub fn render_json(r: &InspectReport) -> String {
    let mut s = serde_json::to_string_pretty(r).expect("report serialises");
    s.push('\n');
    s
}
