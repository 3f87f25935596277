//! Parsing a block of CSV records into typed rows. Pure and stateless, so blocks are parsed in
//! parallel; a block stops at its first bad field and keeps that error for the assembler to
//! raise in file order.

use super::columns::{Role, Schema};
use super::fields::{self, FieldProblem};
use crate::error::{Error, Position};

/// One step as read from the log. Vector fields live in the block's `vectors` (scores, obs,
/// act, in that order), the episode id in its `ids`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Row {
    pub line: u64,
    pub id: (usize, usize),
    pub reward: f64,
    pub step: Option<i64>,
    pub terminated: bool,
    pub truncated: bool,
    pub value: Option<f64>,
    pub next_value: Option<f64>,
    pub q: Option<f64>,
    pub logp: Option<f64>,
}

/// The rows of one block, then the error that stopped it (if any).
#[derive(Debug, Default)]
pub struct Parsed {
    pub rows: Vec<Row>,
    pub ids: Vec<u8>,
    pub vectors: Vec<f64>,
    pub error: Option<Error>,
}

impl Parsed {
    /// Empties the block, keeping its allocations for the next one.
    pub fn clear(&mut self) {
        self.rows.clear();
        self.ids.clear();
        self.vectors.clear();
        self.error = None;
    }

    pub fn id(&self, row: &Row) -> &[u8] {
        &self.ids[row.id.0..row.id.0 + row.id.1]
    }
}

/// Column indices resolved once from the schema.
pub struct RowParser {
    file: String,
    headers: Vec<String>,
    delimiter: u8,
    episode: usize,
    reward: usize,
    step: Option<usize>,
    terminated: Option<usize>,
    truncated: Option<usize>,
    value: Option<usize>,
    next_value: Option<usize>,
    q: Option<usize>,
    logp: Option<usize>,
    vectors: Vec<usize>,
}

impl RowParser {
    pub fn new(schema: &Schema, file: &str, delimiter: u8) -> RowParser {
        let mut vectors = schema.scores.clone();
        vectors.extend(&schema.obs);
        vectors.extend(&schema.act);
        RowParser {
            file: file.to_string(),
            headers: schema.headers.clone(),
            delimiter,
            episode: schema.column(Role::Episode).expect("required role"),
            reward: schema.column(Role::Reward).expect("required role"),
            step: schema.column(Role::Step),
            terminated: schema.column(Role::Terminated),
            truncated: schema.column(Role::Truncated),
            value: schema.column(Role::Value),
            next_value: schema.column(Role::NextValue),
            q: schema.column(Role::Q),
            logp: schema.column(Role::Logp),
            vectors,
        }
    }

    /// Fields per row of the vector block (scores + obs + act).
    pub fn vector_width(&self) -> usize {
        self.vectors.len()
    }

    pub fn at(&self, line: u64, col: Option<usize>) -> Position {
        Position {
            file: self.file.clone(),
            line: Some(line),
            column: col.map(|c| (c + 1, self.headers[c].clone())),
        }
    }

    /// Parses a block whose first record starts on line `first_line`.
    pub fn parse(&self, bytes: &[u8], first_line: u64) -> Parsed {
        let mut out = Parsed::default();
        self.parse_into(bytes, first_line, &mut out);
        out
    }

    /// Parses into `out` (cleared first), reusing its buffers.
    pub fn parse_into(&self, bytes: &[u8], first_line: u64, out: &mut Parsed) {
        out.clear();
        let mut rdr = csv::ReaderBuilder::new()
            .delimiter(self.delimiter)
            .has_headers(false)
            .flexible(true)
            .from_reader(bytes);
        let mut rec = csv::ByteRecord::new();
        loop {
            match rdr.read_byte_record(&mut rec) {
                Ok(false) => break,
                Ok(true) => {}
                Err(e) => {
                    let line = e
                        .position()
                        .map_or(first_line, |p| first_line + p.line() - 1);
                    out.error = Some(Error::input(self.at(line, None), format!("{:?}", e.kind())));
                    break;
                }
            }
            let line = rec
                .position()
                .map_or(first_line, |p| first_line + p.line() - 1);
            match self.row(&rec, line, out) {
                Ok(row) => out.rows.push(row),
                Err(e) => {
                    out.error = Some(e);
                    break;
                }
            }
        }
    }

    fn field_error(&self, rec: &csv::ByteRecord, line: u64, col: usize, p: FieldProblem) -> Error {
        Error::input(self.at(line, Some(col)), p.describe(&rec[col]))
    }

    fn row(&self, rec: &csv::ByteRecord, line: u64, out: &mut Parsed) -> Result<Row, Error> {
        let width = self.headers.len();
        if rec.len() != width {
            if rec.len() == 1 && rec[0].is_empty() {
                return Err(Error::input(
                    self.at(line, None),
                    "blank line inside the log",
                ));
            }
            return Err(Error::input(
                self.at(line, None),
                format!(
                    "this row has {} fields but the header has {width}",
                    rec.len()
                ),
            ));
        }
        let num = |c: usize| fields::number(&rec[c]).map_err(|p| self.field_error(rec, line, c, p));
        let opt_num = |c: Option<usize>| c.map(num).transpose();
        let flag = |c: Option<usize>| match c {
            Some(c) => fields::boolean(&rec[c]).map_err(|p| self.field_error(rec, line, c, p)),
            None => Ok(false),
        };
        let id = &rec[self.episode];
        if id.trim_ascii().is_empty() {
            return Err(Error::input(
                self.at(line, Some(self.episode)),
                "the episode id is empty",
            ));
        }
        let row = Row {
            line,
            id: (out.ids.len(), id.len()),
            reward: num(self.reward)?,
            step: match self.step {
                Some(c) => {
                    Some(fields::integer(&rec[c]).map_err(|p| self.field_error(rec, line, c, p))?)
                }
                None => None,
            },
            terminated: flag(self.terminated)?,
            truncated: flag(self.truncated)?,
            value: opt_num(self.value)?,
            q: opt_num(self.q)?,
            logp: opt_num(self.logp)?,
            next_value: match self.next_value {
                Some(c) => fields::optional_number(&rec[c])
                    .map_err(|p| self.field_error(rec, line, c, p))?,
                None => None,
            },
        };
        for &c in &self.vectors {
            out.vectors.push(num(c)?);
        }
        out.ids.extend_from_slice(id);
        Ok(row)
    }
}
