//! The rollout-log reader: CSV rows (one per step, episodes possibly interleaved) in, finished
//! episodes out, one at a time. Memory is bounded by the episodes still open and a few blocks
//! of input, never by the file. Every malformed field is an error naming file, line and column.
//!
//! Blocks of whole records are cut sequentially ([`chunks`]), parsed in parallel ([`rows`]),
//! and assembled into episodes sequentially in file order, so results and the first error
//! reported do not depend on the thread count.

pub mod chunks;
pub mod columns;
pub mod fields;
mod pipeline;
pub mod rows;
pub mod source;

pub use columns::{Assignment, ColumnSpec, Role, Schema};
pub use source::Progress;

use crate::episode::{End, Episode, Layout};
use crate::error::{Error, Position, Result};
use crate::warnings::Warnings;
use chunks::{ChunkError, Chunker, Tail, Tuning};
use indicatif::ProgressBar;
use pipeline::{Item, Pipeline};
use rows::{Parsed, Row, RowParser};
use std::collections::{HashMap, VecDeque};
use std::io::Read;
use std::sync::Arc;

/// How to read a log.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ReadOptions {
    pub delimiter: u8,
    pub columns: ColumnSpec,
    pub progress: Progress,
    /// What open episodes may hold in memory.
    pub budget: crate::limits::Budget,
}

impl Default for ReadOptions {
    fn default() -> Self {
        ReadOptions {
            delimiter: b',',
            columns: ColumnSpec::default(),
            progress: Progress::Auto,
            budget: crate::limits::Budget::default(),
        }
    }
}

struct Open {
    episode: Episode,
    last_step: Option<i64>,
}

/// Where parsed blocks come from: a producer thread reading and parsing ahead, or (for tests
/// and fuzzing) the chunker called inline.
enum Feed {
    Threaded(Pipeline),
    /// The chunker and spent blocks to parse into.
    Inline(Chunker, Vec<Parsed>),
}

impl Feed {
    fn next(&mut self, parser: &RowParser) -> Option<Item> {
        match self {
            Feed::Threaded(p) => p.next(),
            Feed::Inline(c, spare) => match c.next_block() {
                Ok(Some(b)) => {
                    let mut parsed = spare.pop().unwrap_or_default();
                    parser.parse_into(&b.bytes, b.first_line, &mut parsed);
                    parsed.tail = b.tail;
                    c.recycle(b.bytes);
                    Some(Item::Block(parsed))
                }
                Ok(None) => None,
                Err(e) => Some(Item::ReadError(e)),
            },
        }
    }

    fn recycle(&mut self, block: Parsed) {
        match self {
            Feed::Threaded(p) => p.recycle(block),
            Feed::Inline(_, spare) => spare.push(block),
        }
    }

    /// Stops reading and returns the chunker (to drain the rest of the stream).
    fn stop(self) -> Option<Chunker> {
        match self {
            Feed::Threaded(p) => p.stop(),
            Feed::Inline(c, _) => Some(c),
        }
    }
}

/// Streaming reader. Call [`LogReader::next_episode`] until it returns `Ok(None)`.
pub struct LogReader {
    /// Reads and parses blocks; None once stopped.
    feed: Option<Feed>,
    parser: Arc<RowParser>,
    file: String,
    schema: Schema,
    layout: Layout,
    has_end_flags: bool,
    /// Parsed blocks not yet assembled, and the position in the first of them.
    pending: VecDeque<Parsed>,
    cursor: usize,
    open: HashMap<Vec<u8>, Open>,
    /// 128-bit digests of finished episodes' ids ([`id_key`]) and the line that ended each,
    /// to detect a reused id: about 32 bytes per finished episode instead of its id.
    ended: HashMap<u128, u64>,
    leftovers: Vec<Episode>,
    input_done: bool,
    at_eof: bool,
    compressed: bool,
    rows: u64,
    /// Approximate bytes held by open episodes, against `budget`.
    held: u64,
    budget: crate::limits::Budget,
    warnings: Warnings,
    bar: Option<ProgressBar>,
}

impl LogReader {
    /// Opens `path` (`-` for stdin) and reads its header row.
    pub fn open(path: &str, options: &ReadOptions) -> Result<Self> {
        let src = source::open(path, options.progress)?;
        let name = source::display_name(path);
        let compressed = src.compressed;
        let mut reader = Self::from_reader(src.reader, &name, options, src.bar);
        if compressed {
            // Damaged deflate data can decode into plausible garbage; gzip's checksum is only
            // read at the end of the stream, so on any input error look there first.
            if let Err(e) = reader {
                // The failed reader consumed the stream; decode a fresh copy (not possible for
                // stdin, which keeps the original error).
                let damage = (path != "-")
                    .then(|| source::open(path, Progress::Hidden).ok())
                    .flatten()
                    .and_then(|mut fresh| stream_damage(&name, &mut fresh.reader));
                return Err(damage.unwrap_or(e));
            }
            if let Ok(r) = reader.as_mut() {
                r.compressed = true;
            }
        }
        reader
    }

    /// Reads from any byte source; `file` is the name used in messages.
    pub fn from_reader(
        input: Box<dyn Read + Send>,
        file: &str,
        options: &ReadOptions,
        bar: Option<ProgressBar>,
    ) -> Result<Self> {
        let tuning = Tuning::for_budget(options.budget);
        Self::from_reader_tuned(input, file, options, bar, tuning)
    }

    /// [`LogReader::from_reader`] with explicit block sizes (tests and fuzzing use tiny
    /// blocks parsed inline; the results are the same whatever the sizes).
    pub fn from_reader_tuned(
        input: Box<dyn Read + Send>,
        file: &str,
        options: &ReadOptions,
        bar: Option<ProgressBar>,
        tuning: Tuning,
    ) -> Result<Self> {
        let mut chunker = Chunker::new(input, options.delimiter, tuning);
        let first = first_records(&mut chunker).map_err(|e| chunk_error(file, e))?;
        let Some(first) = first else {
            return Err(Error::input_hint(
                Position {
                    file: file.into(),
                    ..Default::default()
                },
                "the file is empty (or holds only blank lines)",
                "a log starts with a header row such as: episode,step,reward,terminated,truncated,score_0",
            ));
        };
        // The header is the first record of the first block; the data start past any line
        // breaks after it.
        let (header, mut data_start) = rows::first_record(&first.bytes, options.delimiter);
        while data_start < first.bytes.len() && matches!(first.bytes[data_start], b'\r' | b'\n') {
            data_start += 1;
        }
        let data_line = first.first_line + chunks::line_breaks(&first.bytes[..data_start]);
        let schema = Schema::resolve(&options.columns, header_names(header, file)?, file)?;
        let layout = Layout {
            value: schema.has(Role::Value),
            q: schema.has(Role::Q),
            logp: schema.has(Role::Logp),
            score_dim: schema.scores.len(),
            obs_dim: schema.obs.len(),
            act_dim: schema.act.len(),
            logged: options.columns.logged.clone().into(),
        };
        let has_end_flags = schema.has(Role::Terminated) || schema.has(Role::Truncated);
        let mut warnings = Warnings::default();
        if !has_end_flags {
            warnings.add(
                "no_end_flags",
                "the log has neither a terminated nor a truncated column: each episode ends at \
                 its last row and is taken as terminated",
                None,
            );
        }
        let parser = Arc::new(RowParser::new(&schema, file, options.delimiter));
        let mut pending = VecDeque::new();
        let mut parsed = parser.parse(&first.bytes[data_start..], data_line);
        parsed.tail = first.tail;
        pending.push_back(parsed);
        chunker.recycle(first.bytes);
        let feed = if tuning.threaded {
            Feed::Threaded(Pipeline::start(chunker, Arc::clone(&parser)))
        } else {
            Feed::Inline(chunker, Vec::new())
        };
        Ok(LogReader {
            feed: Some(feed),
            parser,
            file: file.to_string(),
            schema,
            layout,
            has_end_flags,
            pending,
            cursor: 0,
            open: HashMap::new(),
            ended: HashMap::new(),
            leftovers: Vec::new(),
            input_done: false,
            at_eof: false,
            compressed: false,
            rows: 0,
            held: 0,
            budget: options.budget,
            warnings,
            bar,
        })
    }

    pub fn schema(&self) -> &Schema {
        &self.schema
    }

    pub fn file(&self) -> &str {
        &self.file
    }

    /// Data rows read so far.
    pub fn rows(&self) -> u64 {
        self.rows
    }

    pub fn warnings(&self) -> &Warnings {
        &self.warnings
    }

    /// The next finished episode, in the order their end rows appear; episodes still open at
    /// the end of the file follow, in the order they started.
    pub fn next_episode(&mut self) -> Result<Option<Episode>> {
        let next = self.next_inner();
        match next {
            Err(e @ Error::Input(_)) if self.compressed => {
                let damage = self
                    .feed
                    .take()
                    .and_then(Feed::stop)
                    .and_then(|mut chunker| stream_damage(&self.file, chunker.source()));
                Err(damage.unwrap_or(e))
            }
            other => other,
        }
    }

    fn next_inner(&mut self) -> Result<Option<Episode>> {
        while !self.at_eof {
            let Some(block) = self.pending.front() else {
                let next = match &mut self.feed {
                    Some(f) if !self.input_done => f.next(&self.parser),
                    _ => None,
                };
                match next {
                    Some(Item::Block(b)) => self.pending.push_back(b),
                    Some(Item::ReadError(e)) => return Err(chunk_error(&self.file, e)),
                    None => {
                        self.input_done = true;
                        self.finish()?;
                    }
                }
                continue;
            };
            if self.cursor == block.rows.len() {
                let mut block = self.pending.pop_front().expect("front exists");
                self.cursor = 0;
                if let Some(e) = block.error.take() {
                    return Err(e);
                }
                self.check_tail(&block)?;
                if let Some(f) = &mut self.feed {
                    f.recycle(block);
                }
                continue;
            }
            let i = self.cursor;
            self.cursor += 1;
            self.rows += 1;
            let block = self.pending.pop_front().expect("front exists");
            let done = self.assemble(&block, i);
            self.pending.push_front(block);
            if let Some(ep) = done? {
                return Ok(Some(ep));
            }
        }
        Ok(self.leftovers.pop())
    }

    /// Adds row `i` of `block` to its episode; returns the episode if this row ended it.
    fn assemble(&mut self, block: &Parsed, i: usize) -> Result<Option<Episode>> {
        let row: &Row = &block.rows[i];
        let id = block.id(row);
        let line = row.line;
        // Most rows continue an open episode: look it up without moving it or allocating. An
        // open id cannot have ended (ending removes it from `open`, and reopening passes the
        // check below), so only a row starting an episode looks in `ended`.
        if !self.open.contains_key(id) {
            if let Some(end_line) = self.ended.get(&id_key(id)) {
                let id_col = self.schema.column(Role::Episode).expect("required");
                return Err(Error::input_hint(
                    self.parser.at(line, Some(id_col)),
                    format!(
                        "episode '{}' already ended at line {end_line}",
                        fields::shown(id)
                    ),
                    "each episode id must be unique; an id reused after its end row, or an end \
                     flag set on a row before the episode's last one, causes this",
                ));
            }
            let episode = Episode::from_raw_id(id, line, &self.layout);
            self.open.insert(
                id.to_vec(),
                Open {
                    episode,
                    last_step: None,
                },
            );
        }
        let open_count = self.open.len();
        let open = self.open.get_mut(id).expect("inserted above");
        check_step(&self.parser, &self.schema, open, row)?;
        open.last_step = row.step;
        let ep = &mut open.episode;
        let w = self.parser.vector_width();
        // Each step holds its vector fields, up to four scalars and its line number.
        self.held += 8 * (w as u64 + 5);
        if self.held > self.budget.bytes {
            return Err(Error::input_hint(
                self.parser.at(line, None),
                format!(
                    "open episodes hold more than the memory budget of {} MB ({} episodes open; \
                     '{}' has {} steps so far)",
                    self.budget.mb(),
                    open_count,
                    fields::shown(ep.id.as_bytes()),
                    ep.rewards.len() + 1
                ),
                "check that every episode's last row sets terminated or truncated, or raise \
                 --max-memory",
            ));
        }
        push_step(ep, row, &block.vectors[i * w..(i + 1) * w]);
        ep.lines.push(line);
        if row.terminated || row.truncated {
            ep.end = if row.terminated {
                End::Terminated
            } else {
                if row.next_value.is_none() {
                    warn_no_bootstrap(&mut self.warnings, &ep.id, line);
                }
                End::Truncated {
                    bootstrap: row.next_value,
                }
            };
            let done = self.open.remove(id).expect("open above").episode;
            self.held -= 8 * (w as u64 + 5) * done.len() as u64;
            self.ended.insert(id_key(id), line);
            return Ok(Some(done));
        }
        // Remember the last row's bootstrap in case the log ends mid-episode.
        ep.end = End::Truncated {
            bootstrap: row.next_value,
        };
        Ok(None)
    }

    /// A file whose last row has no line break after it may have been cut mid-row (a number
    /// cut short still parses): that is damage when the row leaves its episode open (no
    /// terminated or truncated flag on it, or a log without end flags), and always when the
    /// file ends inside a quoted field. A complete last row that ends its episode is fine.
    fn check_tail(&self, block: &Parsed) -> Result<()> {
        let Some(last) = block.rows.last() else {
            return Ok(());
        };
        let cut = match block.tail {
            Tail::Complete => return Ok(()),
            Tail::InsideQuotes => "the file ends inside a quoted field",
            Tail::NoLineBreak if self.open.contains_key(block.id(last)) => {
                "the file ends inside a row (no line break after it, and its episode is not \
                 ended by a terminated or truncated flag)"
            }
            Tail::NoLineBreak => return Ok(()),
        };
        Err(Error::input_hint(
            self.parser.at(last.line, None),
            format!("{cut}: the log looks cut short"),
            "check that the file was copied or written completely; if it is complete, end it \
             with a line break",
        ))
    }

    fn finish(&mut self) -> Result<()> {
        self.at_eof = true;
        if let Some(bar) = &self.bar {
            bar.finish_and_clear();
        }
        if self.rows == 0 {
            return Err(Error::input(
                Position {
                    file: self.file.clone(),
                    line: Some(1),
                    column: None,
                },
                "the log has a header row but no data rows",
            ));
        }
        let mut open: Vec<Open> = self.open.drain().map(|(_, o)| o).collect();
        // Reverse order so that popping yields them in the order they started.
        open.sort_by_key(|o| std::cmp::Reverse(o.episode.first_line));
        for mut o in open {
            if self.has_end_flags {
                let bootstrap = match o.episode.end {
                    End::Truncated { bootstrap } => bootstrap,
                    End::Terminated => None,
                };
                self.warnings.add(
                    "open_at_end_of_log",
                    "episode still open at the end of the log: taken as truncated",
                    Some(format!(
                        "episode '{}', line {}",
                        fields::shown(o.episode.id.as_bytes()),
                        o.episode.first_line
                    )),
                );
                if bootstrap.is_none() {
                    warn_no_bootstrap(&mut self.warnings, &o.episode.id, o.episode.first_line);
                }
                o.episode.end = End::Truncated { bootstrap };
            } else {
                o.episode.end = End::Terminated;
            }
            self.leftovers.push(o.episode);
        }
        Ok(())
    }
}

/// Appends a row's values (`v`: its scores, obs and act) to its episode.
fn push_step(ep: &mut Episode, row: &Row, v: &[f64]) {
    let (d, o, a) = (ep.score_dim, ep.obs_dim, ep.act_dim);
    ep.scores.extend_from_slice(&v[..d]);
    ep.obs.extend_from_slice(&v[d..d + o]);
    ep.act.extend_from_slice(&v[d + o..d + o + a]);
    ep.logged.extend_from_slice(&v[d + o + a..]);
    ep.rewards.push(row.reward);
    for (x, xs) in [
        (row.value, ep.values.as_mut()),
        (row.q, ep.q.as_mut()),
        (row.logp, ep.logp.as_mut()),
    ] {
        if let (Some(x), Some(xs)) = (x, xs) {
            xs.push(x);
        }
    }
}

/// A row's step must be the previous step of its episode plus 1. checked_add: the step after
/// i64::MAX does not exist (it must not wrap to i64::MIN).
fn check_step(parser: &RowParser, schema: &Schema, open: &Open, row: &Row) -> Result<()> {
    let (Some(step), Some(last)) = (row.step, open.last_step) else {
        return Ok(());
    };
    if last.checked_add(1) == Some(step) {
        return Ok(());
    }
    let c = schema.column(Role::Step).expect("step present");
    let what = if step == last {
        "repeats"
    } else {
        "does not follow"
    };
    Err(Error::input_hint(
        parser.at(row.line, Some(c)),
        format!(
            "step {step} of episode '{}' {what} the previous step {last}",
            fields::shown(open.episode.id.as_bytes())
        ),
        "steps must increase by exactly 1 within an episode",
    ))
}

/// A 128-bit digest of an episode id: two SipHash-1-3 digests with different fixed keys
/// (`DefaultHasher::new` is the same in every run, so this is deterministic). Two distinct ids
/// among n collide with probability about n^2 / 2^129 (1e-25 for ten million episodes).
fn id_key(id: &[u8]) -> u128 {
    use std::hash::{DefaultHasher, Hasher};
    let mut a = DefaultHasher::new();
    a.write(id);
    let mut b = DefaultHasher::new();
    b.write(b"gradaudit id key");
    b.write(id);
    (u128::from(a.finish()) << 64) | u128::from(b.finish())
}

fn warn_no_bootstrap(warnings: &mut Warnings, id: &str, line: u64) {
    warnings.add(
        "truncated_without_bootstrap",
        "truncated episode without a bootstrap value (next_value on its last row): its tail \
         value is taken as 0, which biases value-based estimators",
        Some(format!(
            "episode '{}', line {line}",
            fields::shown(id.as_bytes())
        )),
    );
}

impl Iterator for LogReader {
    type Item = Result<Episode>;
    fn next(&mut self) -> Option<Self::Item> {
        self.next_episode().transpose()
    }
}

/// Reads the rest of a compressed stream; if the decoder reports damage, that is the error to
/// show (whatever the garbage before it looked like).
fn stream_damage(file: &str, rest: &mut dyn Read) -> Option<Error> {
    match std::io::copy(rest, &mut std::io::sink()) {
        Err(io) => match io_error(file, io, None) {
            e @ Error::Input(_) => Some(e),
            _ => None,
        },
        Ok(_) => None,
    }
}

/// The header record's fields as trimmed names: at most [`crate::limits::MAX_COLUMNS`],
/// valid UTF-8, a byte-order mark before the first dropped.
fn header_names(header: Vec<Vec<u8>>, file: &str) -> Result<Vec<String>> {
    if header.len() > crate::limits::MAX_COLUMNS {
        return Err(Error::input(
            Position {
                file: file.into(),
                line: Some(1),
                column: None,
            },
            format!(
                "the header has {} columns, more than the limit of {}",
                header.len(),
                crate::limits::MAX_COLUMNS
            ),
        ));
    }
    let mut headers = Vec::with_capacity(header.len());
    for (i, h) in header.iter().enumerate() {
        // A UTF-8 byte-order mark before the first header is accepted and dropped.
        let h = if i == 0 {
            h.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(h)
        } else {
            h
        };
        let text = std::str::from_utf8(h).map_err(|_| {
            Error::input(
                Position {
                    file: file.into(),
                    line: Some(1),
                    column: Some((i + 1, fields::shown(h))),
                },
                "header is not valid UTF-8",
            )
        })?;
        headers.push(text.trim().to_string());
    }
    Ok(headers)
}

/// The first block holding a record (the header): blocks of blank lines before it (possible
/// when blocks are small) are skipped, as a sequential reader skips blank lines.
fn first_records(chunker: &mut Chunker) -> Result<Option<chunks::Block>, ChunkError> {
    loop {
        match chunker.next_block()? {
            Some(b) if b.bytes.iter().all(|&x| x == b'\n' || x == b'\r') => {
                chunker.recycle(b.bytes)
            }
            other => return Ok(other),
        }
    }
}

/// Maps a chunker error: a record over the limit is an input error at its line.
fn chunk_error(file: &str, e: ChunkError) -> Error {
    match e {
        ChunkError::Io(io) => io_error(file, io, None),
        ChunkError::RecordTooLong { line, limit } => Error::input_hint(
            Position {
                file: file.into(),
                line: Some(line),
                column: None,
            },
            format!(
                "a row starting here runs past the limit of {} without ending",
                size(limit)
            ),
            format!(
                "rows (the header included) may hold at most {} MB, or an eighth of \
                 --max-memory if that is less; an opening quote that is never closed also \
                 makes the rest of the file one row",
                crate::limits::MAX_RECORD_BYTES >> 20
            ),
        ),
    }
}

/// A byte count for messages: whole MB, whole kB, or bytes.
fn size(bytes: usize) -> String {
    if bytes >= 1 << 20 {
        format!("{} MB", bytes >> 20)
    } else if bytes >= 1 << 10 {
        format!("{} kB", bytes >> 10)
    } else {
        format!("{bytes} bytes")
    }
}

/// Maps a read error: decoder failures (damaged or cut gzip) are input errors, the rest I/O.
fn io_error(file: &str, io: std::io::Error, line: Option<u64>) -> Error {
    let corrupt = matches!(
        io.kind(),
        std::io::ErrorKind::InvalidInput
            | std::io::ErrorKind::InvalidData
            | std::io::ErrorKind::UnexpectedEof
    );
    if corrupt {
        Error::input_hint(
            Position {
                file: file.into(),
                line,
                column: None,
            },
            format!("the compressed stream is damaged or cut short: {io}"),
            "check that the .gz file was copied completely (gzip -t FILE)",
        )
    } else {
        Error::io(file, io)
    }
}

#[cfg(test)]
mod props;
