//! Bad input: every case exits 2 with a message naming the file and, where one field is at
//! fault, its line and column; never a panic.

use crate::util::{Dir, run};

const HEAD: &str = "episode,step,reward,terminated,truncated,score_0\n";

/// Runs `inspect` on `text` and checks the failure; returns stderr.
fn fails(name: &str, text: &[u8], wants: &[&str]) -> String {
    let dir = Dir::new(name);
    let path = dir.write(&format!("{name}.csv"), text);
    check(&path, wants)
}

fn check(path: &str, wants: &[&str]) -> String {
    let (code, _, err) = run(&["inspect", path]);
    assert_eq!(code, 2, "exit code for {path}: {err}");
    assert!(err.contains(path), "message names the file: {err}");
    for w in wants {
        assert!(err.contains(w), "message should contain {w:?}: {err}");
    }
    assert!(
        !err.contains("panicked") && !err.contains("RUST_BACKTRACE"),
        "{err}"
    );
    err
}

#[test]
fn non_numeric_reward() {
    fails(
        "nonnum",
        format!("{HEAD}a,0,1,0,0,0.5\na,1,abc,1,0,0.5\n").as_bytes(),
        &["line 3", "column 3 ('reward')", "\"abc\""],
    );
}

#[test]
fn empty_numeric_field() {
    fails(
        "empty",
        format!("{HEAD}a,0,,1,0,0.5\n").as_bytes(),
        &["line 2", "column 3 ('reward')", "empty"],
    );
}

#[test]
fn nan_and_infinity() {
    fails(
        "nan",
        format!("{HEAD}a,0,1,1,0,NaN\n").as_bytes(),
        &["line 2", "column 6 ('score_0')", "not a finite"],
    );
    fails(
        "inf",
        format!("{HEAD}a,0,-inf,1,0,1\n").as_bytes(),
        &["line 2", "column 3", "not a finite"],
    );
}

#[test]
fn missing_required_column_suggests() {
    let err = fails(
        "missing",
        b"episode,step,rewrd,terminated\na,0,1,1\n",
        &["'reward'", "did you mean 'rewrd'", "--col reward=rewrd"],
    );
    assert!(err.contains("line 1"), "{err}");
}

#[test]
fn ragged_row() {
    fails(
        "ragged",
        format!("{HEAD}a,0,1,0,0,0.5\na,1,1,1\n").as_bytes(),
        &["line 3", "4 fields", "header has 6"],
    );
}

#[test]
fn repeated_and_skipped_steps() {
    fails(
        "repeat",
        format!("{HEAD}a,0,1,0,0,1\na,0,1,1,0,1\n").as_bytes(),
        &["line 3", "column 2 ('step')", "repeats"],
    );
    fails(
        "skip",
        format!("{HEAD}a,0,1,0,0,1\na,2,1,1,0,1\n").as_bytes(),
        &["line 3", "does not follow"],
    );
}

#[test]
fn reused_episode_id() {
    fails(
        "reused",
        format!("{HEAD}a,0,1,1,0,1\nb,0,1,1,0,1\na,0,1,1,0,1\n").as_bytes(),
        &["line 4", "column 1 ('episode')", "already ended at line 2"],
    );
}

#[test]
fn bad_boolean() {
    fails(
        "bool",
        format!("{HEAD}a,0,1,yes,0,1\n").as_bytes(),
        &["line 2", "column 4 ('terminated')", "0/1 or true/false"],
    );
}

#[test]
fn empty_and_header_only_files() {
    fails("emptyfile", b"", &["empty"]);
    fails("headeronly", HEAD.as_bytes(), &["line 1", "no data rows"]);
}

#[test]
fn corrupt_and_cut_gzip() {
    let dir = Dir::new("gz");
    let good = dir.write_gz(
        "good.csv.gz",
        format!("{HEAD}a,0,1,1,0,1\n").repeat(1).as_bytes(),
    );
    let mut bytes = std::fs::read(&good).unwrap();
    // Damage the deflate payload, keeping the magic bytes.
    let mid = bytes.len() / 2;
    bytes[mid] ^= 0xff;
    bytes[mid + 1] ^= 0xff;
    let bad = dir.write("bad.csv.gz", &bytes);
    check(&bad, &["compressed stream"]);
    let cut = dir.write("cut.csv.gz", &std::fs::read(&good).unwrap()[..20]);
    check(&cut, &["compressed stream"]);
    // Damage that decodes into plausible garbage (here a header with a duplicate name) must
    // still be reported as damage: gzip's checksum at the end of the stream catches it.
    let text = "episode,step,reward,terminated,truncated,score_0\na,0,1,1,0,1\n";
    let good = dir.write_gz("plain.csv.gz", text.as_bytes());
    let mut bytes = std::fs::read(&good).unwrap();
    let mid = bytes.len() / 2;
    bytes[mid] ^= 0xff;
    bytes[mid + 1] ^= 0xff;
    let garbled = dir.write("garbled.csv.gz", &bytes);
    check(&garbled, &["compressed stream"]);
}

#[test]
fn invalid_utf8_header() {
    fails(
        "utf8",
        b"episode,rew\xffard,reward\na,0,1\n",
        &["line 1", "column 2", "not valid UTF-8"],
    );
}

#[test]
fn missing_file_is_exit_2() {
    let (code, _, err) = run(&["inspect", "/nonexistent/log.csv"]);
    assert_eq!(code, 2);
    assert!(err.contains("/nonexistent/log.csv"), "{err}");
}
