//! The terminal tables' own look, shared by the audit and sweep tables: no box, the header over
//! a light rule, two spaces between columns, text left-aligned and numbers right-aligned with
//! their decimal points in one column. Also the word wrap that keeps free text within the
//! terminal width.
//!
//! Decimal alignment: a number cell is split into its integer part (up to the first `.`) and
//! the rest (fraction, exponent, a `?` marker); every integer part of a column is padded on the
//! left to the widest one and every rest on the right, so `48.02`, `159.9` and `4372` share the
//! position of the point. A cell that does not start with a digit (`-`, `bias-limited`) is
//! right-aligned as a whole.

/// How a column's cells are placed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Align {
    Left,
    /// Right-aligned, decimal points aligned.
    Number,
}

/// Width of the terminal tables and their text by default.
pub const WIDTH: usize = 100;

/// A table to lay out: headers, one alignment per column, rows of cells.
#[derive(Debug, Clone, Default)]
pub struct Grid {
    pub headers: Vec<String>,
    pub aligns: Vec<Align>,
    pub rows: Vec<Vec<String>>,
}

fn width(s: &str) -> usize {
    s.chars().count()
}

/// Splits a number cell at its decimal point; None for a cell that is not a number.
fn split_number(cell: &str) -> Option<(&str, &str)> {
    let digits = cell.strip_prefix('-').unwrap_or(cell);
    if !digits.starts_with(|c: char| c.is_ascii_digit()) {
        return None;
    }
    let cut = cell
        .find('.')
        .or_else(|| cell.find(|c: char| !(c.is_ascii_digit() || c == '-')))
        .unwrap_or(cell.len());
    Some(cell.split_at(cut))
}

/// The cells of one number column, decimal-aligned and right-aligned to a common width.
fn align_numbers(header: &str, cells: &[&str]) -> Vec<String> {
    let parts: Vec<Option<(&str, &str)>> = cells.iter().map(|c| split_number(c)).collect();
    let int_w = parts
        .iter()
        .flatten()
        .map(|p| width(p.0))
        .max()
        .unwrap_or(0);
    let frac_w = parts
        .iter()
        .flatten()
        .map(|p| width(p.1))
        .max()
        .unwrap_or(0);
    let placed: Vec<String> = cells
        .iter()
        .zip(&parts)
        .map(|(cell, p)| match p {
            Some((i, f)) => format!("{i:>int_w$}{f:<frac_w$}"),
            None => cell.to_string(),
        })
        .collect();
    let w = placed
        .iter()
        .map(|c| width(c))
        .chain([width(header)])
        .max()
        .unwrap_or(0);
    placed.into_iter().map(|c| format!("{c:>w$}")).collect()
}

impl Grid {
    /// Every column's cells (the header first), padded to the column's width.
    fn columns(&self) -> Vec<Vec<String>> {
        (0..self.headers.len())
            .map(|j| {
                let cells: Vec<&str> = self
                    .rows
                    .iter()
                    .map(|r| r.get(j).map_or("", String::as_str))
                    .collect();
                let header = self.headers[j].as_str();
                match self.aligns.get(j).copied().unwrap_or(Align::Left) {
                    Align::Number => {
                        let body = align_numbers(header, &cells);
                        let w = body.first().map_or(width(header), |c| width(c));
                        std::iter::once(format!("{header:>w$}"))
                            .chain(body)
                            .collect()
                    }
                    Align::Left => {
                        let w = cells.iter().map(|c| width(c)).chain([width(header)]).max();
                        let w = w.unwrap_or(0);
                        std::iter::once(header)
                            .chain(cells)
                            .map(|c| format!("{c:<w$}"))
                            .collect()
                    }
                }
            })
            .collect()
    }

    /// The table as text: header, a light rule as wide as the table, the rows.
    pub fn render(&self) -> String {
        let cols = self.columns();
        let line = |i: usize| -> String {
            let cells: Vec<&str> = cols.iter().map(|c| c[i].as_str()).collect();
            cells.join("  ").trim_end().to_string()
        };
        let total: usize =
            cols.iter().map(|c| width(&c[0])).sum::<usize>() + 2 * cols.len().saturating_sub(1);
        let mut out = line(0);
        out.push('\n');
        out.push_str(&"─".repeat(total));
        out.push('\n');
        for i in 1..=self.rows.len() {
            out.push_str(&line(i));
            out.push('\n');
        }
        out
    }
}

/// Wraps `text` at spaces into lines of at most `width` characters (a longer word stays whole);
/// lines after the first start with `indent`.
pub fn wrap(text: &str, width: usize, indent: &str) -> String {
    let mut out = String::new();
    // The text's own leading spaces (an indented line) are kept.
    let mut line = text[..text.len() - text.trim_start_matches(' ').len()].to_string();
    let lead = line.clone();
    for word in text.split(' ').filter(|w| !w.is_empty()) {
        let fresh = line == lead || line == indent;
        if !fresh && self::width(&line) + 1 + self::width(word) > width {
            out.push_str(&line);
            out.push('\n');
            line = indent.to_string();
        } else if !fresh {
            line.push(' ');
        }
        line.push_str(word);
    }
    out.push_str(&line);
    out.push('\n');
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_line_up_on_their_decimal_point() {
        let g = Grid {
            headers: vec!["name".into(), "mse".into()],
            aligns: vec![Align::Left, Align::Number],
            rows: ["48.02", "159.9", "4372", "11.98?", "-", "1.767e3"]
                .iter()
                .map(|v| vec!["x".to_string(), v.to_string()])
                .collect(),
        };
        let text = g.render();
        let lines: Vec<&str> = text.lines().collect();
        // Every line with a point has it in the same column.
        let points: Vec<usize> = lines[2..].iter().filter_map(|l| l.find('.')).collect();
        assert_eq!(points.len(), 4, "{text}");
        assert!(points.iter().all(|p| *p == points[0]), "{text}");
        // "4372" ends where the other integer parts end; the dash sits at the right edge.
        assert_eq!(lines[4].find("4372").unwrap() + 4, points[0], "{text}");
        assert!(lines[1].chars().all(|c| c == '─'), "{text}");
        assert!(!text.contains('│') && !text.contains('┌'), "{text}");
    }

    #[test]
    fn wrap_keeps_lines_within_the_width() {
        let text = "note (total): episodes_for_snr assumes no bias: the estimated bias^2 \
                    (1.767e3) would make snr 1 unreachable but is not distinguishable from noise";
        let out = wrap(text, 40, "  ");
        assert!(out.lines().all(|l| l.chars().count() <= 40), "{out}");
        assert!(out.lines().skip(1).all(|l| l.starts_with("  ")), "{out}");
        let words: Vec<&str> = out.split_whitespace().collect();
        assert_eq!(words, text.split_whitespace().collect::<Vec<_>>());
        assert_eq!(wrap("  150 episodes", 40, "    "), "  150 episodes\n");
    }
}
