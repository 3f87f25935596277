//! Hardening: counts that would overflow an allocation are refused against the memory budget
//! before anything is allocated, and the output does not depend on the row order (ids that
//! share a canonical key, interleaved rows with --fit-value).

use crate::util::{Dir, demo, run};
use std::fmt::Write;

/// Exit 2, one message naming `wants`, never a panic.
fn refused(args: &[&str], wants: &[&str]) {
    let (code, out, err) = run(args);
    assert_eq!(code, 2, "{args:?}: {err}{out}");
    for w in wants {
        assert!(
            err.contains(w),
            "{args:?}: message should contain {w:?}: {err}"
        );
    }
    assert!(
        !err.contains("panicked") && !err.contains("backtrace"),
        "{args:?}: {err}"
    );
}

#[test]
fn huge_resample_count_is_refused_before_allocating() {
    let rover = demo("docking_rover.csv");
    let budget = ["memory budget of", "--max-memory"];
    for (option, value) in [
        ("--resamples", "2305843009213693952"),
        ("--resamples", "18446744073709551615"),
        ("--splits", "4611686018427387904"),
        ("--splits", "18446744073709551615"),
    ] {
        for command in ["audit", "sweep", "gate"] {
            let mut args = vec![command, rover.as_str(), option, value];
            match command {
                "sweep" => args.extend(["--over", "lambda"]),
                "gate" => args.extend(["--require", "rtg:snr>=0"]),
                _ => {}
            }
            let mut wants = budget.to_vec();
            wants.push(option);
            refused(&args, &wants);
        }
    }
    // Within the machine's memory but over a small budget: refused once the row width is
    // known, naming the width, before the log is read.
    refused(
        &[
            "audit",
            &rover,
            "--resamples",
            "1000000",
            "--max-memory",
            "10",
        ],
        &["--resamples 1000000", "summary columns", "budget of 10 MB"],
    );
}

#[test]
fn huge_fold_count_is_refused_before_allocating() {
    let rover = demo("docking_rover.csv");
    // (--folds is an option of audit, sweep and gate; inspect --fit-value uses 5.)
    for command in ["audit", "sweep", "gate"] {
        let mut args = vec![command, rover.as_str(), "--fit-value"];
        args.extend(["--folds", "18446744073709551615"]);
        match command {
            "sweep" => args.extend(["--over", "lambda"]),
            "gate" => args.extend(["--require", "rtg:snr>=0"]),
            _ => {}
        }
        refused(
            &args,
            &["18446744073709551615 folds", "--folds", "--max-memory"],
        );
    }
    refused(
        &[
            "audit",
            &rover,
            "--fit-value",
            "--folds",
            "1000000",
            "--max-memory",
            "100",
        ],
        &["1000000 folds", "budget of 100 MB"],
    );
}

#[test]
fn max_memory_beyond_the_machine_is_refused() {
    let rover = demo("docking_rover.csv");
    for command in ["audit", "inspect"] {
        refused(
            &[command, &rover, "--max-memory", "18446744073709551615"],
            &["--max-memory 18446744073709551615", "give at most"],
        );
    }
}

#[test]
fn grid_with_a_tiny_step_is_refused_not_wrapped() {
    // (1 - 0) / 1e-320 is infinite: the count once wrapped to zero ("the grid is empty").
    refused(
        &[
            "sweep",
            &demo("docking_rover.csv"),
            "--over",
            "lambda",
            "--grid",
            "0:1:1e-320",
        ],
        &["too small", "at most 10000"],
    );
}

/// The audit JSON without the file name (which differs between two copies of a log).
fn audit_json(path: &str, extra: &[&str]) -> String {
    let mut args = vec![
        "audit",
        path,
        "--format",
        "json",
        "--resamples",
        "200",
        "--splits",
        "20",
    ];
    args.extend(extra);
    let (code, out, err) = run(&args);
    assert_eq!(code, 0, "{err}");
    out.lines()
        .filter(|l| !l.contains("\"file\""))
        .collect::<Vec<_>>()
        .join("\n")
}

// Ids `1` and `01` parse to the same integer, and the invalid UTF-8 ids 0xff and 0xfe both
// decode to U+FFFD. Each id carries the same rows in both logs; only the position of the
// pair's rows in the file differs. The order is total on the raw bytes, so both logs list the
// episodes in the same order and the output is identical (a tie kept file order before).
#[test]
fn ids_1_and_01_in_any_order_give_identical_output() {
    let dir = Dir::new("ids");
    let base: Vec<&[u8]> = vec![b"3", b"2", b"x", b"4", b"5"];
    let pairs: [[&[u8]; 2]; 2] = [[b"1", b"01"], [b"\xff", b"\xfe"]];
    for (k, pair) in pairs.iter().enumerate() {
        // The same episodes (id -> row content) in two row orders.
        let rows = |first: usize| {
            let mut ids = base.clone();
            ids.insert(1, pair[first]);
            ids.insert(3, pair[1 - first]);
            ids
        };
        let (a, b) = (rows(0), rows(1));
        // Row content is tied to the id, not to the position: build both logs from one map.
        let content = |id: &[u8]| -> String {
            let h = id
                .iter()
                .fold(7u32, |h, &c| h.wrapping_mul(31).wrapping_add(c as u32));
            format!(",{},1,{}\n", (h % 11) as f64 - 5.0, (h % 7) as f64 - 3.0)
        };
        let log = |ids: &[&[u8]]| {
            let mut out = b"episode,reward,terminated,score_0\n".to_vec();
            for id in ids {
                out.extend_from_slice(id);
                out.extend_from_slice(content(id).as_bytes());
            }
            out
        };
        let pa = dir.write(&format!("a{k}.csv"), &log(&a));
        let pb = dir.write(&format!("b{k}.csv"), &log(&b));
        let (ja, jb) = (audit_json(&pa, &[]), audit_json(&pb, &[]));
        assert!(ja.contains("signal_interval"));
        assert_eq!(ja, jb, "pair {k}: swapped rows changed the audit");
    }
}

/// `text`'s data rows regrouped: episodes in reverse order of their first row, their rows
/// interleaved round-robin (each episode keeps its own row order).
fn interleave(text: &str) -> String {
    let mut lines = text.lines();
    let header = lines.next().expect("header");
    let mut episodes: Vec<(String, Vec<&str>)> = Vec::new();
    for l in lines {
        let id = l.split(',').next().expect("id").to_string();
        match episodes.iter_mut().find(|(e, _)| *e == id) {
            Some((_, rows)) => rows.push(l),
            None => episodes.push((id, vec![l])),
        }
    }
    episodes.reverse();
    let mut out = format!("{header}\n");
    let longest = episodes.iter().map(|(_, r)| r.len()).max().unwrap_or(0);
    for t in 0..longest {
        for (_, rows) in &episodes {
            if let Some(l) = rows.get(t) {
                out.push_str(l);
                out.push('\n');
            }
        }
    }
    out
}

#[test]
fn fit_value_is_bit_identical_under_interleaving() {
    let dir = Dir::new("interleave");
    let text = std::fs::read_to_string(demo("docking_rover.csv")).unwrap();
    let mixed = dir.write("mixed.csv", interleave(&text).as_bytes());
    let original = dir.write("original.csv", text.as_bytes());
    assert_ne!(
        std::fs::read(&mixed).unwrap(),
        std::fs::read(&original).unwrap()
    );
    assert_eq!(
        audit_json(&original, &["--fit-value"]),
        audit_json(&mixed, &["--fit-value"])
    );
    let inspect = |p: &str| {
        let (code, out, err) = run(&["inspect", p, "--fit-value", "--format", "json"]);
        assert_eq!(code, 0, "{err}");
        out.lines()
            .filter(|l| !l.contains("\"file\""))
            .collect::<Vec<_>>()
            .join("\n")
    };
    let (a, b) = (inspect(&original), inspect(&mixed));
    assert!(a.contains("fitted_explained_variance") && a.contains("\"sd\""));
    assert_eq!(a, b);
}

#[test]
fn inspect_returns_beyond_the_budget_are_refused() {
    // 140,000 one-step episodes: their returns (8 bytes each, for the median) exceed 1 MB.
    // Written as a vector-environment layout, whose derived ids need no record of finished
    // ids (which would exceed the budget first: see reader_finished_ids_count_against_the_budget).
    let dir = Dir::new("inspect-budget");
    let mut text = String::from("env,reward,terminated\n");
    for i in 0..140_000 {
        writeln!(text, "{},{},1", i % 8, i % 3).unwrap();
    }
    let p = dir.write("many.csv", text.as_bytes());
    refused(
        &["inspect", &p, "--env-col", "env", "--max-memory", "1"],
        &[
            "many.csv",
            "episodes (kept for the exact median)",
            "budget of 1 MB",
            "raise --max-memory",
        ],
    );
    // The returns' vector is charged at its capacity, and while it grows at the old and the
    // new one (with the reader's blocks on the same ledger): 4 MB holds them.
    let (code, _, err) = run(&["inspect", &p, "--env-col", "env", "--max-memory", "4"]);
    assert_eq!(code, 0, "{err}");
}
