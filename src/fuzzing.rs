//! Entry points for fuzzing the parsers that read untrusted files. The cargo-fuzz targets in
//! fuzz/ call these, and a regular test replays the committed regression inputs through them,
//! so CI checks past crashers without a nightly toolchain. Each must return, never panic.

use crate::episode::Episode;
use crate::log::chunks::Tuning;
use crate::log::{LogReader, Progress, ReadOptions};
use crate::warnings::Warnings;

/// Reads a whole log from `bytes` (gzip or plain) twice, in tiny blocks (1 to 29 bytes,
/// read 1 to 7 bytes at a time, chosen from the input's length) and in one 64 kB block, both
/// parsed inline (no thread, no large buffer, so thousands of inputs run per second), and
/// panics if the two outcomes differ: the parse must not depend on where blocks fall.
pub fn reader(bytes: &[u8]) {
    let tiny = Tuning::inline(1 + bytes.len() % 29, 1 + bytes.len() % 7);
    let small = read_log(bytes, tiny);
    let whole = read_log(bytes, Tuning::inline(1 << 16, 1 << 12));
    assert_eq!(
        small, whole,
        "the parse depends on the block size ({tiny:?})"
    );
}

/// What reading a log gives: every episode, the warnings and the row count, or the error.
pub type Outcome = Result<(Vec<Episode>, Warnings, u64), String>;

/// Reads all of `bytes` (through the same gzip detection as a log opened from a path) with
/// the given block sizes and a 64 MB budget.
pub fn read_log(bytes: &[u8], tuning: Tuning) -> Outcome {
    // Every field given: the default budget reads /proc/meminfo, too slow per input.
    let opts = ReadOptions {
        delimiter: b',',
        columns: crate::log::ColumnSpec::default(),
        progress: Progress::Hidden,
        budget: crate::limits::Budget::from_mb(64),
    };
    let (mut input, compressed) =
        crate::log::source::decompressed(Box::new(std::io::Cursor::new(bytes.to_vec())))
            .map_err(|e| e.to_string())?;
    if compressed {
        // A damaged stream is reported as damage whatever the bytes before it look like
        // (LogReader::open decodes again to check): decode it whole first (a few MB at most
        // from a fuzz input) and read the plain bytes.
        use std::io::Read;
        let mut plain = Vec::new();
        input
            .take(64 << 20)
            .read_to_end(&mut plain)
            .map_err(|e| format!("damaged gzip: {e}"))?;
        input = Box::new(std::io::Cursor::new(plain));
    }
    let mut r = LogReader::from_reader_tuned(input, "fuzz.csv", &opts, None, tuning)
        .map_err(|e| e.to_string())?;
    let mut episodes = Vec::new();
    while let Some(ep) = r.next_episode().map_err(|e| e.to_string())? {
        episodes.push(ep);
    }
    Ok((episodes, r.warnings().clone(), r.rows()))
}

/// Parses a rules file (`gradaudit gate --rules`).
pub fn rules(bytes: &[u8]) {
    if let Ok(text) = std::str::from_utf8(bytes) {
        let _ = crate::gate::RuleSet::from_json(text, "fuzz.json");
    }
}

/// Parses a baseline report (`gradaudit gate --baseline`).
pub fn baseline(bytes: &[u8]) {
    if let Ok(text) = std::str::from_utf8(bytes) {
        let _ = crate::gate::Baseline::from_json(text, "fuzz.json");
    }
}

/// Parses a policy file (`--policy`) against a header with four obs and two act columns, then
/// scores one step with it.
pub fn policy(bytes: &[u8]) {
    use crate::log::{ColumnSpec, Schema};
    let Ok(text) = std::str::from_utf8(bytes) else {
        return;
    };
    let headers = [
        "episode", "reward", "obs_0", "obs_1", "obs_2", "obs_3", "act_0", "act_1",
    ];
    let schema = Schema::resolve(
        &ColumnSpec::default(),
        headers.iter().map(|h| h.to_string()).collect(),
        "fuzz.csv",
    )
    .expect("a fixed valid header");
    if let Ok(p) = crate::policy::Policy::from_json(text, "fuzz.json", &schema) {
        let mut ep = crate::episode::Episode::new(
            "e".into(),
            2,
            &crate::episode::Layout {
                obs_dim: 4,
                act_dim: 2,
                ..Default::default()
            },
        );
        ep.rewards = vec![1.0, 0.0];
        ep.obs = vec![0.5, -1.0, 2.0, 0.0, 1e3, -1e-3, 0.0, 7.0];
        ep.act = vec![1.0, 0.0, 0.0, 2.5];
        let _ = p.score_episode(&mut ep, "fuzz.csv", 2);
    }
}
