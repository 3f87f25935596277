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
    // The same gzip detection as a log opened from a path.
    let Ok((input, _)) =
        crate::log::source::decompressed(Box::new(std::io::Cursor::new(bytes.to_vec())))
    else {
        return;
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
