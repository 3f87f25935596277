//! Replays every committed fuzz input (fuzz/seeds/*, fuzz/regressions/*) through the same
//! entry points the cargo-fuzz targets call: each must return without a panic. This is how
//! CI checks past crashers without a nightly toolchain.

use std::path::Path;

fn replay(target: &str, run: fn(&[u8])) -> usize {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("fuzz");
    let mut count = 0;
    for dir in ["seeds", "regressions"] {
        let Ok(entries) = std::fs::read_dir(root.join(dir).join(target)) else {
            continue;
        };
        for entry in entries {
            let path = entry.unwrap().path();
            if path.is_file() {
                let bytes = std::fs::read(&path).unwrap();
                let outcome = std::panic::catch_unwind(|| run(&bytes));
                assert!(outcome.is_ok(), "{} panicked", path.display());
                count += 1;
            }
        }
    }
    count
}

#[test]
fn reader_inputs() {
    // 4 seeds and the 4 block-cut mismatches the differential reader target found.
    assert!(replay("reader", gradaudit::fuzzing::reader) >= 8);
}

#[test]
fn rules_inputs() {
    assert!(replay("rules", gradaudit::fuzzing::rules) >= 1);
}

#[test]
fn baseline_inputs() {
    assert!(replay("baseline", gradaudit::fuzzing::baseline) >= 1);
}

#[test]
fn policy_inputs() {
    assert!(replay("policy", gradaudit::fuzzing::policy) >= 3);
}
