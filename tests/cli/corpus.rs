//! The bad-input corpus (tests/fixtures/bad/, one file per failure class): each file gives the
//! expected exit code, its message names what the table says (the line and the column where
//! one field is at fault), and stderr never shows a panic or a backtrace.

use crate::util::run;

/// (file, failure class, command, exit code, fragments the message must contain)
const CASES: &[(&str, &str, &str, i32, &[&str])] = &[
    (
        "malformed_number.csv",
        "malformed number",
        "inspect",
        2,
        &["line 3", "column 3 ('reward')", "\"1.2.3\""],
    ),
    (
        "empty_field.csv",
        "empty field",
        "inspect",
        2,
        &["line 2", "column 3 ('reward')", "empty"],
    ),
    (
        "nan.csv",
        "NaN",
        "inspect",
        2,
        &["line 2", "column 6 ('score_0')", "not a finite number"],
    ),
    (
        "infinity.csv",
        "infinity",
        "inspect",
        2,
        &["line 2", "column 3 ('reward')", "not a finite number"],
    ),
    (
        "missing_header.csv",
        "missing header",
        "inspect",
        2,
        &["line 1", "'reward'", "did you mean 'rewrd'"],
    ),
    (
        "duplicated_header.csv",
        "duplicated header",
        "inspect",
        2,
        &["line 1", "column 3 ('reward')", "appears twice"],
    ),
    (
        "ragged_row.csv",
        "ragged row",
        "inspect",
        2,
        &["line 3", "4 fields", "header has 6"],
    ),
    (
        "repeated_step.csv",
        "repeated step",
        "inspect",
        2,
        &["line 3", "column 2 ('step')", "repeats"],
    ),
    (
        "skipped_step.csv",
        "skipped step",
        "inspect",
        2,
        &["line 3", "column 2 ('step')", "does not follow"],
    ),
    (
        "reused_episode_id.csv",
        "reused episode id",
        "inspect",
        2,
        &["line 4", "column 1 ('episode')", "already ended at line 2"],
    ),
    (
        "end_flag_twice.csv",
        "end flag set twice",
        "inspect",
        2,
        &["line 3", "column 1 ('episode')", "already ended at line 2"],
    ),
    (
        "boolean_spelling.csv",
        "boolean spelling",
        "inspect",
        2,
        &["line 2", "column 4 ('terminated')", "0/1 or true/false"],
    ),
    (
        "empty.csv",
        "empty file",
        "inspect",
        2,
        &["the file is empty"],
    ),
    (
        "header_only.csv",
        "header only",
        "inspect",
        2,
        &["line 1", "no data rows"],
    ),
    (
        "corrupt_gzip.csv.gz",
        "corrupt gzip",
        "inspect",
        2,
        &["compressed stream is damaged"],
    ),
    (
        "truncated_gzip.csv.gz",
        "truncated gzip",
        "inspect",
        2,
        &["compressed stream is damaged"],
    ),
    (
        "huge_field.csv.gz",
        "6 MB field",
        "inspect",
        2,
        &["line 2", "column 3 ('reward')", "cannot read", "..."],
    ),
    (
        "invalid_utf8_header.csv",
        "invalid UTF-8 header",
        "inspect",
        2,
        &["line 1", "column 2", "not valid UTF-8"],
    ),
    (
        "single_episode.csv",
        "single episode",
        "audit",
        2,
        &["1 episode(s)", "at least 2"],
    ),
    (
        "cut_mid_row.csv",
        "cut mid row (no final line break, episode open)",
        "inspect",
        2,
        &["line 4", "ends inside a row", "cut short"],
    ),
    (
        "ends_inside_quotes.csv",
        "ends inside a quoted field",
        "inspect",
        2,
        &["line 3", "inside a quoted field", "cut short"],
    ),
    (
        "cr_only.csv",
        "CR-only line endings, bad field on record 4",
        "inspect",
        2,
        &["line 4", "column 3 ('reward')", "\"x\""],
    ),
    (
        "step_overflow.csv",
        "step past i64::MAX",
        "inspect",
        2,
        &["line 3", "column 2 ('step')", "does not follow"],
    ),
    (
        "long_id.csv",
        "5000-byte episode id",
        "inspect",
        2,
        &[
            "line 2",
            "column 1 ('episode')",
            "limit of 4096 bytes",
            "...",
        ],
    ),
    (
        "stray_quote.csv",
        "stray quote in an id, quoted id across lines (accepted)",
        "inspect",
        0,
        &[],
    ),
    ("bom.csv", "BOM (accepted)", "inspect", 0, &[]),
    ("crlf.csv", "CRLF (accepted)", "inspect", 0, &[]),
];

#[test]
fn every_corpus_file_behaves_as_its_class_says() {
    let dir = format!("{}/tests/fixtures/bad", env!("CARGO_MANIFEST_DIR"));
    let listed: Vec<&str> = CASES.iter().map(|c| c.0).collect();
    for entry in std::fs::read_dir(&dir).unwrap() {
        let name = entry.unwrap().file_name().into_string().unwrap();
        assert!(
            listed.contains(&name.as_str()),
            "{name} has no expectation in CASES"
        );
    }
    for (file, class, command, code, wants) in CASES {
        let path = format!("{dir}/{file}");
        let (got, out, err) = run(&[command, &path]);
        assert_eq!(got, *code, "{class} ({file}): {err}{out}");
        if *code == 2 {
            assert!(
                err.contains(file),
                "{class}: the message names the file: {err}"
            );
        }
        for w in *wants {
            assert!(
                err.contains(w),
                "{class}: message should contain {w:?}: {err}"
            );
        }
        assert!(
            !err.contains("panicked") && !err.contains("backtrace"),
            "{class}: {err}"
        );
        assert!(
            err.lines().count() <= 3,
            "{class}: one short message: {err}"
        );
    }
}
