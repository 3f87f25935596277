//! Parquet and Arrow IPC logs: record batches (the arrow and parquet crates' readers) turned
//! into the same typed rows as a CSV block, so episode assembly, end flags and messages are
//! shared ([`super::assemble`]). Only this module knows columns and types.
//!
//! Scalar columns (integers, floats, booleans; ids may also be strings) map to roles by name
//! as CSV headers do; a list column of numbers (variable or fixed size) maps to a vector role
//! (score, obs, act). A variable list's width is taken from the first row, and every row must
//! have it. Positions are the row group (Parquet) or record batch (Arrow) and the row within
//! it, both counted from 0 as the Arrow and Parquet tools count them.

use super::assemble::Locate;
use super::columns::{ColumnSpec, Role, Schema};
use super::rows::{Parsed, Row};
use super::source::Columnar;
use crate::error::{Error, Position, Result};
use arrow_array::cast::AsArray;
use arrow_array::types::*;
use arrow_array::{Array, ArrayRef, RecordBatch};
use arrow_schema::{ArrowError, DataType, SchemaRef};
use std::fs::File;

/// Rows per decoded batch: large enough that per-batch work vanishes, small enough that a
/// batch of a wide log stays a few MB.
const BATCH_ROWS: usize = 8192;

type BatchIter = Box<dyn Iterator<Item = std::result::Result<RecordBatch, ArrowError>> + Send>;

/// The open columnar file: the batch reader, where each group starts, the column plan.
pub struct Batches {
    reader: BatchIter,
    /// The first batch, read at open to learn variable list widths.
    first: Option<RecordBatch>,
    loc: Locator,
    plan: Plan,
    /// Rows handed out so far.
    rows: u64,
}

/// Row groups (Parquet) or batches (Arrow) and the file's first row of each.
pub struct Locator {
    file: String,
    unit: &'static str,
    starts: Vec<u64>,
    /// Whether `starts` grows as batches arrive (Arrow) or is known from the footer.
    grows: bool,
    headers: Vec<String>,
    /// For list elements (`headers` past the file's `real` columns): the list column's index.
    element_of: Vec<usize>,
    real: usize,
}

impl Locate for Locator {
    fn at(&self, line: u64, col: Option<usize>) -> Position {
        // A list element is reported at its list column.
        let col = col.map(|c| {
            self.element_of
                .get(c)
                .copied()
                .filter(|_| c >= self.real)
                .unwrap_or(c)
        });
        Position {
            file: format!("{}, {}", self.file, self.place(line)),
            line: None,
            column: col.map(|c| (c + 1, self.headers[c].clone())),
        }
    }

    fn place(&self, line: u64) -> String {
        let row = line.saturating_sub(1);
        let g = self.starts.partition_point(|&s| s <= row).saturating_sub(1);
        let start = self.starts.get(g).copied().unwrap_or(0);
        format!("{} {g}, row {}", self.unit, row - start)
    }
}

/// Where each role's values are: batch column indices (the projected order) and, for the
/// vector roles, one source per element in score, obs, act order, then the logged columns.
struct Plan {
    id: usize,
    reward: usize,
    step: Option<usize>,
    terminated: Option<usize>,
    truncated: Option<usize>,
    done: Option<usize>,
    value: Option<usize>,
    next_value: Option<usize>,
    q: Option<usize>,
    logp: Option<usize>,
    /// Per source of vector values: its column and, for a list column, its width.
    vectors: Vec<(usize, Option<usize>)>,
}

/// Opens a columnar file and resolves its columns' roles.
pub fn open(
    path: &str,
    file: &str,
    kind: Columnar,
    spec: &ColumnSpec,
) -> Result<(Batches, Schema)> {
    let f = File::open(path).map_err(|e| Error::io(file, e))?;
    let bad = |e: String| {
        Error::input_hint(
            Position {
                file: file.into(),
                ..Default::default()
            },
            format!("cannot read the {} file: {e}", kind.name()),
            "check that the file was written completely (a cut-off file has no footer)",
        )
    };
    let (mut reader, schema, starts, unit) = reader(f, kind, &bad)?;
    let first = match reader.next() {
        Some(Ok(b)) => Some(b),
        Some(Err(e)) => return Err(bad(format!("{unit} 0: {e}"))),
        None => None,
    };
    let headers: Vec<String> = schema.fields().iter().map(|f| f.name().clone()).collect();
    let widths: Vec<Option<usize>> = schema
        .fields()
        .iter()
        .enumerate()
        .map(|(c, f)| list_width(f.data_type(), first.as_ref().map(|b| b.column(c))))
        .collect();
    let schema_r = Schema::resolve_with_lists(spec, headers, &widths, file)?;
    let plan = Plan::new(&schema_r, &schema, file)?;
    let mut element_of = Vec::new();
    for l in &schema_r.lists {
        element_of.resize(l.first + l.width, 0);
        element_of[l.first..].fill(l.column);
    }
    let loc = Locator {
        file: file.to_string(),
        unit,
        grows: starts.is_empty(),
        starts,
        headers: schema_r.headers.clone(),
        element_of,
        real: schema_r.file_columns(),
    };
    let batches = Batches {
        reader,
        first,
        loc,
        plan,
        rows: 0,
    };
    Ok((batches, schema_r))
}

/// The batch reader of a columnar file, its schema, the first row of each row group (known
/// from a Parquet footer; Arrow batches are counted as they arrive) and the group's name.
fn reader(
    f: File,
    kind: Columnar,
    bad: &dyn Fn(String) -> Error,
) -> Result<(BatchIter, SchemaRef, Vec<u64>, &'static str)> {
    Ok(match kind {
        Columnar::Parquet => {
            use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
            let b = ParquetRecordBatchReaderBuilder::try_new(f).map_err(|e| bad(e.to_string()))?;
            let mut starts = vec![0];
            for g in b.metadata().row_groups() {
                let last = *starts.last().expect("non-empty");
                starts.push(last + g.num_rows().max(0) as u64);
            }
            starts.pop();
            let schema = b.schema().clone();
            let r = b
                .with_batch_size(BATCH_ROWS)
                .build()
                .map_err(|e| bad(e.to_string()))?;
            (Box::new(r), schema, starts, "row group")
        }
        Columnar::ArrowFile => {
            let r =
                arrow_ipc::reader::FileReader::try_new(f, None).map_err(|e| bad(e.to_string()))?;
            let schema = r.schema();
            (Box::new(r), schema, Vec::new(), "batch")
        }
        Columnar::ArrowStream => {
            let r = arrow_ipc::reader::StreamReader::try_new(std::io::BufReader::new(f), None)
                .map_err(|e| bad(e.to_string()))?;
            let schema = r.schema();
            (Box::new(r), schema, Vec::new(), "batch")
        }
    })
}

/// The list width of a column of lists of numbers: fixed by the type, or the first row's.
fn list_width(t: &DataType, first: Option<&ArrayRef>) -> Option<usize> {
    let numeric = |t: &DataType| t.is_numeric() || *t == DataType::Boolean;
    match t {
        DataType::FixedSizeList(f, n) if numeric(f.data_type()) => Some(*n as usize),
        DataType::List(f) | DataType::LargeList(f) if numeric(f.data_type()) => {
            let Some(a) = first.filter(|a| !a.is_empty()) else {
                return Some(0);
            };
            Some(match a.data_type() {
                DataType::List(_) => a.as_list::<i32>().value_length(0) as usize,
                _ => a.as_list::<i64>().value_length(0) as usize,
            })
        }
        _ => None,
    }
}

impl Plan {
    /// Column indices of every role, and a check that each column's type can hold it.
    fn new(s: &Schema, arrow: &SchemaRef, file: &str) -> Result<Plan> {
        let types: Vec<&DataType> = arrow.fields().iter().map(|f| f.data_type()).collect();
        let check = |c: usize, ok: bool, want: &str| -> Result<usize> {
            if ok {
                return Ok(c);
            }
            Err(Error::input_hint(
                Position {
                    file: file.into(),
                    line: None,
                    column: Some((c + 1, s.headers[c].clone())),
                },
                format!("the column holds {}, not {want}", types[c]),
                "write this column with a numeric type (an id may also be a string)",
            ))
        };
        let num = |t: &DataType| t.is_numeric() || *t == DataType::Boolean;
        let int = |t: &DataType| t.is_integer();
        let role = |r: Role, f: &dyn Fn(&DataType) -> bool, want: &str| {
            s.column(r).map(|c| check(c, f(types[c]), want)).transpose()
        };
        let id = s.id_column();
        let id_ok = int(types[id])
            || matches!(
                types[id],
                DataType::Utf8 | DataType::LargeUtf8 | DataType::Utf8View | DataType::Binary
            );
        let mut vectors = Vec::new();
        for cols in [&s.scores, &s.obs, &s.act] {
            if let Some(l) = s.lists.iter().find(|l| Some(&l.first) == cols.first()) {
                vectors.push((l.column, Some(l.width)));
                continue;
            }
            for &c in cols.iter() {
                vectors.push((check(c, num(types[c]), "numbers")?, None));
            }
        }
        for &c in &s.logged {
            vectors.push((check(c, num(types[c]), "numbers")?, None));
        }
        Ok(Plan {
            id: check(id, id_ok, "integers or strings (an id)")?,
            reward: role(Role::Reward, &num, "numbers")?.expect("a required role"),
            step: role(Role::Step, &int, "integers (a step)")?,
            terminated: role(Role::Terminated, &num, "flags")?,
            truncated: role(Role::Truncated, &num, "flags")?,
            done: role(Role::Done, &num, "flags")?,
            value: role(Role::Value, &num, "numbers")?,
            next_value: role(Role::NextValue, &num, "numbers")?,
            q: role(Role::Q, &num, "numbers")?,
            logp: role(Role::Logp, &num, "numbers")?,
            vectors,
        })
    }
}

impl Batches {
    pub fn locator(&self) -> &Locator {
        &self.loc
    }

    /// The next batch as typed rows (into `out`, cleared first), or None at the end. A bad
    /// value ends the rows before it and is kept as the block's error, as in a CSV block.
    pub fn next_block(&mut self, mut out: Parsed) -> Option<Parsed> {
        out.clear();
        let batch = match self.first.take().map(Ok).or_else(|| self.reader.next())? {
            Ok(b) => b,
            Err(e) => {
                out.error = Some(Error::input_hint(
                    self.loc.at(self.rows + 1, None),
                    format!("cannot decode the data: {e}"),
                    "check that the file was written completely and is not damaged",
                ));
                return Some(out);
            }
        };
        if self.loc.grows {
            self.loc.starts.push(self.rows);
        }
        self.plan.convert(&batch, self.rows, &self.loc, &mut out);
        self.rows += batch.num_rows() as u64;
        Some(out)
    }
}

/// A column of numbers of any primitive type (booleans as 0 and 1), read as f64.
enum Nums<'a> {
    F64(&'a [f64]),
    F32(&'a [f32]),
    F16(&'a [half::f16]),
    I64(&'a [i64]),
    I32(&'a [i32]),
    I16(&'a [i16]),
    I8(&'a [i8]),
    U64(&'a [u64]),
    U32(&'a [u32]),
    U16(&'a [u16]),
    U8(&'a [u8]),
    Bool(&'a arrow_array::BooleanArray),
}

impl<'a> Nums<'a> {
    fn of(a: &'a dyn Array) -> Option<Nums<'a>> {
        macro_rules! prim {
            ($t:ty, $v:ident) => {
                a.as_primitive_opt::<$t>().map(|p| Nums::$v(p.values()))
            };
        }
        match a.data_type() {
            DataType::Float64 => prim!(Float64Type, F64),
            DataType::Float32 => prim!(Float32Type, F32),
            DataType::Float16 => prim!(Float16Type, F16),
            DataType::Int64 => prim!(Int64Type, I64),
            DataType::Int32 => prim!(Int32Type, I32),
            DataType::Int16 => prim!(Int16Type, I16),
            DataType::Int8 => prim!(Int8Type, I8),
            DataType::UInt64 => prim!(UInt64Type, U64),
            DataType::UInt32 => prim!(UInt32Type, U32),
            DataType::UInt16 => prim!(UInt16Type, U16),
            DataType::UInt8 => prim!(UInt8Type, U8),
            DataType::Boolean => a.as_boolean_opt().map(Nums::Bool),
            _ => None,
        }
    }

    #[inline]
    fn get(&self, i: usize) -> f64 {
        match self {
            Nums::F64(v) => v[i],
            Nums::F32(v) => f64::from(v[i]),
            Nums::F16(v) => f64::from(v[i]),
            Nums::I64(v) => v[i] as f64,
            Nums::I32(v) => f64::from(v[i]),
            Nums::I16(v) => f64::from(v[i]),
            Nums::I8(v) => f64::from(v[i]),
            Nums::U64(v) => v[i] as f64,
            Nums::U32(v) => f64::from(v[i]),
            Nums::U16(v) => f64::from(v[i]),
            Nums::U8(v) => f64::from(v[i]),
            Nums::Bool(b) => f64::from(u8::from(b.value(i))),
        }
    }

    /// An integer value exactly (None for a fraction or out of range).
    fn int(&self, i: usize) -> Option<i64> {
        match self {
            Nums::I64(v) => Some(v[i]),
            Nums::U64(v) => i64::try_from(v[i]).ok(),
            _ => {
                let x = self.get(i);
                (x.fract() == 0.0 && x.abs() < 9.0e15).then_some(x as i64)
            }
        }
    }
}

/// The first bad value of a batch: (row, column, message); the earliest row wins, then the
/// lowest column, as in a CSV row read left to right.
#[derive(Default)]
struct First(Option<(usize, usize, String)>);

impl First {
    fn set(&mut self, r: usize, c: usize, m: impl FnOnce() -> String) {
        if self.0.as_ref().is_none_or(|e| (r, c) < (e.0, e.1)) {
            self.0 = Some((r, c, m()));
        }
    }
    /// Rows at or past the first error need not be read.
    fn limit(&self, n: usize) -> usize {
        self.0.as_ref().map_or(n, |e| e.0 + 1)
    }
}

const NULL: &str = "the value is missing (null); a value is required here";

/// Reads a numeric column into each row through `put`; `finite` rejects NaN and infinity.
fn each_number(
    a: &dyn Array,
    c: usize,
    n: usize,
    first: &mut First,
    mut put: impl FnMut(usize, f64),
) {
    let nums = Nums::of(a).expect("type checked at open");
    let nulls = a.null_count() > 0;
    for r in 0..first.limit(n).min(n) {
        if nulls && a.is_null(r) {
            first.set(r, c, || NULL.to_string());
            break;
        }
        let x = nums.get(r);
        if !x.is_finite() {
            first.set(r, c, || {
                format!("{x} is not a finite number (NaN and infinity are rejected)")
            });
            break;
        }
        put(r, x);
    }
}

impl Plan {
    fn convert(&self, b: &RecordBatch, start: u64, loc: &Locator, out: &mut Parsed) {
        let n = b.num_rows();
        let mut first = First::default();
        out.rows.extend((0..n).map(|r| Row {
            line: start + r as u64 + 1,
            id: (0, 0),
            reward: 0.0,
            step: None,
            terminated: false,
            truncated: false,
            value: None,
            next_value: None,
            q: None,
            logp: None,
        }));
        self.ids(
            b.column(self.id),
            n,
            &mut first,
            &mut out.rows,
            &mut out.ids,
        );
        self.scalars(b, n, &mut first, &mut out.rows);
        self.flags(b, n, &mut first, &mut out.rows);
        self.vectors(b, n, &mut first, &mut out.vectors);
        if let Some((r, c, m)) = first.0 {
            out.rows.truncate(r);
            let w: usize = self.vectors.iter().map(|v| v.1.unwrap_or(1)).sum();
            out.vectors.truncate(r * w);
            let ids = out.rows.last().map_or(0, |x| x.id.0 + x.id.1);
            out.ids.truncate(ids);
            out.error = Some(Error::input(loc.at(start + r as u64 + 1, Some(c)), m));
        }
    }

    /// Reward, step, value, q, logp and the optional bootstrap value.
    fn scalars(&self, b: &RecordBatch, n: usize, first: &mut First, rows: &mut [Row]) {
        each_number(
            b.column(self.reward).as_ref(),
            self.reward,
            n,
            first,
            |r, x| rows[r].reward = x,
        );
        if let Some(c) = self.step {
            let a = b.column(c);
            let nums = Nums::of(a.as_ref()).expect("type checked at open");
            let end = first.limit(n).min(n);
            for (r, row) in rows.iter_mut().enumerate().take(end) {
                match (a.is_null(r), nums.int(r)) {
                    (false, Some(s)) => row.step = Some(s),
                    (true, _) => first.set(r, c, || NULL.to_string()),
                    (false, None) => first.set(r, c, || "the step is out of range".to_string()),
                }
            }
        }
        for (col, which) in [(self.value, 0), (self.q, 1), (self.logp, 2)] {
            let Some(c) = col else { continue };
            each_number(b.column(c).as_ref(), c, n, first, |r, x| match which {
                0 => rows[r].value = Some(x),
                1 => rows[r].q = Some(x),
                _ => rows[r].logp = Some(x),
            });
        }
        if let Some(c) = self.next_value {
            // An empty bootstrap (null) is allowed, as an empty CSV field is.
            let a = b.column(c);
            let nums = Nums::of(a.as_ref()).expect("type checked at open");
            let end = first.limit(n).min(n);
            for (r, row) in rows.iter_mut().enumerate().take(end) {
                if a.is_valid(r) {
                    let x = nums.get(r);
                    if x.is_finite() {
                        row.next_value = Some(x);
                    } else {
                        first.set(r, c, || format!("{x} is not a finite number"));
                    }
                }
            }
        }
    }

    /// The end flags (0/1 or booleans), resolved as the CSV rows are: terminated = done and
    /// not truncated under the done convention.
    fn flags(&self, b: &RecordBatch, n: usize, first: &mut First, rows: &mut [Row]) {
        let mut flags: [Vec<bool>; 3] = Default::default();
        for (k, col) in [self.terminated, self.truncated, self.done]
            .into_iter()
            .enumerate()
        {
            let Some(c) = col else { continue };
            let f = &mut flags[k];
            f.resize(n, false);
            each_number(b.column(c).as_ref(), c, n, first, |r, x| {
                if x == 0.0 || x == 1.0 {
                    f[r] = x == 1.0;
                }
            });
            let nums = Nums::of(b.column(c).as_ref()).expect("type checked at open");
            for r in 0..first.limit(n).min(n) {
                let x = nums.get(r);
                if x != 0.0 && x != 1.0 {
                    first.set(r, c, || {
                        format!("cannot read {x} as a flag; use 0/1 or true/false")
                    });
                }
            }
        }
        let get = |k: usize, r: usize| flags[k].get(r).copied().unwrap_or(false);
        for (r, row) in rows.iter_mut().enumerate() {
            let (term, trunc, done) = (get(0, r), get(1, r), get(2, r));
            row.terminated = term || (done && !trunc);
            row.truncated = trunc;
        }
    }

    fn ids(&self, a: &ArrayRef, n: usize, first: &mut First, rows: &mut [Row], ids: &mut Vec<u8>) {
        let c = self.id;
        let is_text = text_at(a.as_ref(), 0).is_some() || a.is_empty();
        let nums = Nums::of(a.as_ref());
        for (r, row) in rows.iter_mut().enumerate().take(n) {
            if a.is_null(r) {
                first.set(r, c, || NULL.to_string());
                return;
            }
            let at = ids.len();
            match (text_at(a.as_ref(), r).filter(|_| is_text), &nums) {
                (Some(v), _) => {
                    if v.trim_ascii().is_empty() || v.len() > crate::limits::MAX_ID_BYTES {
                        first.set(r, c, || "the episode id is empty or too long".to_string());
                        return;
                    }
                    ids.extend_from_slice(v);
                }
                (None, Some(Nums::U64(v))) => {
                    use std::io::Write;
                    let _ = write!(ids, "{}", v[r]);
                }
                (None, Some(nums)) => {
                    use std::io::Write;
                    let _ = write!(ids, "{}", nums.int(r).expect("an integer column"));
                }
                (None, None) => unreachable!("type checked at open"),
            }
            row.id = (at, ids.len() - at);
        }
    }

    /// The vector values, row-major: each row's scores, obs and act in schema order.
    fn vectors(&self, b: &RecordBatch, n: usize, first: &mut First, out: &mut Vec<f64>) {
        let w: usize = self.vectors.iter().map(|v| v.1.unwrap_or(1)).sum();
        out.clear();
        out.resize(n * w, 0.0);
        let mut k = 0;
        for &(c, width) in &self.vectors {
            let a = b.column(c);
            match width {
                None => each_number(a.as_ref(), c, n, first, |r, x| out[r * w + k] = x),
                Some(width) => list_into(a, c, width, n, first, |r, j, x| out[r * w + k + j] = x),
            }
            k += width.unwrap_or(1);
        }
    }
}

/// Row `r` of a column of strings or bytes (None for another type).
fn text_at(a: &dyn Array, r: usize) -> Option<&[u8]> {
    if r >= a.len() {
        return None;
    }
    Some(match a.data_type() {
        DataType::Utf8 => a.as_string::<i32>().value(r).as_bytes(),
        DataType::LargeUtf8 => a.as_string::<i64>().value(r).as_bytes(),
        DataType::Utf8View => a.as_string_view().value(r).as_bytes(),
        DataType::Binary => a.as_binary::<i32>().value(r),
        _ => return None,
    })
}

/// Reads a list column's rows (each of `width` numbers) through `put(row, element, value)`.
fn list_into(
    a: &ArrayRef,
    c: usize,
    width: usize,
    n: usize,
    first: &mut First,
    mut put: impl FnMut(usize, usize, f64),
) {
    type Bounds<'a> = Box<dyn Fn(usize) -> (usize, usize) + 'a>;
    let (values, bounds): (&ArrayRef, Bounds) = match a.data_type() {
        DataType::FixedSizeList(..) => {
            let l = a.as_fixed_size_list();
            let off = l.offset();
            (
                l.values(),
                Box::new(move |r| ((off + r) * width, (off + r + 1) * width)),
            )
        }
        DataType::List(_) => {
            let l = a.as_list::<i32>();
            let o = l.value_offsets();
            (
                l.values(),
                Box::new(move |r| (o[r] as usize, o[r + 1] as usize)),
            )
        }
        _ => {
            let l = a.as_list::<i64>();
            let o = l.value_offsets();
            (
                l.values(),
                Box::new(move |r| (o[r] as usize, o[r + 1] as usize)),
            )
        }
    };
    let nums = Nums::of(values.as_ref()).expect("type checked at open");
    let inner_nulls = values.null_count() > 0;
    for r in 0..first.limit(n).min(n) {
        if a.is_null(r) {
            first.set(r, c, || NULL.to_string());
            return;
        }
        let (s, e) = bounds(r);
        if e - s != width {
            first.set(r, c, || {
                format!(
                    "this row's list has {} numbers, the first row's {width}",
                    e - s
                )
            });
            return;
        }
        for (j, i) in (s..e).enumerate() {
            let x = nums.get(i);
            if (inner_nulls && values.is_null(i)) || !x.is_finite() {
                first.set(r, c, || {
                    format!("element {j} of the list is missing or not finite")
                });
                return;
            }
            put(r, j, x);
        }
    }
}
