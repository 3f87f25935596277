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

/// Bad policy descriptions and weights (tests/fixtures/bad_policy/), each audited against the
/// fixture log.csv there: (description, failure class, fragments the message must contain).
/// actor.safetensors (a 2 -> 3 tanh -> Gaussian actor, F32, plus an I64 tensor 'steps' and a
/// spare [3, 3] one) and corrupt.safetensors (a header that is not JSON) are the weights they
/// name.
const POLICY_CASES: &[(&str, &str, &[&str])] = &[
    (
        "missing_tensor.json",
        "tensor missing from the weights file",
        &[
            "actor.safetensors",
            "no tensor named 'pi.9.weight' (the weight of layer 1)",
            "did you mean 'pi.0.weight'",
        ],
    ),
    (
        "wrong_shape.json",
        "tensor of the wrong shape",
        &[
            "actor.safetensors",
            "tensor 'spare.weight' (the weight of the mean layer) has shape [3, 3], expected [2, 3]",
        ],
    ),
    (
        "wrong_dtype.json",
        "tensor of a dtype that is not a float",
        &["actor.safetensors", "tensor 'steps' has dtype I64"],
    ),
    (
        "corrupt_weights.json",
        "weights file that is not safetensors",
        &["corrupt.safetensors", "not a readable safetensors file"],
    ),
    (
        "missing_weights_file.json",
        "weights file that does not exist",
        &["nowhere.safetensors"],
    ),
    (
        "squashed_action.json",
        "action at the bound of a tanh-squashed head",
        &[
            "log.csv, line 4, column 7 ('act_0')",
            "episode '0', step 2",
            "outside (-1, 1)",
        ],
    ),
    (
        "discrete_action.json",
        "discrete action outside the range (linear policy)",
        &[
            "log.csv, line 2, column 8 ('act_1')",
            "episode '0', step 0",
            "action -0.3",
        ],
    ),
];

#[test]
fn every_bad_policy_file_gives_its_message() {
    let dir = format!("{}/tests/fixtures/bad_policy", env!("CARGO_MANIFEST_DIR"));
    let listed: Vec<&str> = POLICY_CASES.iter().map(|c| c.0).collect();
    for entry in std::fs::read_dir(&dir).unwrap() {
        let name = entry.unwrap().file_name().into_string().unwrap();
        if name.ends_with(".json") {
            assert!(
                listed.contains(&name.as_str()),
                "{name} has no expectation in POLICY_CASES"
            );
        }
    }
    let log = format!("{dir}/log.csv");
    for (file, class, wants) in POLICY_CASES {
        let path = format!("{dir}/{file}");
        let (code, out, err) = run(&["audit", &log, "--policy", &path, "--resamples", "50"]);
        assert_eq!(code, 2, "{class} ({file}): {err}{out}");
        for w in *wants {
            assert!(
                err.contains(w),
                "{class}: message should contain {w:?}: {err}"
            );
        }
        assert!(!err.contains("panicked"), "{class}: {err}");
        assert!(
            err.lines().count() <= 3,
            "{class}: one short message: {err}"
        );
    }
}
