//! Episode assembly, the one path for every input format: typed rows (from the CSV tokenizer
//! or an Arrow batch) in file order in, finished episodes out. It owns the rules that turn
//! rows into episodes: an episode's rows share an id (or, in a vector-environment layout, are
//! a run of one environment's rows up to an end row), steps follow one another, an end row
//! closes the episode, an id is not reused after its end, an episode does not span files
//! (except the runs of a vector-environment layout), and what open episodes and the record of
//! finished ids hold stays within the memory budget. The end-flag warnings live here too.
//!
//! End flags: a row's `terminated` / `truncated` are already resolved by the row producer
//! (terminated = done and not truncated under the done convention). An end flagged both ways
//! is taken as terminal (V_T = 0). When at least [`BOTH_WAYS_MIN`] ends are flagged both ways
//! and they are at least half of the truncated ends, the log almost surely maps an "ended for
//! any reason" column to terminated: every time-limit cut then loses its bootstrap, so this
//! is warned about (genuine terminations that fall on the time limit are rare, so a few of
//! them among many truncations do not set it off).

use super::fields;
use super::rows::{Parsed, Row};
use crate::episode::{End, Episode, Layout};
use crate::error::{Error, Position, Result};
use crate::limits::{Budget, Charge, Holder};
use crate::warnings::Warnings;
use std::collections::HashMap;

/// Ends flagged both ways before the silent-loss warning may be given.
pub const BOTH_WAYS_MIN: u64 = 5;

/// Where a row sits, for messages: CSV lines, or a columnar file's row groups and rows.
pub trait Locate {
    /// The position of record `line` (a line, or a 1-based row of the file), column `col`.
    fn at(&self, line: u64, col: Option<usize>) -> Position;
    /// Record `line` in words, e.g. "line 17" or "row group 2, row 17".
    fn place(&self, line: u64) -> String;
}

struct Open {
    episode: Episode,
    last_step: Option<i64>,
    /// Index in `files` of the file its first row is in.
    file: u32,
}

/// The fixed facts of the rows being assembled.
pub struct Shape {
    pub layout: Layout,
    pub has_end_flags: bool,
    /// Episode ids are runs within environments (`--env-col`).
    pub vector_env: bool,
    /// Column of the id (or environment), and of the step, for messages.
    pub id_col: usize,
    pub step_col: Option<usize>,
}

pub struct Assembler {
    shape: Shape,
    open: HashMap<Vec<u8>, Open>,
    /// 128-bit digests of finished episodes' ids ([`id_key`]) with the record that ended each
    /// and its file, to detect a reused id: about 33 bytes per bucket, charged to the
    /// budget's ledger (`ended_charge`). In [`ENDED_SHARDS`] tables by the digest's top bits,
    /// so that a table doubling holds its old copy for a sixteenth of the ids, not all.
    ended: Vec<HashMap<u128, (u64, u32)>>,
    /// Ids in `ended`, and the bytes of its tables.
    ended_count: usize,
    ended_bytes: u64,
    /// Vector-environment layout: the next run number of each environment.
    runs: HashMap<Vec<u8>, u64>,
    /// Files read so far (the last is the current one) and their record word ("line", "row").
    files: Vec<(String, &'static str)>,
    leftovers: Vec<Episode>,
    /// Approximate bytes held by open episodes (`held`, charged as `open_charge`) and by
    /// `ended`, on the budget's one ledger with the reader's blocks and what the caller keeps.
    held: u64,
    open_charge: Charge,
    ended_charge: Charge,
    pub warnings: Warnings,
    ends: EndCounts,
}

/// Ends flagged truncated, and those flagged both ways (the first of them described).
#[derive(Default)]
struct EndCounts {
    truncated: u64,
    both_ways: u64,
    first_both: Option<String>,
}

impl EndCounts {
    fn count(&mut self, row: &Row, id: &str, loc: &dyn Locate) {
        if row.truncated {
            self.truncated += 1;
            if row.terminated {
                self.both_ways += 1;
                if self.first_both.is_none() {
                    self.first_both = Some(format!(
                        "episode '{}', {}",
                        fields::shown(id.as_bytes()),
                        loc.place(row.line)
                    ));
                }
            }
        }
    }
}

impl Assembler {
    pub fn new(shape: Shape, budget: Budget, warnings: Warnings) -> Self {
        Assembler {
            shape,
            open: HashMap::new(),
            ended: (0..ENDED_SHARDS).map(|_| HashMap::new()).collect(),
            ended_count: 0,
            ended_bytes: 0,
            runs: HashMap::new(),
            files: Vec::new(),
            leftovers: Vec::new(),
            held: 0,
            open_charge: budget.charge(Holder::OpenEpisodes),
            ended_charge: budget.charge(Holder::FinishedIds),
            warnings,
            ends: EndCounts::default(),
        }
    }

    /// The rows that follow come from file `name`, whose records are lines or rows (`unit`).
    pub fn next_file(&mut self, name: &str, unit: &'static str) {
        self.files.push((name.to_string(), unit));
    }

    /// Whether the episode (or environment run) of id `key` is open.
    pub fn is_open(&self, key: &[u8]) -> bool {
        self.open.contains_key(key)
    }

    fn file_index(&self) -> u32 {
        self.files.len().saturating_sub(1) as u32
    }

    /// Adds row `i` of `block` to its episode; returns the episode if this row ended it.
    pub fn push(&mut self, block: &Parsed, i: usize, loc: &dyn Locate) -> Result<Option<Episode>> {
        let row: &Row = &block.rows[i];
        let key = block.id(row);
        // Most rows continue an open episode: look it up without moving it or allocating.
        match self.open.get(key) {
            Some(o) if o.file != self.file_index() && !self.shape.vector_env => {
                return Err(self.spans_files(o, row, loc));
            }
            Some(_) => {}
            None => self.start(key, row.line, loc)?,
        }
        let l = &self.shape.layout;
        let w = l.score_dim + l.obs_dim + l.act_dim + l.logged.len();
        // Each step holds its vector fields, up to four scalars and its line number (the next
        // observation is kept for the last row only: it is counted once per episode, below).
        let step_bytes = 8 * (w as u64 + 5);
        let w = w + l.next_obs_dim;
        let open_count = self.open.len();
        let open = self.open.get_mut(key).expect("opened above");
        check_step(self.shape.step_col, open, row, loc)?;
        open.last_step = row.step;
        // A new episode also holds its id, its entry in the table of open ones, its vectors'
        // headers and its next observation.
        let fixed = if open.episode.rewards.is_empty() {
            episode_bytes(key, l.next_obs_dim)
        } else {
            0
        };
        self.held += step_bytes + fixed;
        let ep = &open.episode;
        // Charged in steps of CHARGE_STEP, so that most rows do not touch the shared ledger.
        if self.held > self.open_charge.bytes() {
            self.open_charge
                .set(
                    self.held.next_multiple_of(CHARGE_STEP),
                    || {
                        let next = match l.next_obs_dim {
                            0 => String::new(),
                            n => format!(", each with its next observation of {n} values"),
                        };
                        format!(
                            "open episodes ({open_count} open{next}; '{}' has {} steps so far)",
                            fields::shown(ep.id.as_bytes()),
                            ep.rewards.len() + 1
                        )
                    },
                    "check that every episode's last row sets terminated or truncated, or raise \
                     --max-memory",
                )
                .map_err(|e| Error::input(loc.at(row.line, None), e.to_string()))?;
        }
        let ep = &mut open.episode;
        let next_obs_dim = self.shape.layout.next_obs_dim;
        push_step(ep, row, &block.vectors[i * w..(i + 1) * w], next_obs_dim);
        ep.lines.push(row.line);
        if !(row.terminated || row.truncated) {
            // Remember the last row's bootstrap in case the log ends mid-episode.
            ep.end = End::Truncated {
                bootstrap: row.next_value,
            };
            return Ok(None);
        }
        self.ends.count(row, &ep.id, loc);
        ep.end = if row.terminated {
            End::Terminated
        } else {
            if row.next_value.is_none() {
                warn_no_bootstrap(&mut self.warnings, &ep.id, &loc.place(row.line));
            }
            End::Truncated {
                bootstrap: row.next_value,
            }
        };
        let done = self.open.remove(key).expect("open above").episode;
        let next_obs_dim = self.shape.layout.next_obs_dim;
        self.held -= step_bytes * done.len() as u64 + episode_bytes(key, next_obs_dim);
        if self.held + 2 * CHARGE_STEP < self.open_charge.bytes() {
            self.open_charge
                .force(self.held.next_multiple_of(CHARGE_STEP));
        }
        if self.shape.vector_env {
            *self.runs.entry(key.to_vec()).or_insert(0) += 1;
        } else {
            self.remember_end(key, row.line, loc)?;
        }
        Ok(Some(done))
    }

    /// Opens the episode of a row whose id is not open: a new id, or (vector-environment
    /// layout) the environment's next run.
    fn start(&mut self, key: &[u8], line: u64, loc: &dyn Locate) -> Result<()> {
        let episode = if self.shape.vector_env {
            let run = self.runs.get(key).copied().unwrap_or(0);
            let mut id = key.to_vec();
            id.extend_from_slice(format!("/{run}").as_bytes());
            let mut ep = Episode::from_raw_id(&id, line, &self.shape.layout);
            ep.env = Some(String::from_utf8_lossy(key).into_owned());
            ep
        } else {
            // An open id cannot have ended (ending removes it from `open`), so only a row
            // starting an episode looks in `ended`.
            let k = id_key(key);
            if let Some(&(end_line, file)) = self.ended[shard(k)].get(&k) {
                let place = if file == self.file_index() {
                    loc.place(end_line)
                } else {
                    self.elsewhere(file, end_line)
                };
                return Err(Error::input_hint(
                    loc.at(line, Some(self.shape.id_col)),
                    format!("episode '{}' already ended at {place}", fields::shown(key)),
                    "each episode id must be unique; an id reused after its end row, or an end \
                     flag set on a row before the episode's last one, causes this",
                ));
            }
            Episode::from_raw_id(key, line, &self.shape.layout)
        };
        self.open.insert(
            key.to_vec(),
            Open {
                episode,
                last_step: None,
                file: self.file_index(),
            },
        );
        Ok(())
    }

    /// Record `line` of an earlier file, in words ("a.csv, line 7").
    fn elsewhere(&self, file: u32, line: u64) -> String {
        let (name, unit) = &self.files[file as usize];
        format!("{name}, {unit} {line}")
    }

    fn spans_files(&self, o: &Open, row: &Row, loc: &dyn Locate) -> Error {
        Error::input_hint(
            loc.at(row.line, Some(self.shape.id_col)),
            format!(
                "episode '{}' started in {} and continues in this file: an episode may not \
                 span files",
                fields::shown(o.episode.id.as_bytes()),
                self.elsewhere(o.file, o.episode.first_line),
            ),
            "end each episode in the file it starts in (a terminated or truncated flag on its \
             last row), or for a vector-environment layout give --env-col",
        )
    }

    /// Records a finished id, charging the table's growth to the ledger first.
    fn remember_end(&mut self, key: &[u8], line: u64, loc: &dyn Locate) -> Result<()> {
        let (k, file) = (id_key(key), self.file_index());
        let table = &mut self.ended[shard(k)];
        if table.len() == table.capacity() {
            // Growing allocates the doubled table while the old one is still held.
            let old = table_bytes(table.capacity());
            let grown = table_bytes(table.capacity().max(3) * 2);
            let n = self.ended_count + 1;
            self.ended_charge
                .set(
                    self.ended_bytes + grown,
                    || {
                        format!(
                            "the ids of {n} finished episodes (kept to detect a reused id, \
                             about 33 bytes each at the table's growth)"
                        )
                    },
                    "raise --max-memory (about 40 to 80 bytes per finished episode), or split \
                     the log",
                )
                .map_err(|e| Error::input(loc.at(line, None), e.to_string()))?;
            table.reserve(1);
            self.ended_bytes = self.ended_bytes - old + table_bytes(table.capacity());
            self.ended_charge.force(self.ended_bytes);
        }
        table.insert(k, (line, file));
        self.ended_count += 1;
        Ok(())
    }

    /// At the end of the last file: open episodes are taken as truncated (terminated in a
    /// log without end flags), and the end-flag findings are counted.
    pub fn finish(&mut self, loc: &dyn Locate) {
        let mut open: Vec<Open> = self.open.drain().map(|(_, o)| o).collect();
        // Reverse order so that popping yields them in the order they started.
        open.sort_by_key(|o| std::cmp::Reverse((o.file, o.episode.first_line)));
        for mut o in open {
            let here = o.file == self.file_index();
            let place = if here {
                loc.place(o.episode.first_line)
            } else {
                self.elsewhere(o.file, o.episode.first_line)
            };
            if self.shape.has_end_flags {
                let bootstrap = match o.episode.end {
                    End::Truncated { bootstrap } => bootstrap,
                    End::Terminated => None,
                };
                // An environment's last run is cut by the end of the log as a matter of
                // course; an open episode of an id layout is worth a word.
                if !self.shape.vector_env {
                    self.warnings.add(
                        "open_at_end_of_log",
                        "episode still open at the end of the log: taken as truncated",
                        Some(format!(
                            "episode '{}', {place}",
                            fields::shown(o.episode.id.as_bytes())
                        )),
                    );
                }
                if bootstrap.is_none() {
                    warn_no_bootstrap(&mut self.warnings, &o.episode.id, &place);
                }
                o.episode.end = End::Truncated { bootstrap };
            } else {
                o.episode.end = End::Terminated;
            }
            self.leftovers.push(o.episode);
        }
        let e = &self.ends;
        if e.both_ways >= BOTH_WAYS_MIN && 2 * e.both_ways >= e.truncated {
            self.warnings.add_many(
                "ends_flagged_both_ways",
                format!(
                    "{} of the {} truncated episode ends are also flagged terminated and are \
                     taken as terminal, so their bootstrap values are dropped; the likely cause \
                     is a column meaning 'ended for any reason' (done) read as terminated. If \
                     so, name it as done: --col done=HEADER (terminated = done and not \
                     truncated)",
                    e.both_ways, e.truncated
                ),
                e.first_both.clone(),
                e.both_ways,
            );
        }
    }

    /// Episodes still open at the end, in the order they started (after [`Assembler::finish`]).
    pub fn leftover(&mut self) -> Option<Episode> {
        self.leftovers.pop()
    }
}

/// Tables of finished ids ([`Assembler`]'s `ended`).
const ENDED_SHARDS: usize = 16;

/// The table of digest `k`: by its top 4 bits (uniform, as the digest is).
fn shard(k: u128) -> usize {
    (k >> 124) as usize % ENDED_SHARDS
}

/// Bytes of a hash table of `(u128, (u64, u32))` entries holding `capacity`: buckets (a power
/// of two, at most 7/8 full) of 32 bytes plus one control byte each.
fn table_bytes(capacity: usize) -> u64 {
    if capacity == 0 {
        return 0;
    }
    let buckets = (capacity as u64 * 8).div_ceil(7).next_power_of_two();
    buckets * 33
}

/// The open episodes' charge moves in steps of this many bytes.
const CHARGE_STEP: u64 = 64 << 10;

/// Bytes an open episode holds besides its steps: its entry in the table of open episodes
/// and the headers of its vectors (its id's bytes are added).
const OPEN_BYTES: u64 = (std::mem::size_of::<Open>() + std::mem::size_of::<Vec<u8>>() + 16) as u64;

/// Bytes an open episode of id `key` holds besides its steps: [`OPEN_BYTES`], its id, and its
/// next observation (`next_obs_dim` values, replaced at each row, so held once).
fn episode_bytes(key: &[u8], next_obs_dim: usize) -> u64 {
    OPEN_BYTES + key.len() as u64 + 8 * next_obs_dim as u64
}

/// Appends a row's values (`v`: its scores, obs, act, next obs and logged columns) to its
/// episode; the next observation replaces the previous row's.
fn push_step(ep: &mut Episode, row: &Row, v: &[f64], next_obs_dim: usize) {
    let (d, o, a) = (ep.score_dim, ep.obs_dim, ep.act_dim);
    ep.scores.extend_from_slice(&v[..d]);
    ep.obs.extend_from_slice(&v[d..d + o]);
    ep.act.extend_from_slice(&v[d + o..d + o + a]);
    let n = d + o + a + next_obs_dim;
    if next_obs_dim > 0 {
        let next = ep.next_obs.get_or_insert_with(Vec::new);
        next.clear();
        next.extend_from_slice(&v[d + o + a..n]);
    }
    ep.logged.extend_from_slice(&v[n..]);
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
fn check_step(col: Option<usize>, open: &Open, row: &Row, loc: &dyn Locate) -> Result<()> {
    let (Some(step), Some(last)) = (row.step, open.last_step) else {
        return Ok(());
    };
    if last.checked_add(1) == Some(step) {
        return Ok(());
    }
    let what = if step == last {
        "repeats"
    } else {
        "does not follow"
    };
    Err(Error::input_hint(
        loc.at(row.line, col),
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

fn warn_no_bootstrap(warnings: &mut Warnings, id: &str, place: &str) {
    warnings.add(
        "truncated_without_bootstrap",
        "truncated episode without a bootstrap value (next_value on its last row): its tail \
         value is taken as 0, which biases value-based estimators",
        Some(format!(
            "episode '{}', {place}",
            fields::shown(id.as_bytes())
        )),
    );
}
