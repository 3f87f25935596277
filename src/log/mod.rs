//! The rollout-log reader: rows (one per step, episodes possibly interleaved) in, finished
//! episodes out, one at a time. Memory is bounded by the episodes still open and a few blocks
//! of input, never by the file. Every malformed field is an error naming file, line (or row
//! group and row) and column.
//!
//! Formats differ only in how a block of typed rows is produced: CSV blocks of whole records
//! are cut sequentially ([`chunks`]) and parsed in parallel ([`rows`]); Parquet and Arrow
//! files are decoded batch by batch ([`columnar`]). Every block goes through the same
//! sequential episode assembly in file order ([`assemble`]), so results and the first error
//! reported do not depend on the format or the thread count. Several files are read as one
//! log, in the order given.

pub mod assemble;
pub mod chunks;
pub mod columnar;
pub mod columns;
pub mod fields;
mod pipeline;
pub mod rows;
pub mod source;

pub use columns::{Assignment, ColumnSpec, EndFlags, Role, Schema};
pub use source::Progress;

use crate::episode::{Episode, Layout};
use crate::error::{Error, Position, Result};
use crate::warnings::Warnings;
use assemble::{Assembler, Locate, Shape};
use chunks::{ChunkError, Chunker, Tail, Tuning};
use indicatif::ProgressBar;
use pipeline::{Item, Pipeline};
use rows::{Parsed, RowParser};
use std::collections::VecDeque;
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

/// Where parsed CSV blocks come from: a producer thread reading and parsing ahead, or (for
/// tests and fuzzing) the chunker called inline.
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

/// The file being read: CSV blocks (None once stopped) or columnar batches.
enum Source {
    Csv {
        feed: Option<Feed>,
        parser: Arc<RowParser>,
    },
    Columnar(Box<columnar::Batches>, Option<Parsed>),
}

impl Source {
    /// The next block of rows, None at the end of the file.
    fn next(&mut self, file: &str) -> Option<Result<Parsed>> {
        match self {
            Source::Csv { feed, parser } => match feed.as_mut()?.next(parser) {
                Some(Item::Block(b)) => Some(Ok(b)),
                Some(Item::ReadError(e)) => Some(Err(chunk_error(file, e))),
                None => None,
            },
            Source::Columnar(b, spare) => b.next_block(spare.take().unwrap_or_default()).map(Ok),
        }
    }

    fn recycle(&mut self, block: Parsed) {
        match self {
            Source::Csv { feed: Some(f), .. } => f.recycle(block),
            Source::Csv { feed: None, .. } => {}
            Source::Columnar(_, spare) => *spare = Some(block),
        }
    }

    fn loc(&self) -> &dyn Locate {
        match self {
            Source::Csv { parser, .. } => parser.as_ref(),
            Source::Columnar(b, _) => b.locator(),
        }
    }

    /// What a record is called in messages about an earlier file.
    fn unit(&self) -> &'static str {
        match self {
            Source::Csv { .. } => "line",
            Source::Columnar(..) => "row",
        }
    }
}

/// One file opened: its rows' source, its schema, the rows already parsed with its header.
struct Opened {
    source: Source,
    schema: Schema,
    first: Option<Parsed>,
    compressed: bool,
    bar: Option<ProgressBar>,
}

/// Streaming reader. Call [`LogReader::next_episode`] until it returns `Ok(None)`.
pub struct LogReader {
    source: Source,
    /// The file being read, and all of them (for reports).
    file: String,
    label: String,
    /// Files still to read, and the options to open them with.
    rest: VecDeque<String>,
    options: ReadOptions,
    schema: Schema,
    /// Parsed blocks not yet assembled, and the position in the first of them.
    pending: VecDeque<Parsed>,
    cursor: usize,
    assembler: Assembler,
    at_eof: bool,
    compressed: bool,
    rows: u64,
    bar: Option<ProgressBar>,
}

impl LogReader {
    /// Opens `path` (`-` for stdin) and reads its header row.
    pub fn open(path: &str, options: &ReadOptions) -> Result<Self> {
        Self::open_many(&[path.to_string()], options)
    }

    /// Opens several logs read as one, in the order given; a folder stands for its files in
    /// name order. Every file must have the same columns.
    pub fn open_many(paths: &[String], options: &ReadOptions) -> Result<Self> {
        let mut rest: VecDeque<String> = expand(paths)?.into();
        let first = rest.pop_front().expect("expand gives at least one file");
        let opened = open_file(&first, options)?;
        let mut reader = Self::start(opened, &source::display_name(&first), options)?;
        reader.label = std::iter::once(first.as_str())
            .chain(rest.iter().map(String::as_str))
            .map(source::display_name)
            .collect::<Vec<_>>()
            .join(", ");
        reader.rest = rest;
        Ok(reader)
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
        let mut opened = open_csv(input, file, options, tuning)?;
        opened.bar = bar;
        Self::start(opened, file, options)
    }

    fn start(opened: Opened, file: &str, options: &ReadOptions) -> Result<Self> {
        let schema = opened.schema;
        let mut warnings = Warnings::default();
        if !schema.has_end_flags() {
            if schema.env.is_some() {
                return Err(Error::usage(format!(
                    "{file}: --env-col needs an end-flag column (terminated, truncated or \
                     done) to split each environment's rows into episodes"
                )));
            }
            warnings.add(
                "no_end_flags",
                "the log has neither a terminated nor a truncated column: each episode ends at \
                 its last row and is taken as terminated",
                None,
            );
        }
        let shape = Shape {
            layout: Layout {
                value: schema.has(Role::Value),
                q: schema.has(Role::Q),
                logp: schema.has(Role::Logp),
                score_dim: schema.scores.len(),
                obs_dim: schema.obs.len(),
                act_dim: schema.act.len(),
                logged: options.columns.logged.clone().into(),
            },
            has_end_flags: schema.has_end_flags(),
            vector_env: schema.env.is_some(),
            id_col: schema.id_column(),
            step_col: schema.column(Role::Step),
        };
        let mut assembler = Assembler::new(shape, options.budget, warnings);
        assembler.next_file(file, opened.source.unit());
        Ok(LogReader {
            source: opened.source,
            file: file.to_string(),
            label: file.to_string(),
            rest: VecDeque::new(),
            options: options.clone(),
            schema,
            pending: opened.first.into_iter().collect(),
            cursor: 0,
            assembler,
            at_eof: false,
            compressed: opened.compressed,
            rows: 0,
            bar: opened.bar,
        })
    }

    pub fn schema(&self) -> &Schema {
        &self.schema
    }

    /// The log's name for reports: its file, or its files joined with commas.
    #[allow(clippy::misnamed_getters)]
    pub fn file(&self) -> &str {
        &self.label
    }

    /// Data rows read so far.
    pub fn rows(&self) -> u64 {
        self.rows
    }

    pub fn warnings(&self) -> &Warnings {
        &self.assembler.warnings
    }

    /// The next finished episode, in the order their end rows appear; episodes still open at
    /// the end of the log follow, in the order they started.
    pub fn next_episode(&mut self) -> Result<Option<Episode>> {
        let next = self.next_inner();
        match next {
            Err(e @ Error::Input(_)) if self.compressed => {
                let feed = match &mut self.source {
                    Source::Csv { feed, .. } => feed.take(),
                    Source::Columnar(..) => None,
                };
                let damage = feed
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
                match self.source.next(&self.file) {
                    Some(b) => self.pending.push_back(b?),
                    None => self.next_file()?,
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
                self.source.recycle(block);
                continue;
            }
            let i = self.cursor;
            self.cursor += 1;
            self.rows += 1;
            let block = self.pending.front().expect("front exists");
            if let Some(ep) = self.assembler.push(block, i, self.source.loc())? {
                return Ok(Some(ep));
            }
        }
        Ok(self.assembler.leftover())
    }

    /// At the end of a file: the next one (with the same columns), or the end of the log.
    fn next_file(&mut self) -> Result<()> {
        if let Some(bar) = &self.bar {
            bar.finish_and_clear();
        }
        let Some(path) = self.rest.pop_front() else {
            return self.finish();
        };
        let name = source::display_name(&path);
        let opened = open_file(&path, &self.options)?;
        if opened.schema != self.schema {
            return Err(Error::input_hint(
                Position {
                    file: name,
                    line: Some(1),
                    column: None,
                },
                format!("the columns differ from those of {}", self.file),
                "files read as one log must have the same columns in the same order",
            ));
        }
        self.assembler.next_file(&name, opened.source.unit());
        self.source = opened.source;
        self.pending.extend(opened.first);
        self.compressed = opened.compressed;
        self.bar = opened.bar;
        self.file = name;
        Ok(())
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
            Tail::NoLineBreak if self.assembler.is_open(block.id(last)) => {
                "the file ends inside a row (no line break after it, and its episode is not \
                 ended by a terminated or truncated flag)"
            }
            Tail::NoLineBreak => return Ok(()),
        };
        Err(Error::input_hint(
            self.source.loc().at(last.line, None),
            format!("{cut}: the log looks cut short"),
            "check that the file was copied or written completely; if it is complete, end it \
             with a line break",
        ))
    }

    fn finish(&mut self) -> Result<()> {
        self.at_eof = true;
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
        self.assembler.finish(self.source.loc());
        Ok(())
    }
}

impl Iterator for LogReader {
    type Item = Result<Episode>;
    fn next(&mut self) -> Option<Self::Item> {
        self.next_episode().transpose()
    }
}

/// The files of the paths given: a folder stands for its files (not hidden ones) in name
/// order.
fn expand(paths: &[String]) -> Result<Vec<String>> {
    let mut out = Vec::new();
    for p in paths {
        let path = std::path::Path::new(p);
        if p == "-" || !path.is_dir() {
            out.push(p.clone());
            continue;
        }
        let mut names: Vec<String> = std::fs::read_dir(path)
            .map_err(|e| Error::io(p, e))?
            .filter_map(|e| e.ok())
            .filter(|e| e.file_type().is_ok_and(|t| t.is_file()))
            .filter(|e| !e.file_name().to_string_lossy().starts_with('.'))
            .map(|e| e.path().to_string_lossy().into_owned())
            .collect();
        names.sort();
        if names.is_empty() {
            return Err(Error::usage(format!("{p}: the folder holds no files")));
        }
        out.extend(names);
    }
    if out.is_empty() {
        return Err(Error::usage("no log given"));
    }
    Ok(out)
}

/// Opens one file of a log: columnar by its magic bytes, else CSV (gzip-compressed or not).
fn open_file(path: &str, options: &ReadOptions) -> Result<Opened> {
    let name = source::display_name(path);
    if let Some(kind) = source::Columnar::of_path(path) {
        let (batches, schema) = columnar::open(path, &name, kind, &options.columns)?;
        return Ok(Opened {
            source: Source::Columnar(Box::new(batches), None),
            schema,
            first: None,
            compressed: false,
            bar: None,
        });
    }
    let src = source::open(path, options.progress)?;
    let compressed = src.compressed;
    let opened = open_csv(
        src.reader,
        &name,
        options,
        Tuning::for_budget(options.budget),
    );
    if compressed {
        // Damaged deflate data can decode into plausible garbage; gzip's checksum is only
        // read at the end of the stream, so on any input error look there first.
        if let Err(e) = opened {
            // The failed reader consumed the stream; decode a fresh copy (not possible for
            // stdin, which keeps the original error).
            let damage = (path != "-")
                .then(|| source::open(path, Progress::Hidden).ok())
                .flatten()
                .and_then(|mut fresh| stream_damage(&name, &mut fresh.reader));
            return Err(damage.unwrap_or(e));
        }
    }
    opened.map(|mut o| {
        o.compressed = compressed;
        o.bar = src.bar;
        o
    })
}

/// Reads a CSV log's header and first block, and starts its block feed.
fn open_csv(
    input: Box<dyn Read + Send>,
    file: &str,
    options: &ReadOptions,
    tuning: Tuning,
) -> Result<Opened> {
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
    let parser = Arc::new(RowParser::new(&schema, file, options.delimiter));
    let mut parsed = parser.parse(&first.bytes[data_start..], data_line);
    parsed.tail = first.tail;
    chunker.recycle(first.bytes);
    let feed = if tuning.threaded {
        Feed::Threaded(Pipeline::start(chunker, Arc::clone(&parser)))
    } else {
        Feed::Inline(chunker, Vec::new())
    };
    Ok(Opened {
        source: Source::Csv {
            feed: Some(feed),
            parser,
        },
        schema,
        first: Some(parsed),
        compressed: false,
        bar: None,
    })
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
