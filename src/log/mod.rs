//! The rollout-log reader: CSV rows (one per step, episodes possibly interleaved) in, finished
//! episodes out, one at a time. Memory is bounded by the episodes still open, never by the file.
//! Every malformed field is an error naming file, line and column.

pub mod columns;
pub mod fields;
pub mod source;

pub use columns::{Assignment, ColumnSpec, Role, Schema};
pub use source::Progress;

use crate::episode::{End, Episode, Layout};
use crate::error::{Error, Position, Result};
use crate::warnings::Warnings;
use csv::ByteRecord;
use fields::FieldProblem;
use indicatif::ProgressBar;
use std::collections::HashMap;
use std::io::Read;

/// How to read a log.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ReadOptions {
    pub delimiter: u8,
    pub columns: ColumnSpec,
    pub progress: Progress,
}

impl Default for ReadOptions {
    fn default() -> Self {
        ReadOptions {
            delimiter: b',',
            columns: ColumnSpec::default(),
            progress: Progress::Auto,
        }
    }
}

struct Open {
    episode: Episode,
    last_step: Option<i64>,
}

/// Streaming reader. Call [`LogReader::next_episode`] until it returns `Ok(None)`.
pub struct LogReader {
    csv: csv::Reader<Box<dyn Read>>,
    file: String,
    schema: Schema,
    layout: Layout,
    has_end_flags: bool,
    record: ByteRecord,
    open: HashMap<Vec<u8>, Open>,
    /// Ids of finished episodes and the line that ended each, to detect a reused id.
    ended: HashMap<Vec<u8>, u64>,
    leftovers: Vec<Episode>,
    at_eof: bool,
    compressed: bool,
    rows: u64,
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
        input: Box<dyn Read>,
        file: &str,
        options: &ReadOptions,
        bar: Option<ProgressBar>,
    ) -> Result<Self> {
        let mut csv = csv::ReaderBuilder::new()
            .delimiter(options.delimiter)
            .has_headers(false)
            .flexible(true)
            .buffer_capacity(1 << 16)
            .from_reader(input);
        let mut header = ByteRecord::new();
        let got = csv
            .read_byte_record(&mut header)
            .map_err(|e| csv_error(file, e))?;
        if !got {
            return Err(Error::input_hint(
                Position {
                    file: file.into(),
                    ..Default::default()
                },
                "the file is empty",
                "a log starts with a header row such as: episode,step,reward,terminated,truncated,score_0",
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
        let schema = Schema::resolve(&options.columns, headers, file)?;
        let layout = Layout {
            value: schema.has(Role::Value),
            q: schema.has(Role::Q),
            logp: schema.has(Role::Logp),
            score_dim: schema.scores.len(),
            obs_dim: schema.obs.len(),
            act_dim: schema.act.len(),
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
        Ok(LogReader {
            csv,
            file: file.to_string(),
            schema,
            layout,
            has_end_flags,
            record: ByteRecord::new(),
            open: HashMap::new(),
            ended: HashMap::new(),
            leftovers: Vec::new(),
            at_eof: false,
            compressed: false,
            rows: 0,
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

    /// Episodes currently open (started, not yet ended).
    pub fn open_episodes(&self) -> usize {
        self.open.len()
    }

    /// The next finished episode, in the order their end rows appear; episodes still open at
    /// the end of the file follow, in the order they started.
    pub fn next_episode(&mut self) -> Result<Option<Episode>> {
        let next = self.next_inner();
        match next {
            Err(e @ Error::Input(_)) if self.compressed => {
                Err(stream_damage(&self.file, self.csv.get_mut()).unwrap_or(e))
            }
            other => other,
        }
    }

    fn next_inner(&mut self) -> Result<Option<Episode>> {
        while !self.at_eof {
            let got = self
                .csv
                .read_byte_record(&mut self.record)
                .map_err(|e| csv_error(&self.file, e))?;
            if !got {
                self.finish()?;
                break;
            }
            self.rows += 1;
            if let Some(done) = self.push_row()? {
                return Ok(Some(done));
            }
        }
        Ok(self.leftovers.pop())
    }

    fn at(&self, line: u64, col: Option<usize>) -> Position {
        Position {
            file: self.file.clone(),
            line: Some(line),
            column: col.map(|c| (c + 1, self.schema.headers[c].clone())),
        }
    }

    fn field_error(&self, line: u64, col: usize, problem: FieldProblem) -> Error {
        Error::input(
            self.at(line, Some(col)),
            problem.describe(&self.record[col]),
        )
    }

    fn push_row(&mut self) -> Result<Option<Episode>> {
        let line = self.record.position().map_or(0, |p| p.line());
        let width = self.schema.headers.len();
        if self.record.len() != width {
            if self.record.len() == 1 && self.record[0].is_empty() {
                return Err(Error::input(
                    self.at(line, None),
                    "blank line inside the log",
                ));
            }
            return Err(Error::input(
                self.at(line, None),
                format!(
                    "this row has {} fields but the header has {width}",
                    self.record.len()
                ),
            ));
        }
        let num = |s: &Self, c: usize| {
            fields::number(&s.record[c]).map_err(|p| s.field_error(line, c, p))
        };
        let flag = |s: &Self, role: Role| -> Result<bool> {
            match s.schema.column(role) {
                Some(c) => fields::boolean(&s.record[c]).map_err(|p| s.field_error(line, c, p)),
                None => Ok(false),
            }
        };

        let id_col = self
            .schema
            .column(Role::Episode)
            .expect("episode column is required");
        let id = &self.record[id_col];
        if id.trim_ascii().is_empty() {
            return Err(Error::input(
                self.at(line, Some(id_col)),
                "the episode id is empty",
            ));
        }
        if let Some(end_line) = self.ended.get(id) {
            return Err(Error::input_hint(
                self.at(line, Some(id_col)),
                format!(
                    "episode '{}' already ended at line {end_line}",
                    fields::shown(id)
                ),
                "each episode id must be unique; an id reused after its end row, or an end flag \
                 set on a row before the episode's last one, causes this",
            ));
        }
        let reward = num(
            self,
            self.schema
                .column(Role::Reward)
                .expect("reward is required"),
        )?;
        let step = match self.schema.column(Role::Step) {
            Some(c) => {
                Some(fields::integer(&self.record[c]).map_err(|p| self.field_error(line, c, p))?)
            }
            None => None,
        };
        let terminated = flag(self, Role::Terminated)?;
        let truncated = flag(self, Role::Truncated)?;
        let value = match self.schema.column(Role::Value) {
            Some(c) => Some(num(self, c)?),
            None => None,
        };
        let q = match self.schema.column(Role::Q) {
            Some(c) => Some(num(self, c)?),
            None => None,
        };
        let logp = match self.schema.column(Role::Logp) {
            Some(c) => Some(num(self, c)?),
            None => None,
        };
        let next_value = match self.schema.column(Role::NextValue) {
            Some(c) => fields::optional_number(&self.record[c])
                .map_err(|p| self.field_error(line, c, p))?,
            None => None,
        };

        if !self.open.contains_key(id) {
            let episode =
                Episode::new(String::from_utf8_lossy(id).into_owned(), line, &self.layout);
            self.open.insert(
                id.to_vec(),
                Open {
                    episode,
                    last_step: None,
                },
            );
        }
        // Vector fields are parsed straight into the open episode's arrays.
        let mut open = self.open.remove(id).expect("inserted above");
        self.push_vectors(&mut open.episode, line)?;
        if let (Some(step), Some(last)) = (step, open.last_step)
            && step != last + 1
        {
            {
                let c = self.schema.column(Role::Step).expect("step present");
                let what = if step == last {
                    "repeats"
                } else {
                    "does not follow"
                };
                return Err(Error::input_hint(
                    self.at(line, Some(c)),
                    format!(
                        "step {step} of episode '{}' {what} the previous step {last}",
                        open.episode.id
                    ),
                    "steps must increase by exactly 1 within an episode",
                ));
            }
        }
        open.last_step = step;
        let ep = &mut open.episode;
        ep.rewards.push(reward);
        if let (Some(v), Some(vs)) = (value, ep.values.as_mut()) {
            vs.push(v);
        }
        if let (Some(v), Some(qs)) = (q, ep.q.as_mut()) {
            qs.push(v);
        }
        if let (Some(v), Some(ls)) = (logp, ep.logp.as_mut()) {
            ls.push(v);
        }
        if terminated || truncated {
            ep.end = if terminated {
                End::Terminated
            } else {
                if next_value.is_none() {
                    warn_no_bootstrap(&mut self.warnings, &ep.id, line);
                }
                End::Truncated {
                    bootstrap: next_value,
                }
            };
            self.ended.insert(id.to_vec(), line);
            return Ok(Some(open.episode));
        }
        // Remember the last row's bootstrap in case the log ends mid-episode.
        open.episode.end = End::Truncated {
            bootstrap: next_value,
        };
        self.open.insert(id.to_vec(), open);
        Ok(None)
    }

    fn push_vectors(&self, ep: &mut Episode, line: u64) -> Result<()> {
        for (cols, out) in [
            (&self.schema.scores, &mut ep.scores),
            (&self.schema.obs, &mut ep.obs),
            (&self.schema.act, &mut ep.act),
        ] {
            for &c in cols {
                out.push(
                    fields::number(&self.record[c]).map_err(|p| self.field_error(line, c, p))?,
                );
            }
        }
        Ok(())
    }
}

fn warn_no_bootstrap(warnings: &mut Warnings, id: &str, line: u64) {
    {
        warnings.add(
            "truncated_without_bootstrap",
            "truncated episode without a bootstrap value (next_value on its last row): its tail \
             value is taken as 0, which biases value-based estimators",
            Some(format!("episode '{id}', line {line}")),
        );
    }
}

impl LogReader {
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
                        o.episode.id, o.episode.first_line
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
        Err(io) => match csv_error(file, csv::Error::from(io)) {
            e @ Error::Input(_) => Some(e),
            _ => None,
        },
        Ok(_) => None,
    }
}

/// Maps a csv-crate error (an I/O or decompression failure, or invalid input) to ours.
fn csv_error(file: &str, e: csv::Error) -> Error {
    let line = e.position().map(|p| p.line());
    match e.into_kind() {
        csv::ErrorKind::Io(io) => {
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
        other => Error::input(
            Position {
                file: file.into(),
                line,
                column: None,
            },
            format!("{other:?}"),
        ),
    }
}
