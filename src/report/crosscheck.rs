//! The `crosscheck` report: wire types (JSON schema `gradaudit.crosscheck/1`) and the table and
//! Markdown renderings. Every figure is finite or None.

use super::table::num;
use super::{Tool, finite};
use crate::crosscheck::{CheckConfig, Claim};
use crate::warnings::Warnings;
use serde::Serialize;
use std::collections::BTreeMap;

/// What was read.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Input {
    pub file: String,
    pub rows: u64,
    pub episodes: u64,
    pub steps: u64,
    pub terminated: u64,
    pub truncated: u64,
    /// Distinct environment values (0 without an environment column).
    pub environments: usize,
    #[serde(skip)]
    pub warnings: Warnings,
}

/// The claimed computation.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ClaimInfo {
    pub estimator: String,
    pub gamma: f64,
    pub lambda: Option<f64>,
    pub n: Option<usize>,
}

/// One step of the log as the report shows it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Row {
    pub line: u64,
    pub episode: String,
    /// 0-based step within the episode.
    pub step: usize,
    pub logged: f64,
    /// None when the reference overflowed f64 (the step could not be checked).
    pub reference: Option<f64>,
    pub difference: Option<f64>,
    pub tolerance: Option<f64>,
}

/// Differing steps of one episode.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct EpisodeCount {
    pub episode: String,
    pub first_line: u64,
    pub steps: u64,
    pub differing: u64,
}

/// How a column compares with its reference.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Agreement {
    pub max_abs_error: Option<f64>,
    /// Over steps whose reference is not 0; None when every reference value is 0.
    pub max_rel_error: Option<f64>,
    /// Steps beyond tolerance, the unchecked ones included.
    pub steps_differing: u64,
    /// Steps whose reference or tolerance overflowed f64: they cannot be checked and count as
    /// differing.
    pub unchecked_steps: u64,
    pub share_differing: Option<f64>,
    pub episodes_differing: u64,
    /// The differing step with the lowest line.
    pub first_difference: Option<Row>,
    /// The episodes with the most differing steps (at most 10).
    pub episodes: Vec<EpisodeCount>,
}

/// One fault of the catalogue, judged against the column.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct VariantResult {
    pub name: &'static str,
    pub description: String,
    /// Every step within tolerance of the variant, and the variant differs from the reference.
    pub explains: bool,
    pub steps_matching: u64,
    /// Steps where the variant differs from the reference beyond tolerance.
    pub affected_steps: u64,
    pub affected_episodes: u64,
    pub first_affected_line: Option<u64>,
    /// Fitted values (gamma, lambda, scale, shift, minibatches...).
    pub parameters: BTreeMap<&'static str, f64>,
}

/// The check of one column.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ColumnReport {
    pub column: String,
    /// `advantage` or `return`.
    pub kind: &'static str,
    /// `agrees`, `explained` (differs, and a fault explains it) or `unexplained`.
    pub status: &'static str,
    pub steps: u64,
    pub tolerance: crate::crosscheck::tolerance::Tolerance,
    pub agreement: Agreement,
    /// Empty when the column agrees.
    pub variants: Vec<VariantResult>,
    pub explained_by: Vec<String>,
    /// When no fault explains the column: the rows furthest beyond their tolerance.
    pub worst_rows: Vec<Row>,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CrosscheckReport {
    pub tool: Tool,
    pub input: Input,
    pub claim: ClaimInfo,
    /// Every checked column agrees (exit code 0).
    pub agree: bool,
    pub columns: Vec<ColumnReport>,
    pub warnings: Warnings,
}

impl CrosscheckReport {
    pub fn new(input: Input, cfg: &CheckConfig, columns: Vec<ColumnReport>) -> Self {
        let c = cfg.claim;
        CrosscheckReport {
            tool: Tool {
                schema: "gradaudit.crosscheck/1",
                ..Tool::current()
            },
            claim: ClaimInfo {
                estimator: c.name(),
                gamma: c.gamma,
                lambda: c.lambda(),
                n: match c.claim {
                    Claim::NStep(n) => Some(n),
                    _ => None,
                },
            },
            agree: columns.iter().all(|c| c.status == "agrees"),
            warnings: input.warnings.clone(),
            input,
            columns,
        }
    }
}

fn cell(x: Option<f64>) -> String {
    x.and_then(finite).map_or("-".into(), num)
}

fn row_text(r: &Row) -> String {
    format!(
        "line {}, episode {}, step {}: logged {}, reference {} (difference {}, tolerance {})",
        r.line,
        r.episode,
        r.step,
        num(r.logged),
        cell(r.reference),
        cell(r.difference),
        cell(r.tolerance)
    )
}

fn params_text(p: &BTreeMap<&'static str, f64>) -> String {
    p.iter()
        .filter(|(_, v)| v.is_finite())
        .map(|(k, v)| format!("{k}={}", short(*v)))
        .collect::<Vec<_>>()
        .join(" ")
}

/// A fitted value with enough digits to see a fine grid (at most 9 significant).
fn short(x: f64) -> String {
    let s = format!("{x:.9}");
    let s = s.trim_end_matches('0').trim_end_matches('.');
    if s.is_empty() || s == "-" {
        "0".into()
    } else {
        s.into()
    }
}

/// The one-line verdict of a column.
pub fn verdict(c: &ColumnReport) -> String {
    match c.status {
        "agrees" => format!(
            "agrees with the reference on all {} steps (max abs error {})",
            c.steps,
            cell(c.agreement.max_abs_error)
        ),
        "explained" => {
            let named: Vec<String> = c
                .variants
                .iter()
                .filter(|v| v.explains)
                .map(|v| {
                    let params = if v.parameters.is_empty() {
                        String::new()
                    } else {
                        format!(" ({})", params_text(&v.parameters))
                    };
                    format!(
                        "{}{params}: {} steps in {} episodes differ from the reference, first at \
                         line {}",
                        v.name,
                        v.affected_steps,
                        v.affected_episodes,
                        v.first_affected_line.map_or("-".into(), |l| l.to_string())
                    )
                })
                .collect();
            let lead = if named.len() > 1 {
                "differs; equally explained by"
            } else {
                "differs; explained by"
            };
            format!("{lead} {}", named.join("; or "))
        }
        _ => "differs; no fault of the catalogue explains it (the worst rows are shown)".into(),
    }
}

fn header_lines(r: &CrosscheckReport) -> Vec<String> {
    let i = &r.input;
    vec![
        format!("gradaudit crosscheck of {}", i.file),
        format!(
            "claim      {} at gamma {}",
            r.claim.estimator,
            short(r.claim.gamma)
        ),
        format!(
            "log        {} episodes, {} steps ({} terminated, {} truncated){}",
            i.episodes,
            i.steps,
            i.terminated,
            i.truncated,
            if i.environments > 0 {
                format!(", {} environments", i.environments)
            } else {
                String::new()
            }
        ),
    ]
}

fn tolerance_text(c: &ColumnReport) -> String {
    let t = &c.tolerance;
    match t.unit {
        Some(u) => format!(
            "from the data: u = {} (column: {}; inputs: {}), per step {} .. {}",
            num(u),
            t.column_precision,
            t.input_precision,
            cell(t.min),
            cell(t.max)
        ),
        None => format!("--tolerance {} on every step", cell(t.max)),
    }
}

fn agreement_text(c: &ColumnReport) -> String {
    let a = &c.agreement;
    let unchecked = if a.unchecked_steps > 0 {
        format!(
            "; {} steps could not be checked (their reference overflowed f64)",
            a.unchecked_steps
        )
    } else {
        String::new()
    };
    format!(
        "max abs error {}, max rel error {}; {} of {} steps ({}) beyond tolerance, in {} \
         episodes{unchecked}",
        cell(a.max_abs_error),
        cell(a.max_rel_error),
        a.steps_differing,
        c.steps,
        a.share_differing
            .map_or("-".into(), |s| format!("{:.2}%", 100.0 * s)),
        a.episodes_differing
    )
}

/// The terminal rendering.
pub fn render_table(r: &CrosscheckReport) -> String {
    let mut out = String::new();
    for l in header_lines(r) {
        out.push_str(&l);
        out.push('\n');
    }
    for c in &r.columns {
        out.push_str(&format!(
            "\ncolumn '{}' ({}): {}\n",
            c.column,
            c.kind,
            c.status.to_uppercase()
        ));
        out.push_str(&format!("  tolerance  {}\n", tolerance_text(c)));
        out.push_str(&format!("  agreement  {}\n", agreement_text(c)));
        if let Some(f) = &c.agreement.first_difference {
            out.push_str(&format!("  first      {}\n", row_text(f)));
        }
        for (k, e) in c.agreement.episodes.iter().take(5).enumerate() {
            let lead = if k == 0 {
                "  episodes  "
            } else {
                "            "
            };
            out.push_str(&format!(
                "{lead} {} (line {}): {} of {} steps differ\n",
                e.episode, e.first_line, e.differing, e.steps
            ));
        }
        if !c.variants.is_empty() {
            out.push_str(&format!(
                "  faults checked:\n    {:<34} {:<8} {:>9} {:>9} {:>9} {:>10}  {}\n",
                "variant", "explains", "matching", "affected", "episodes", "first line", "fitted"
            ));
            for v in &c.variants {
                let line = format!(
                    "    {:<34} {:<8} {:>9} {:>9} {:>9} {:>10}  {}",
                    v.name,
                    if v.explains { "YES" } else { "no" },
                    v.steps_matching,
                    v.affected_steps,
                    v.affected_episodes,
                    v.first_affected_line.map_or("-".into(), |l| l.to_string()),
                    params_text(&v.parameters)
                );
                out.push_str(line.trim_end());
                out.push('\n');
            }
        }
        for w in &c.worst_rows {
            out.push_str(&format!("  worst      {}\n", row_text(w)));
        }
        out.push_str(&format!("  verdict    {}\n", verdict(c)));
    }
    for line in r.warnings.lines() {
        out.push_str(&format!("warning: {line}\n"));
    }
    out
}

/// JSON, pretty-printed.
pub fn render_json(r: &CrosscheckReport) -> String {
    let mut s = serde_json::to_string_pretty(r).expect("report serialises");
    s.push('\n');
    s
}

/// Markdown, for pull-request comments.
pub fn render_markdown(r: &CrosscheckReport) -> String {
    let lines = header_lines(r);
    let mut out = format!("### {}\n\n", lines[0]);
    for l in &lines[1..] {
        out.push_str(&format!(
            "- {}\n",
            l.split_whitespace().collect::<Vec<_>>().join(" ")
        ));
    }
    for c in &r.columns {
        out.push_str(&format!(
            "\n#### Column `{}` ({}): {}\n\n",
            c.column, c.kind, c.status
        ));
        out.push_str(&format!("- tolerance: {}\n", tolerance_text(c)));
        out.push_str(&format!("- agreement: {}\n", agreement_text(c)));
        if let Some(f) = &c.agreement.first_difference {
            out.push_str(&format!("- first difference: {}\n", row_text(f)));
        }
        if !c.variants.is_empty() {
            out.push_str(
                "\n| variant | explains | matching | affected | episodes | first line | fitted |\n\
                 |---|---|---|---|---|---|---|\n",
            );
            for v in &c.variants {
                out.push_str(&format!(
                    "| `{}` | {} | {} | {} | {} | {} | {} |\n",
                    v.name,
                    if v.explains { "**yes**" } else { "no" },
                    v.steps_matching,
                    v.affected_steps,
                    v.affected_episodes,
                    v.first_affected_line.map_or("-".into(), |l| l.to_string()),
                    params_text(&v.parameters)
                ));
            }
        }
        for w in &c.worst_rows {
            out.push_str(&format!("- worst: {}\n", row_text(w)));
        }
        out.push_str(&format!("\n**Verdict:** {}\n", verdict(c)));
    }
    if !r.warnings.is_empty() {
        out.push_str("\n**Warnings**\n\n");
        for line in r.warnings.lines() {
            out.push_str(&format!("- {line}\n"));
        }
    }
    out
}
