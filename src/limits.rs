//! Limits that keep a run from exhausting the machine: a memory budget for what a run holds
//! (open episodes while reading, the per-episode summaries, the resampled rows and the critic's
//! sums afterwards) and a cap on header columns. Exceeding one is an error that says which
//! limit and how to raise it, rather than a process killed by the operating system or a panic
//! inside an allocator.
//!
//! Every count a user gives (resamples, splits, folds, grid points) is turned into bytes with
//! saturating u128 arithmetic and checked here *before* anything of that size is allocated, so
//! no count can overflow a shape or a capacity: the budget itself is at most the machine's
//! memory, far below what an allocation can address.

use crate::error::{Error, Result};
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};

/// Header columns beyond this are refused (a log with more is almost surely malformed).
pub const MAX_COLUMNS: usize = 100_000;

/// Bytes a run may hold. Default: 80% of the memory the system reports available
/// (/proc/meminfo MemAvailable), or 8 GiB where that is unknown.
///
/// One budget is one ledger: clones share it, so every holder of a run (the reader's blocks,
/// the open episodes, the finished ids, the per-episode summaries, the resampling) charges
/// the same account, and the sum of what they hold is what is bounded (see [`Charge`]).
#[derive(Debug, Clone)]
pub struct Budget {
    pub bytes: u64,
    ledger: Arc<Ledger>,
}

/// Two budgets are equal when their limits are (whatever they hold at the moment).
impl PartialEq for Budget {
    fn eq(&self, other: &Budget) -> bool {
        self.bytes == other.bytes
    }
}

impl Eq for Budget {}

/// A field of /proc/meminfo, in bytes.
fn meminfo(key: &str) -> Option<u64> {
    let m = std::fs::read_to_string("/proc/meminfo").ok()?;
    m.lines()
        .find(|l| l.starts_with(key) && l[key.len()..].starts_with(':'))
        .and_then(|l| l.split_whitespace().nth(1)?.parse::<u64>().ok())
        .map(|kib| kib.saturating_mul(1024))
}

impl Default for Budget {
    fn default() -> Self {
        Budget::from_bytes(meminfo("MemAvailable").map_or(8 << 30, |b| b / 10 * 8))
    }
}

/// The most --max-memory may say: the machine's memory and swap (/proc/meminfo), or, where
/// that is unknown, the largest allocation a 64-bit process can address.
pub fn machine_bytes() -> u64 {
    match (meminfo("MemTotal"), meminfo("SwapTotal")) {
        (Some(m), s) => m.saturating_add(s.unwrap_or(0)),
        (None, _) => isize::MAX as u64,
    }
}

/// Bytes of `count` items of `size` bytes, saturating (never wraps, whatever the count).
pub fn bytes(count: u128, size: u128) -> u128 {
    count.saturating_mul(size)
}

impl Budget {
    pub fn from_mb(mb: u64) -> Budget {
        Budget::from_bytes(mb.saturating_mul(1 << 20))
    }

    /// A budget of `bytes` with a fresh ledger (nothing held).
    pub fn from_bytes(bytes: u64) -> Budget {
        Budget {
            bytes,
            ledger: Arc::default(),
        }
    }

    /// `--max-memory MB`, refused above the machine's memory (a budget that large would not
    /// protect anything, and would let counts through whose allocations cannot succeed).
    pub fn from_option(mb: u64) -> Result<Budget> {
        let most = machine_bytes();
        let b = Budget::from_mb(mb);
        if b.bytes > most || mb > most >> 20 {
            return Err(Error::usage(format!(
                "--max-memory {mb}: more than this machine's {} MB of memory and swap; give at \
                 most {}",
                most >> 20,
                most >> 20
            )));
        }
        Ok(b)
    }

    pub fn mb(&self) -> u64 {
        self.bytes >> 20
    }

    /// Refuses `need` bytes beyond what the budget has left (the limit less what the
    /// ledger's holders hold now): "`what` need(s) about N MB, over the memory budget of M MB
    /// (--max-memory)[ with ... already held]; `fix`". For sizes checked before an allocation
    /// that is then charged, or short-lived.
    pub fn check(&self, need: u128, what: impl FnOnce() -> String, fix: &str) -> Result<()> {
        let held = self.ledger.total();
        if need.saturating_add(u128::from(held)) <= u128::from(self.bytes) {
            return Ok(());
        }
        Err(self.over(need, what(), fix))
    }

    /// Starts a charge of `holder` against the ledger, holding nothing yet.
    pub fn charge(&self, holder: Holder) -> Charge {
        Charge {
            budget: self.clone(),
            holder,
            bytes: 0,
        }
    }

    /// Bytes held by every holder of the ledger now.
    pub fn held(&self) -> u64 {
        self.ledger.total()
    }

    /// The error for `need` bytes that do not fit, naming what the ledger holds already and,
    /// when another holder holds the most, how to make it hold less.
    fn over(&self, need: u128, what: String, fix: &str) -> Error {
        let largest = Holder::ALL
            .iter()
            .zip(&self.ledger.held)
            .map(|(h, b)| (b.load(Ordering::Relaxed), *h))
            .max_by_key(|&(b, _)| b)
            .filter(|&(b, _)| u128::from(b) > need);
        let also = largest.map_or(String::new(), |(_, h)| {
            format!("; most is held by {}: {}", h.name(), h.lower())
        });
        // Rounded up (to a tenth of a MB), so that a need just over the budget never reads
        // as equal to it.
        let shown = if need > u128::from(u64::MAX) {
            "more than 16 million terabytes".to_string()
        } else if need < 1 << 20 {
            format!("{need} bytes")
        } else {
            format!("about {}", shown_mb(need as u64))
        };
        Error::usage(format!(
            "{what} need {shown}, over the memory budget of {} MB (--max-memory){}; {fix}{also}",
            self.mb(),
            self.ledger.describe()
        ))
    }
}

/// Who holds memory under a budget, for the ledger's tallies and its messages.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Holder {
    /// The reader's blocks in flight: raw input and parsed rows (log/chunks.rs, pipeline.rs).
    Reader,
    /// The steps of episodes still open (log/assemble.rs).
    OpenEpisodes,
    /// The digests of finished episodes' ids, kept to detect a reused id (log/assemble.rs).
    FinishedIds,
    /// Per-episode summaries: audit's contribution rows and ids, inspect's returns.
    Summaries,
    /// Resampled rows, Poisson sums and the resampling scratch.
    Resampling,
    /// Episodes read ahead to have their scores computed together (audit/scoring.rs).
    Scoring,
}

impl Holder {
    const ALL: [Holder; 6] = [
        Holder::Reader,
        Holder::OpenEpisodes,
        Holder::FinishedIds,
        Holder::Summaries,
        Holder::Resampling,
        Holder::Scoring,
    ];

    /// How to make this holder hold less, for messages naming it as the largest.
    fn lower(self) -> &'static str {
        match self {
            Holder::Reader => "it sizes its blocks from --max-memory",
            Holder::OpenEpisodes => {
                "check that every episode's last row sets terminated or truncated"
            }
            Holder::FinishedIds => "about 40 to 80 bytes per finished episode: split the log",
            Holder::Summaries => "audit fewer estimators, or split the log",
            Holder::Resampling => {
                "use fewer --resamples or --splits, or --resampling poisson, whose memory does \
                 not grow with the episodes"
            }
            Holder::Scoring => "it takes an eighth of --max-memory, at most 64 MB",
        }
    }

    fn name(self) -> &'static str {
        match self {
            Holder::Reader => "the reader's blocks in flight",
            Holder::OpenEpisodes => "open episodes",
            Holder::FinishedIds => "finished-episode ids",
            Holder::Summaries => "per-episode summaries",
            Holder::Resampling => "resampled rows and scratch",
            Holder::Scoring => "episodes queued for scoring",
        }
    }
}

/// What each holder of one budget holds now, in bytes. Atomic, so the reader's producer
/// thread and the consumer charge the same ledger.
#[derive(Debug, Default)]
struct Ledger {
    held: [AtomicU64; Holder::ALL.len()],
}

impl Ledger {
    fn total(&self) -> u64 {
        self.held
            .iter()
            .map(|h| h.load(Ordering::Relaxed))
            .fold(0, u64::saturating_add)
    }

    /// " with N MB already held (the reader's blocks in flight 3 MB, ...)", or nothing.
    fn describe(&self) -> String {
        let parts: Vec<String> = Holder::ALL
            .iter()
            .zip(&self.held)
            .map(|(h, b)| (h, b.load(Ordering::Relaxed)))
            .filter(|&(_, b)| b > 0)
            .map(|(h, b)| format!("{} {}", h.name(), shown_mb(b)))
            .collect();
        if parts.is_empty() {
            return String::new();
        }
        format!(
            " with {} already held ({})",
            shown_mb(self.total()),
            parts.join(", ")
        )
    }
}

/// Bytes in words for messages, rounded up: "653 kB", "2.2 MB".
fn shown_mb(bytes: u64) -> String {
    if bytes < 1 << 20 {
        format!("{} kB", bytes.div_ceil(1 << 10))
    } else {
        let tenths = (u128::from(bytes) * 10).div_ceil(1 << 20);
        format!("{}.{} MB", tenths / 10, tenths % 10)
    }
}

/// What one holder holds against a budget's ledger, released when dropped. Growing it checks
/// the sum of every holder against the limit; shrinking always succeeds.
#[derive(Debug)]
pub struct Charge {
    budget: Budget,
    holder: Holder,
    bytes: u64,
}

impl Charge {
    /// Bytes charged now.
    pub fn bytes(&self) -> u64 {
        self.bytes
    }

    /// The budget whose ledger this charges.
    pub fn budget(&self) -> &Budget {
        &self.budget
    }

    /// Sets the charge to `bytes`. Growth that would take the ledger's total over the limit
    /// is refused (the charge keeps its old size) with an error naming `what` needs the
    /// growth, what every holder holds, and `fix`.
    pub fn set(&mut self, bytes: u64, what: impl FnOnce() -> String, fix: &str) -> Result<()> {
        let cell = &self.budget.ledger.held[self.holder as usize];
        if bytes <= self.bytes {
            cell.fetch_sub(self.bytes - bytes, Ordering::Relaxed);
            self.bytes = bytes;
            return Ok(());
        }
        let grow = bytes - self.bytes;
        cell.fetch_add(grow, Ordering::Relaxed);
        if self.budget.ledger.total() > self.budget.bytes {
            cell.fetch_sub(grow, Ordering::Relaxed);
            return Err(self.budget.over(u128::from(grow), what(), fix));
        }
        self.bytes = bytes;
        Ok(())
    }

    /// Sets the charge to `bytes` without a check (a shrink, or a size that a check has
    /// just allowed).
    pub fn force(&mut self, bytes: u64) {
        let cell = &self.budget.ledger.held[self.holder as usize];
        if bytes >= self.bytes {
            cell.fetch_add(bytes - self.bytes, Ordering::Relaxed);
        } else {
            cell.fetch_sub(self.bytes - bytes, Ordering::Relaxed);
        }
        self.bytes = bytes;
    }

    /// Makes room for `extra` more items in `v`, charging the larger allocation first (the
    /// old and the new one are both held while the items move) and keeping a quarter more
    /// than needed, so that growth stays rare and the slack small. `other` is what this
    /// charge holds besides `v`.
    pub fn reserve<T>(
        &mut self,
        v: &mut Vec<T>,
        extra: usize,
        other: u64,
        what: impl FnOnce() -> String,
        fix: &str,
    ) -> Result<()> {
        let need = v.len().saturating_add(extra);
        if need <= v.capacity() {
            return Ok(());
        }
        let size = std::mem::size_of::<T>() as u64;
        let cap = need.max(v.capacity() + v.capacity() / 4).max(64);
        let old = v.capacity() as u64 * size;
        self.set(
            other
                .saturating_add(old)
                .saturating_add((cap as u64).saturating_mul(size)),
            what,
            fix,
        )?;
        v.reserve_exact(cap - v.len());
        self.force(other + v.capacity() as u64 * size);
        Ok(())
    }
}

impl Drop for Charge {
    fn drop(&mut self) {
        self.force(0);
    }
}

/// The reader's input buffers (blocks read and parsed ahead) may use 1/READER_SHARE of the
/// budget; see `log::chunks::Tuning::for_budget`.
pub const READER_SHARE: u64 = 4;

/// Longest record (row, header included) the reader accepts, in bytes; a smaller budget
/// lowers it to an eighth of the budget. A longer row is an error, not an unbounded buffer.
pub const MAX_RECORD_BYTES: usize = 16 << 20;

/// Longest episode id, in bytes (longer ones are almost surely a damaged or mis-split file).
pub const MAX_ID_BYTES: usize = 4096;

#[cfg(test)]
mod tests {
    use super::*;

    // Two holders that each fit but together do not: the second is refused, the message
    // names both; dropping a charge gives its bytes back; clones share the ledger.
    #[test]
    fn charges_of_one_budget_are_summed() {
        let b = Budget::from_mb(10);
        let mut ids = b.charge(Holder::FinishedIds);
        ids.set(6 << 20, || "ids".into(), "fix").unwrap();
        let shared = b.clone();
        let mut rows = shared.charge(Holder::Summaries);
        let e = rows
            .set(5 << 20, || "rows".into(), "lower it")
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("rows need about 5.0 MB, over the memory budget of 10 MB")
                && e.contains("6.0 MB already held (finished-episode ids 6.0 MB)")
                && e.contains("lower it; most is held by finished-episode ids"),
            "{e}"
        );
        assert_eq!((rows.bytes(), b.held()), (0, 6 << 20));
        rows.set(4 << 20, || "rows".into(), "f").unwrap();
        assert!(b.check(1, || "one more".into(), "f").is_err());
        drop(ids);
        assert_eq!(b.held(), 4 << 20);
        rows.set(1 << 20, || unreachable!(), "f").unwrap();
        assert_eq!(b.held(), 1 << 20);
        // Another budget of the same size is another ledger.
        assert_eq!(Budget::from_mb(10).held(), 0);
    }

    // Growing a vector charges the old and the new allocation, then settles at the new one.
    #[test]
    fn reserve_charges_the_growth_first() {
        let b = Budget::from_bytes(10_000);
        let mut c = b.charge(Holder::Summaries);
        let mut v: Vec<f64> = Vec::new();
        c.reserve(&mut v, 1000, 0, || "v".into(), "f").unwrap();
        assert!(v.capacity() >= 1000);
        assert_eq!(c.bytes(), 8 * v.capacity() as u64);
        v.resize(v.capacity(), 0.0);
        // 8 kB held; growing by a quarter needs the old 8 kB and the new 10 kB at once.
        let e = c.reserve(&mut v, 1, 0, || "v".into(), "f").unwrap_err();
        assert!(e.to_string().contains("budget of 0 MB"), "{e}");
        assert_eq!(c.bytes(), 8 * v.capacity() as u64);
    }

    #[test]
    fn huge_max_memory_is_refused() {
        let e = Budget::from_option(u64::MAX).unwrap_err().to_string();
        assert!(e.contains("--max-memory") && e.contains("at most"), "{e}");
        assert!(Budget::from_option(1).is_ok());
    }

    #[test]
    fn check_names_the_need_and_the_budget_without_overflow() {
        let b = Budget::from_mb(10);
        assert!(b.check(10 << 20, || "x".into(), "fix").is_ok());
        let e = b
            .check(
                bytes(u128::from(u64::MAX), u128::MAX),
                || "2 rows".into(),
                "use fewer",
            )
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("2 rows need more than") && e.contains("budget of 10 MB"),
            "{e}"
        );
        let e = b
            .check(11 << 20, || "r".into(), "f")
            .unwrap_err()
            .to_string();
        assert!(e.contains("about 11.0 MB"), "{e}");
        let e = b
            .check((10 << 20) + 1, || "r".into(), "f")
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("about 10.1 MB") && e.contains("budget of 10 MB"),
            "{e}"
        );
    }
}
