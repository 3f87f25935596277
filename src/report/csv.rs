//! CSV rendering of an audit: one row per estimator, full precision, empty cells where a figure
//! is undefined (never NaN or inf).

use super::AuditReport;
use super::columns::{COLUMNS, Cell};

pub fn render(r: &AuditReport) -> String {
    let mut w = ::csv::Writer::from_writer(Vec::new());
    let mut header: Vec<&str> = COLUMNS.iter().map(|c| c.key).collect();
    header[0] = "estimator";
    header.push("bias_detected");
    header.push("bias_p");
    header.push("bias_p_adjusted");
    header.push("bias_control");
    header.push("noise_scale");
    header.push("reference");
    header.push("notes");
    w.write_record(&header).expect("writing to memory");
    for row in &r.estimators {
        let mut cells: Vec<String> = COLUMNS
            .iter()
            .map(|c| match (c.cell)(row) {
                Cell::Num(x) => super::finite_cell(x),
                Cell::Count(n) => n.map_or(String::new(), |n| n.to_string()),
                Cell::Text(t) => t,
            })
            .collect();
        // CSV keeps numbers machine-readable: the '?' marker becomes its own column.
        if let Some(i) = COLUMNS.iter().position(|c| c.key == "bias_sq") {
            cells[i] = super::finite_cell(row.bias_sq);
        }
        cells[0] = row.name.clone();
        cells.push(row.bias_detected.to_string());
        cells.push(super::finite_cell(row.bias_p));
        cells.push(super::finite_cell(row.bias_p_adjusted));
        let sig = &r.significance;
        cells.push(format!("{}@{}", sig.multiplicity.key(), sig.level));
        cells.push(super::finite_cell(row.noise_scale));
        cells.push(row.reference.to_string());
        cells.push(row.notes.join("; "));
        w.write_record(&cells).expect("writing to memory");
    }
    String::from_utf8(w.into_inner().expect("in-memory writer")).expect("csv of UTF-8 text")
}
