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

/// Header columns beyond this are refused (a log with more is almost surely malformed).
pub const MAX_COLUMNS: usize = 100_000;

/// Bytes a run may hold. Default: 80% of the memory the system reports available
/// (/proc/meminfo MemAvailable), or 8 GiB where that is unknown.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Budget {
    pub bytes: u64,
}

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
        Budget {
            bytes: meminfo("MemAvailable").map_or(8 << 30, |b| b / 10 * 8),
        }
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
        Budget {
            bytes: mb.saturating_mul(1 << 20),
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

    pub fn mb(self) -> u64 {
        self.bytes >> 20
    }

    /// Refuses `need` bytes beyond the budget: "`what` need(s) about N MB, over the memory
    /// budget of M MB; `fix`".
    pub fn check(self, need: u128, what: impl FnOnce() -> String, fix: &str) -> Result<()> {
        if need <= u128::from(self.bytes) {
            return Ok(());
        }
        // Rounded up, so that a need just over the budget never reads as equal to it.
        let mb = need.div_ceil(1 << 20);
        let shown = if mb > u128::from(u64::MAX >> 20) {
            "more than 16 million terabytes".to_string()
        } else if need < 1 << 20 {
            format!("{need} bytes")
        } else {
            format!("about {mb} MB")
        };
        Err(Error::usage(format!(
            "{} need {shown}, over the memory budget of {} MB (--max-memory); {fix}",
            what(),
            self.mb()
        )))
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
        assert!(e.contains("about 11 MB"), "{e}");
        let e = b
            .check((10 << 20) + 1, || "r".into(), "f")
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("about 11 MB") && e.contains("budget of 10 MB"),
            "{e}"
        );
    }
}
