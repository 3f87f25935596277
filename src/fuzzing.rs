//! Entry points for fuzzing the parsers that read untrusted files. The cargo-fuzz targets in
//! fuzz/ call these, and a regular test replays the committed regression inputs through them,
//! so CI checks past crashers without a nightly toolchain. Each must return, never panic.

use crate::log::{LogReader, Progress, ReadOptions};

/// Reads a whole log from `bytes` (gzip or plain), discarding the episodes.
pub fn reader(bytes: &[u8]) {
    let opts = ReadOptions {
        progress: Progress::Hidden,
        ..ReadOptions::default()
    };
    let input: Box<dyn std::io::Read + Send> = if bytes.starts_with(&[0x1f, 0x8b]) {
        Box::new(flate2::read::MultiGzDecoder::new(std::io::Cursor::new(
            bytes.to_vec(),
        )))
    } else {
        Box::new(std::io::Cursor::new(bytes.to_vec()))
    };
    if let Ok(mut r) = LogReader::from_reader(input, "fuzz.csv", &opts, None) {
        while let Ok(Some(_)) = r.next_episode() {}
    }
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
