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
    scratch: Scratch,
    /// How the block's bytes end (only the file's last block can be cut short).
    pub tail: super::chunks::Tail,
}

impl Parsed {
    /// Empties the block, keeping its allocations for the next one.
    pub fn clear(&mut self) {
        self.rows.clear();
        self.ids.clear();
        self.vectors.clear();
        self.error = None;
        self.tail = super::chunks::Tail::Complete;
    }

    pub fn id(&self, row: &Row) -> &[u8] {
        &self.ids[row.id.0..row.id.0 + row.id.1]
    }
}

/// One record's fields, from either tokenizer.
trait Fields {
    fn count(&self) -> usize;
    fn field(&self, i: usize) -> &[u8];
}

/// A record read by csv-core: field i is data[ends[i - 1]..ends[i]].
struct Core<'a> {
    data: &'a [u8],
    ends: &'a [usize],
}

impl Fields for Core<'_> {
    fn count(&self) -> usize {
        self.ends.len()
    }
    fn field(&self, i: usize) -> &[u8] {
        let start = if i == 0 { 0 } else { self.ends[i - 1] };
        &self.data[start..self.ends[i]]
    }
}

/// Buffers csv-core writes a record's fields into, kept with a block for reuse.
#[derive(Debug, Default)]
pub struct Scratch {
    data: Vec<u8>,
    ends: Vec<usize>,
}

/// A record just read: the input bytes it took and its field count.
struct Read {
    consumed: usize,
    fields: usize,
}

/// Reads the next record from `bytes[*pos..]` (the end of `bytes` is the end of the input),
/// growing the scratch buffers as needed; None at the end.
fn next_record(
    rdr: &mut csv_core::Reader,
    bytes: &[u8],
    pos: &mut usize,
    s: &mut Scratch,
) -> Option<Read> {
    use csv_core::ReadRecordResult as R;
    let (start, mut nout, mut nend) = (*pos, 0, 0);
    loop {
        let (res, nin, o, e) =
            rdr.read_record(&bytes[*pos..], &mut s.data[nout..], &mut s.ends[nend..]);
        *pos += nin;
        nout += o;
        nend += e;
        match res {
            // At the end of `bytes` the next call passes empty input, which ends the record.
            R::InputEmpty => {}
            R::OutputFull => s.data.resize(s.data.len() * 2, 0),
            R::OutputEndsFull => s.ends.resize(s.ends.len() * 2, 0),
            R::Record => {
                return Some(Read {
                    consumed: *pos - start,
                    fields: nend,
                });
            }
            R::End => return None,
        }
    }
}

/// A line split at the delimiter: field i is line[bounds[i]..bounds[i + 1] - 1].
struct Split<'a> {
    line: &'a [u8],
    /// Start of each field, plus one past the end of the line + 1 (so every field ends one
    /// byte before the next start).
    bounds: &'a [usize],
}

impl Fields for Split<'_> {
    fn count(&self) -> usize {
        self.bounds.len() - 1
    }
    fn field(&self, i: usize) -> &[u8] {
        &self.line[self.bounds[i]..self.bounds[i + 1] - 1]
    }
}

/// The line of a byte offset in a block, counted forward incrementally (offsets only grow).
pub struct LineCounter<'a> {
    bytes: &'a [u8],
    at: usize,
    line: u64,
}

impl<'a> LineCounter<'a> {
    pub fn new(bytes: &'a [u8], first_line: u64) -> Self {
        LineCounter {
            bytes,
            at: 0,
            line: first_line,
        }
    }

    /// The line on which the record starting at (or just after line breaks at) `offset` sits.
    pub fn line_at(&mut self, offset: usize) -> u64 {
        let mut b = offset.min(self.bytes.len());
        while b < self.bytes.len() && matches!(self.bytes[b], b'\r' | b'\n') {
            b += 1;
        }
        if b > self.at {
            self.line += super::chunks::line_breaks(&self.bytes[self.at..b]);
            self.at = b;
        }
        self.line
    }
}

thread_local! {
    /// csv-core tokenizers built on this thread, by delimiter: building one (its DFA) costs
    /// more than parsing a small block, and csv-core's `Clone` for its reader copies only
    /// part of the DFA, so built ones are kept, reset, and reused.
    static CORES: std::cell::RefCell<Vec<(u8, csv_core::Reader)>> =
        const { std::cell::RefCell::new(Vec::new()) };
}

/// Runs `f` with a reset tokenizer for `delimiter`. `primed`: it has read a blank line, so it
/// strips no byte-order mark at a block's start (a sequential reader strips one only at the
/// file's start, which is where the header is read, unprimed).
fn with_core<R>(delimiter: u8, primed: bool, f: impl FnOnce(&mut csv_core::Reader) -> R) -> R {
    let taken = CORES.with(|c| {
        let mut c = c.borrow_mut();
        let i = c.iter().position(|(d, _)| *d == delimiter);
        i.map(|i| c.swap_remove(i).1)
    });
    let mut rdr =
        taken.unwrap_or_else(|| csv_core::ReaderBuilder::new().delimiter(delimiter).build());
    rdr.reset();
    if primed {
        let _ = rdr.read_record(b"\n", &mut [0; 8], &mut [0; 8]);
    }
    let out = f(&mut rdr);
    CORES.with(|c| c.borrow_mut().push((delimiter, rdr)));
    out
}

/// The first record of `bytes` as owned fields (a UTF-8 byte-order mark before it dropped),
/// and the bytes it took.
pub fn first_record(bytes: &[u8], delimiter: u8) -> (Vec<Vec<u8>>, usize) {
    let mut s = Scratch::default();
    s.data.resize(bytes.len().max(64), 0);
    s.ends.resize(64, 0);
    let mut pos = 0;
    with_core(delimiter, false, |rdr| {
        match next_record(rdr, bytes, &mut pos, &mut s) {
            Some(n) => {
                let rec = Core {
                    data: &s.data,
                    ends: &s.ends[..n.fields],
                };
                ((0..n.fields).map(|i| rec.field(i).to_vec()).collect(), pos)
            }
            None => (Vec::new(), pos),
        }
    })
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
    done: Option<usize>,
    value: Option<usize>,
    next_value: Option<usize>,
    q: Option<usize>,
    logp: Option<usize>,
    vectors: Vec<usize>,
}

impl super::assemble::Locate for RowParser {
    fn at(&self, line: u64, col: Option<usize>) -> Position {
        RowParser::at(self, line, col)
    }

    fn place(&self, line: u64) -> String {
        format!("line {line}")
    }
}

impl RowParser {
    pub fn new(schema: &Schema, file: &str, delimiter: u8) -> RowParser {
        let mut vectors = schema.scores.clone();
        vectors.extend(&schema.obs);
        vectors.extend(&schema.act);
        vectors.extend(&schema.logged);
        RowParser {
            file: file.to_string(),
            headers: schema.headers.clone(),
            delimiter,
            episode: schema.id_column(),
            reward: schema.column(Role::Reward).expect("required role"),
            step: schema.column(Role::Step),
            terminated: schema.column(Role::Terminated),
            truncated: schema.column(Role::Truncated),
            done: schema.column(Role::Done),
            value: schema.column(Role::Value),
            next_value: schema.column(Role::NextValue),
            q: schema.column(Role::Q),
            logp: schema.column(Role::Logp),
            vectors,
        }
    }

    /// Fields per row of the vector block (scores + obs + act + logged columns).
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
        // Without quotes a record is a line (ended by \n, \r\n or a lone \r) and a field is
        // the text between delimiters: split with memchr instead of the general CSV state
        // machine. Blank lines are skipped, as the csv crate does.
        if memchr::memchr(b'"', bytes).is_none() {
            self.parse_lines(bytes, first_line, out);
        } else {
            self.parse_csv(bytes, first_line, out);
        }
    }

    fn parse_lines(&self, bytes: &[u8], first_line: u64, out: &mut Parsed) {
        let mut bounds = Vec::with_capacity(self.headers.len() + 1);
        let mut line_no = first_line;
        let mut start = 0;
        while start < bytes.len() {
            let end =
                memchr::memchr2(b'\n', b'\r', &bytes[start..]).map_or(bytes.len(), |i| start + i);
            let line = &bytes[start..end];
            if !line.is_empty() {
                bounds.clear();
                bounds.push(0);
                bounds.extend(memchr::memchr_iter(self.delimiter, line).map(|i| i + 1));
                bounds.push(line.len() + 1);
                let rec = Split {
                    line,
                    bounds: &bounds,
                };
                match self.row(&rec, line_no, out) {
                    Ok(row) => out.rows.push(row),
                    Err(e) => {
                        out.error = Some(e);
                        return;
                    }
                }
            }
            line_no += 1;
            let crlf = bytes.get(end) == Some(&b'\r') && bytes.get(end + 1) == Some(&b'\n');
            start = end + if crlf { 2 } else { 1 };
        }
    }

    /// The general path: csv-core's tokenizer, reused with the block's buffers.
    fn parse_csv(&self, bytes: &[u8], first_line: u64, out: &mut Parsed) {
        let mut scratch = std::mem::take(&mut out.scratch);
        scratch.data.resize(bytes.len().max(64), 0);
        scratch.ends.resize(self.headers.len() + 1, 0);
        // Line numbers are counted from byte offsets (a record's start, past the line breaks
        // before it), the same way for both paths.
        let mut lines = LineCounter::new(bytes, first_line);
        let mut pos = 0;
        with_core(self.delimiter, true, |rdr| {
            while let Some(n) = next_record(rdr, bytes, &mut pos, &mut scratch) {
                let start = pos - n.consumed;
                let rec = Core {
                    data: &scratch.data,
                    ends: &scratch.ends[..n.fields],
                };
                match self.row(&rec, lines.line_at(start), out) {
                    Ok(row) => out.rows.push(row),
                    Err(e) => {
                        out.error = Some(e);
                        break;
                    }
                }
            }
        });
        out.scratch = scratch;
    }

    fn field_error<F: Fields>(&self, rec: &F, line: u64, col: usize, p: FieldProblem) -> Error {
        Error::input(self.at(line, Some(col)), p.describe(rec.field(col)))
    }

    fn row<F: Fields>(&self, rec: &F, line: u64, out: &mut Parsed) -> Result<Row, Error> {
        let width = self.headers.len();
        if rec.count() != width {
            return Err(Error::input(
                self.at(line, None),
                format!(
                    "this row has {} fields but the header has {width}",
                    rec.count()
                ),
            ));
        }
        let num =
            |c: usize| fields::number(rec.field(c)).map_err(|p| self.field_error(rec, line, c, p));
        let opt_num = |c: Option<usize>| c.map(num).transpose();
        let flag = |c: Option<usize>| match c {
            Some(c) => fields::boolean(rec.field(c)).map_err(|p| self.field_error(rec, line, c, p)),
            None => Ok(false),
        };
        let id = rec.field(self.episode);
        if id.trim_ascii().is_empty() {
            return Err(Error::input(
                self.at(line, Some(self.episode)),
                "the episode id is empty",
            ));
        }
        if id.len() > crate::limits::MAX_ID_BYTES {
            return Err(Error::input(
                self.at(line, Some(self.episode)),
                format!(
                    "the episode id \"{}\" is {} bytes long, more than the limit of {} bytes",
                    fields::shown(id),
                    id.len(),
                    crate::limits::MAX_ID_BYTES
                ),
            ));
        }
        // Fields are checked in the order of this list (the first bad one is reported).
        let reward = num(self.reward)?;
        let step = match self.step {
            Some(c) => {
                Some(fields::integer(rec.field(c)).map_err(|p| self.field_error(rec, line, c, p))?)
            }
            None => None,
        };
        let (terminated, truncated) = (flag(self.terminated)?, flag(self.truncated)?);
        let done = flag(self.done)?;
        let row = Row {
            line,
            id: (out.ids.len(), id.len()),
            reward,
            step,
            // The done convention: terminated = done and not truncated.
            terminated: terminated || (done && !truncated),
            truncated,
            value: opt_num(self.value)?,
            q: opt_num(self.q)?,
            logp: opt_num(self.logp)?,
            next_value: match self.next_value {
                Some(c) => fields::optional_number(rec.field(c))
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::log::ColumnSpec;

    fn parser() -> RowParser {
        let headers = [
            "episode",
            "step",
            "reward",
            "terminated",
            "next_value",
            "score_0",
        ];
        let schema = Schema::resolve(
            &ColumnSpec::default(),
            headers.iter().map(|h| h.to_string()).collect(),
            "t.csv",
        )
        .unwrap();
        RowParser::new(&schema, "t.csv", b',')
    }

    // The same records with LF endings (memchr path) and with CRLF endings and quoted ids
    // (csv-core path, which the fast path leaves to the general tokenizer) must give the same
    // rows and line numbers, blank lines included, and the same first error.
    #[test]
    fn both_tokenizers_agree() {
        let lf = "a,0,1.5,0,,0.25\nb,0,-2,1,,1e-3\n\na,1,3,1,4.5,-7\nc,0,0,1,,2";
        let crlf = lf
            .replace('\n', "\r\n")
            .replace("a,", "\"a\",")
            .replace("b,", "\"b\",");
        let p = parser();
        let (x, y) = (p.parse(lf.as_bytes(), 2), p.parse(crlf.as_bytes(), 2));
        assert!(
            x.error.is_none() && y.error.is_none(),
            "{:?} {:?}",
            x.error,
            y.error
        );
        assert_eq!(x.rows, y.rows);
        assert_eq!(
            x.rows.iter().map(|r| r.line).collect::<Vec<_>>(),
            vec![2, 3, 5, 6]
        );
        assert_eq!(
            (x.ids.clone(), x.vectors.clone()),
            (y.ids.clone(), y.vectors.clone())
        );
        let bad = "a,0,1,0,,1\na,1,x,1,,1\n";
        let (e1, e2) = (
            p.parse(bad.as_bytes(), 2).error.unwrap(),
            p.parse(
                bad.replace('\n', "\r\n").replace("a,", "\"a\",").as_bytes(),
                2,
            )
            .error
            .unwrap(),
        );
        assert_eq!(e1.to_string(), e2.to_string());
        assert!(
            e1.to_string().contains("line 3, column 3 ('reward')"),
            "{e1}"
        );
    }
}
