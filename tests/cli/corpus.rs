//! The bad-input corpus (tests/fixtures/bad/, one file per failure class): each file gives the
//! expected exit code, its message names what the table says (the line and the column where
//! one field is at fault), and stderr never shows a panic or a backtrace.
//!
//! The command is split on spaces and the file appended; `LOG` stands for the demo rover log
//! (for files that are not the log, such as a `--baseline`).

use crate::util::{demo, run};

/// A gate on the demo log whose settings match the baseline fixtures (made from this command's
/// `audit ... --format json`).
const GATE_BASELINE: &str =
    "gate LOG --estimators rtg,total --resamples 300 --splits 20 --baseline";

/// (file, failure class, command and options, exit code, fragments the message must contain);
/// a file accepted with exit 0 must give output without NaN or inf.
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
        "baseline_schema_v2.json",
        "baseline of an unknown schema version",
        GATE_BASELINE,
        2,
        &[
            "line 5, column 15",
            "unsupported report schema 'gradaudit.audit/2'",
        ],
    ),
    (
        "baseline_wrong_type.json",
        "baseline with a wrong type",
        GATE_BASELINE,
        2,
        &["line 110, column 25", "invalid type: string \"large\""],
    ),
    (
        "baseline_nulls.json",
        "baseline with nulls (accepted)",
        GATE_BASELINE,
        0,
        &[],
    ),
    (
        "ids_1_and_01.csv",
        "ids equal as integers (accepted, ordered by raw bytes)",
        "audit",
        0,
        &[],
    ),
    (
        "invalid_utf8_ids.csv",
        "invalid UTF-8 ids (accepted, ordered by raw bytes)",
        "audit",
        0,
        &[],
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
    // Figures that overflow f64: a report of undefined figures, never NaN, inf or a panic.
    ("overflow_sums.csv", "sums beyond 1e308", "audit", 0, &[]),
    (
        "overflow_sums.csv",
        "sums beyond 1e308, swept",
        "sweep --over gamma",
        0,
        &[],
    ),
    ("overflow_values.csv", "values of +-1e308", "audit", 0, &[]),
    (
        "overflow_values.csv",
        "values of +-1e308, swept",
        "sweep --over lambda --format json",
        0,
        &[],
    ),
    (
        "astronomical_scores.csv",
        "scores near 1e200",
        "audit",
        0,
        &[],
    ),
    (
        "astronomical_rewards.csv",
        "rewards near 1e152",
        "audit --format csv",
        0,
        &[],
    ),
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
        let log = demo("docking_rover.csv");
        // `LOG` stands for the demo log and the file goes last (it is an option's value);
        // otherwise the file is the command's first argument, before its options.
        let mut args: Vec<&str> = command
            .split_whitespace()
            .map(|w| if w == "LOG" { log.as_str() } else { w })
            .collect();
        if command.contains("LOG") {
            args.push(&path);
        } else {
            args.insert(1, &path);
        }
        let (got, out, err) = run(&args);
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
        if *code == 0 {
            assert!(
                !crate::hardening_numeric::prints_non_finite(&out),
                "{class}: a NaN or inf in the output:\n{out}"
            );
        }
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
