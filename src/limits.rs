//! Limits that keep a run from exhausting the machine: a memory budget for what a run holds
//! (open episodes while reading, the contribution matrix and resamples afterwards) and a cap
//! on header columns. Exceeding one is an error that says which limit and how to raise it,
//! rather than a process killed by the operating system.

/// Header columns beyond this are refused (a log with more is almost surely malformed).
pub const MAX_COLUMNS: usize = 100_000;

/// Bytes a run may hold. Default: 80% of the memory the system reports available
/// (/proc/meminfo MemAvailable), or 8 GiB where that is unknown.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Budget {
    pub bytes: u64,
}

impl Default for Budget {
    fn default() -> Self {
        let available = std::fs::read_to_string("/proc/meminfo").ok().and_then(|m| {
            m.lines()
                .find(|l| l.starts_with("MemAvailable:"))
                .and_then(|l| l.split_whitespace().nth(1)?.parse::<u64>().ok())
                .map(|kib| kib * 1024)
        });
        Budget {
            bytes: available.map_or(8 << 30, |b| b / 10 * 8),
        }
    }
}

impl Budget {
    pub fn from_mb(mb: u64) -> Budget {
        Budget {
            bytes: mb.saturating_mul(1 << 20),
        }
    }

    pub fn mb(self) -> u64 {
        self.bytes >> 20
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
