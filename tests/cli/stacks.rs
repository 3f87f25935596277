//! Logs as training stacks write them: the done + time-limit convention, vector-environment
//! layouts, Parquet and Arrow IPC files, several files read as one log.
//!
//! Every equality here compares two writings of the same episodes: the reader must give the
//! same episodes, so the whole audit report (bootstrap included, same seed) must be identical.

use crate::util::{Dir, run};
use arrow_array::types::Float64Type;
use arrow_array::{
    ArrayRef, BooleanArray, FixedSizeListArray, Float64Array, Int64Array, ListArray, RecordBatch,
    StringArray,
};
use arrow_schema::{DataType, Field, Schema};
use std::fmt::Write as _;
use std::sync::Arc;

/// One logged step.
#[derive(Clone)]
struct Step {
    id: String,
    env: usize,
    t: usize,
    reward: f64,
    next_value: f64,
    scores: [f64; 3],
    terminated: bool,
    truncated: bool,
}

/// A small deterministic generator (the library's test stream), so the logs need no fixtures.
use gradaudit::testing::XorShift as Rng;

/// `n` episodes of a parcel-diverter gate: each either reaches its absorbing state early or
/// is cut by a 12-step time limit (then with a bootstrap value).
fn episodes(n: usize, seed: u64) -> Vec<Vec<Step>> {
    let mut rng = Rng(seed);
    (0..n)
        .map(|e| {
            let terminal = rng.unit() < 0.5;
            let len = if terminal {
                2 + (rng.unit() * 9.0) as usize
            } else {
                12
            };
            (0..len)
                .map(|t| Step {
                    id: e.to_string(),
                    env: 0,
                    t,
                    reward: (rng.unit() * 4.0 - 1.0).round() / 4.0 + 0.125 * t as f64,
                    next_value: rng.unit() * 2.0,
                    scores: [rng.unit() - 0.5, rng.unit() * 0.1, rng.unit() - 0.25],
                    terminated: terminal && t + 1 == len,
                    truncated: !terminal && t + 1 == len,
                })
                .collect()
        })
        .collect()
}

/// CSV with the given end-flag columns: `done` writes done (ended for any reason) and
/// `timeouts` (the time-limit flag); otherwise terminated and truncated.
fn csv(rows: &[Step], done: bool, id_col: &str) -> String {
    let flags = if done {
        "done,timeouts"
    } else {
        "terminated,truncated"
    };
    let mut s = format!("{id_col},step,reward,{flags},next_value,score_0,score_1,score_2\n");
    for r in rows {
        let (a, b) = if done {
            (r.terminated || r.truncated, r.truncated)
        } else {
            (r.terminated, r.truncated)
        };
        let id = if id_col == "env" {
            r.env.to_string()
        } else {
            r.id.clone()
        };
        writeln!(
            s,
            "{id},{},{},{},{},{},{},{},{}",
            r.t,
            r.reward,
            u8::from(a),
            u8::from(b),
            r.next_value,
            r.scores[0],
            r.scores[1],
            r.scores[2]
        )
        .unwrap();
    }
    s
}

/// The audit report as JSON, without the input's file name (the only field that names the
/// writing, not the episodes).
fn audit(args: &[&str]) -> serde_json::Value {
    let mut all = vec!["audit"];
    all.extend_from_slice(args);
    all.extend_from_slice(&["--format", "json", "--resamples", "200", "--seed", "7"]);
    let (code, out, err) = run(&all);
    assert_eq!(code, 0, "{all:?}: {err}");
    let mut v: serde_json::Value = serde_json::from_str(&out).expect("JSON");
    v["input"]["file"] = serde_json::Value::Null;
    v
}

fn inspect_json(args: &[&str]) -> serde_json::Value {
    let mut all = vec!["inspect"];
    all.extend_from_slice(args);
    all.extend_from_slice(&["--format", "json"]);
    let (code, out, err) = run(&all);
    assert_eq!(code, 0, "{all:?}: {err}");
    serde_json::from_str(&out).expect("JSON")
}

// Source: the end-flag conventions as the trade defines them (Gymnasium's step API since
// 0.26: done = terminated or truncated, so terminated = done and not truncated; offline RL
// datasets log `terminals` and `timeouts` the same way), from memory of their documentation.
// The same episodes written both ways must give the same audit, bit for bit.
#[test]
fn done_and_time_limit_flags_give_the_audit_of_terminated_and_truncated() {
    let dir = Dir::new("done-convention");
    let rows: Vec<Step> = episodes(80, 11).concat();
    let a = dir.write("tt.csv", csv(&rows, false, "episode").as_bytes());
    let b = dir.write("done.csv", csv(&rows, true, "episode").as_bytes());
    let (ja, jb) = (audit(&[&a]), audit(&[&b]));
    assert_eq!(ja["input"]["truncated"], jb["input"]["truncated"]);
    assert!(ja["input"]["truncated"].as_u64().unwrap() > 20);
    assert_eq!(ja, jb);
    let v = inspect_json(&[&b]);
    assert_eq!(v["end_flags"]["convention"], "done+truncated");
    let reason = v["end_flags"]["reason"].as_str().unwrap();
    assert!(
        reason.contains("'timeouts' read as truncated (a name the trade uses"),
        "{reason}"
    );
    assert_eq!(v["truncated_with_bootstrap"], v["truncated"]);
}

// The silent-loss pattern: done mapped to terminated and the time-limit flag to truncated sets
// both flags on every time-limit end. The warning counts those ends; a log whose few
// terminations fall exactly on the time limit (both flags, rarely) does not raise it.
#[test]
fn done_read_as_terminated_is_warned_and_genuine_limit_terminations_are_not() {
    let dir = Dir::new("silent-loss");
    let eps = episodes(80, 12);
    let rows: Vec<Step> = eps.concat();
    let limit_ends = eps.iter().filter(|e| e.last().unwrap().truncated).count() as u64;
    let b = dir.write("done.csv", csv(&rows, true, "episode").as_bytes());
    let v = inspect_json(&[
        &b,
        "--col",
        "terminated=done",
        "--col",
        "truncated=timeouts",
    ]);
    let w = &v["warnings"]["ends_flagged_both_ways"];
    assert_eq!(w["count"].as_u64(), Some(limit_ends), "{}", v["warnings"]);
    assert!(w["message"].as_str().unwrap().contains("--col done=HEADER"));
    assert_eq!(
        v["truncated"], 0,
        "every time-limit end was taken as terminal"
    );
    // Genuine: 3 of the time-limit ends also terminate (both flags) among ~40 truncations.
    let mut genuine = eps.clone();
    let mut marked = 0;
    for e in genuine
        .iter_mut()
        .filter(|e| e.last().unwrap().truncated)
        .take(3)
    {
        e.last_mut().unwrap().terminated = true;
        marked += 1;
    }
    assert_eq!(marked, 3);
    let g = dir.write(
        "genuine.csv",
        csv(&genuine.concat(), false, "episode").as_bytes(),
    );
    let v = inspect_json(&[&g]);
    assert!(
        v["warnings"].get("ends_flagged_both_ways").is_none(),
        "{}",
        v["warnings"]
    );
    // Few episodes, all ending on the time limit with both flags: below the warning's minimum.
    let few: Vec<Step> = genuine
        .iter()
        .filter(|e| e.last().unwrap().terminated && e.last().unwrap().truncated)
        .flatten()
        .cloned()
        .collect();
    let f = dir.write("few.csv", csv(&few, false, "episode").as_bytes());
    let v = inspect_json(&[&f]);
    assert!(
        v["warnings"].get("ends_flagged_both_ways").is_none(),
        "{}",
        v["warnings"]
    );
}

/// 8 environments' episodes written step-major (at each time, one row per environment, as a
/// vectorised collector writes them), with the ids the reader derives (ENV/RUN).
fn vector_env_rows(steps: usize) -> Vec<Step> {
    let per_env: Vec<Vec<Step>> = (0..8)
        .map(|env| {
            let mut out = Vec::new();
            for (k, ep) in episodes(40, 100 + env as u64).into_iter().enumerate() {
                for mut s in ep {
                    s.env = env;
                    s.id = format!("{env}/{k}");
                    out.push(s);
                }
            }
            out.truncate(steps);
            out
        })
        .collect();
    (0..steps)
        .flat_map(|t| per_env.iter().map(move |e| e[t].clone()))
        .collect()
}

// Source: the vectorised-collector layout (one row per environment per step; a new episode
// starts after each end in the same environment). Derived ids must give exactly the episodes,
// hence the audit, of the same rows with explicit ids; the environments' last runs are cut by
// the end of the log (bootstrap from next_value) without an open-episode warning.
#[test]
fn vector_env_layout_gives_the_audit_of_explicit_ids() {
    let dir = Dir::new("vector-env");
    let rows = vector_env_rows(150);
    let a = dir.write("ids.csv", csv(&rows, false, "episode").as_bytes());
    let b = dir.write("envs.csv", csv(&rows, false, "env").as_bytes());
    let mut ja = audit(&[&a]);
    let mut jb = audit(&[&b, "--env-col", "env"]);
    assert!(ja["warnings"].get("open_at_end_of_log").is_some());
    assert!(
        jb["warnings"].get("open_at_end_of_log").is_none(),
        "{}",
        jb["warnings"]
    );
    ja["warnings"] = serde_json::Value::Null;
    jb["warnings"] = serde_json::Value::Null;
    assert_eq!(ja["input"]["episodes"], jb["input"]["episodes"]);
    assert_eq!(ja, jb);
    let v = inspect_json(&[&b, "--env-col", "env"]);
    assert!(
        v["columns"]
            .as_array()
            .unwrap()
            .iter()
            .any(|c| c["role"] == "env")
    );
}

/// Columns of a log as Arrow arrays: scores as one list column `policy.score` (fixed size or
/// variable), or as scalar columns.
fn batch(rows: &[Step], fixed: bool) -> RecordBatch {
    let f64s = |f: &dyn Fn(&Step) -> f64| {
        Arc::new(Float64Array::from_iter_values(rows.iter().map(f))) as ArrayRef
    };
    let flags = |f: &dyn Fn(&Step) -> bool| {
        Arc::new(BooleanArray::from_iter(rows.iter().map(|r| Some(f(r))))) as ArrayRef
    };
    let values = Float64Array::from_iter_values(rows.iter().flat_map(|r| r.scores));
    let item = Arc::new(Field::new("item", DataType::Float64, false));
    let scores: ArrayRef = if fixed {
        Arc::new(FixedSizeListArray::try_new(item.clone(), 3, Arc::new(values), None).unwrap())
    } else {
        Arc::new(ListArray::from_iter_primitive::<Float64Type, _, _>(
            rows.iter().map(|r| Some(r.scores.map(Some))),
        ))
    };
    let cols: Vec<(&str, ArrayRef)> = vec![
        (
            "episode.id",
            Arc::new(StringArray::from_iter_values(
                rows.iter().map(|r| r.id.clone()),
            )),
        ),
        (
            "step",
            Arc::new(Int64Array::from_iter_values(
                rows.iter().map(|r| r.t as i64),
            )),
        ),
        ("next.reward", f64s(&|r| r.reward)),
        ("terminated", flags(&|r| r.terminated)),
        ("truncated", flags(&|r| r.truncated)),
        ("next_value", f64s(&|r| r.next_value)),
        ("policy.score", scores),
    ];
    crate::util::named_batch(cols)
}

/// The same columns as CSV (scores as score_0..2), with the dotted names.
fn dotted_csv(rows: &[Step]) -> String {
    csv(rows, false, "episode.id").replacen("reward", "next.reward", 1)
}

/// Writes `rows` as Parquet in row groups of `group` rows.
fn write_parquet(path: &std::path::Path, rows: &[Step], fixed: bool, group: usize) {
    use parquet::arrow::ArrowWriter;
    use parquet::file::properties::WriterProperties;
    let b = batch(rows, fixed);
    let props = WriterProperties::builder()
        .set_max_row_group_row_count(Some(group))
        .set_compression(parquet::basic::Compression::SNAPPY)
        .build();
    let mut w = ArrowWriter::try_new(
        std::fs::File::create(path).unwrap(),
        b.schema(),
        Some(props),
    )
    .unwrap();
    w.write(&b).unwrap();
    w.close().unwrap();
}

const COLS: [&str; 4] = ["--col", "episode=episode.id", "--col", "reward=next.reward"];

// Source: the arrow and parquet crates (the writers of the Apache Arrow project) write the
// file; the same episodes as CSV must give the identical report. Scores as a fixed-size list
// and as a variable list, in row groups of 97 rows (an episode crosses group boundaries).
#[test]
fn parquet_and_arrow_give_the_audit_of_the_same_csv() {
    let dir = Dir::new("parquet-equal");
    let rows: Vec<Step> = episodes(70, 21).concat();
    let c = dir.write("log.csv", dotted_csv(&rows).as_bytes());
    let mut args = vec![c.as_str()];
    args.extend(COLS);
    let mut want = audit(&args);
    // The parameters are named after their columns: score_k in CSV, the list's elements here.
    assert_eq!(want["input"]["parameters"][2], "score_2");
    want["input"]["parameters"] =
        serde_json::json!(["policy.score[0]", "policy.score[1]", "policy.score[2]"]);
    for fixed in [true, false] {
        let p = dir.path(if fixed { "fixed.parquet" } else { "list.bin" });
        write_parquet(&p, &rows, fixed, 97);
        let p = p.to_string_lossy().into_owned();
        let mut args = vec![p.as_str()];
        args.extend(COLS);
        args.extend(["--col", "score=policy.score"]);
        assert_eq!(audit(&args), want, "fixed-size list: {fixed}");
    }
    // Arrow IPC file format, in batches of 50 rows; the stream format (no footer; batches read
    // as they come), in batches of 64.
    let b = batch(&rows, true);
    for (name, stream, rows_per_batch, what) in [
        ("log.arrow", false, 50, "Arrow IPC"),
        ("log.arrows", true, 64, "Arrow IPC stream"),
    ] {
        let p = dir.path(name);
        write_arrow(&p, &b, stream, rows_per_batch);
        let p = p.to_string_lossy().into_owned();
        let mut args = vec![p.as_str()];
        args.extend(COLS);
        args.extend(["--col", "score=policy.score"]);
        assert_eq!(audit(&args), want, "{what}");
    }
}

/// Writes `b` as an Arrow IPC file (or stream) in slices of `rows_per_batch` rows.
fn write_arrow(path: &std::path::Path, b: &RecordBatch, stream: bool, rows_per_batch: usize) {
    let file = std::fs::File::create(path).unwrap();
    let slices = (0..b.num_rows())
        .step_by(rows_per_batch)
        .map(|start| b.slice(start, rows_per_batch.min(b.num_rows() - start)));
    if stream {
        let mut w = arrow_ipc::writer::StreamWriter::try_new(file, &b.schema()).unwrap();
        slices.for_each(|s| w.write(&s).unwrap());
        w.finish().unwrap();
    } else {
        let mut w = arrow_ipc::writer::FileWriter::try_new(file, &b.schema()).unwrap();
        slices.for_each(|s| w.write(&s).unwrap());
        w.finish().unwrap();
    }
}

fn refused(args: &[&str], wants: &[&str]) {
    let (code, _, err) = run(args);
    assert_eq!(code, 2, "{args:?}: {err}");
    for w in wants {
        assert!(err.contains(w), "{args:?}: {w:?} in {err}");
    }
    assert!(!err.contains("panicked"), "{err}");
}

#[test]
fn malformed_parquet_is_refused_with_its_position() {
    let dir = Dir::new("parquet-bad");
    let rows: Vec<Step> = episodes(30, 5).concat();
    let good = dir.path("good.parquet");
    write_parquet(&good, &rows, true, 64);
    let bytes = std::fs::read(&good).unwrap();
    // Cut off: the footer is gone.
    let cut = dir.write("cut.parquet", &bytes[..bytes.len() / 2]);
    refused(
        &["inspect", &cut],
        &["cut.parquet", "cannot read the Parquet file"],
    );
    // Wrong type: the reward column holds strings.
    let b = batch(&rows, true);
    let mut cols = b.columns().to_vec();
    cols[2] = Arc::new(StringArray::from_iter_values(rows.iter().map(|_| "x")));
    let mut fields: Vec<Field> = b
        .schema()
        .fields()
        .iter()
        .map(|f| f.as_ref().clone())
        .collect();
    fields[2] = Field::new("next.reward", DataType::Utf8, false);
    let wrong = RecordBatch::try_new(Arc::new(Schema::new(fields.clone())), cols).unwrap();
    let p = dir.path("wrong.parquet");
    let mut w = parquet::arrow::ArrowWriter::try_new(
        std::fs::File::create(&p).unwrap(),
        wrong.schema(),
        None,
    )
    .unwrap();
    w.write(&wrong).unwrap();
    w.close().unwrap();
    let p = p.to_string_lossy().into_owned();
    let mut args = vec!["inspect", p.as_str()];
    args.extend(COLS);
    args.extend(["--col", "score=policy.score"]);
    refused(
        &args,
        &["wrong.parquet", "column 3 ('next.reward')", "holds Utf8"],
    );
    // A null in a required column (the reward of row 40, in row group 0 of 64 rows).
    let mut cols = b.columns().to_vec();
    cols[2] = Arc::new(Float64Array::from_iter(
        rows.iter()
            .enumerate()
            .map(|(i, r)| (i != 40).then_some(r.reward)),
    ));
    fields[2] = Field::new("next.reward", DataType::Float64, true);
    let nulls = RecordBatch::try_new(Arc::new(Schema::new(fields)), cols).unwrap();
    let p = dir.path("nulls.parquet");
    let props = parquet::file::properties::WriterProperties::builder()
        .set_max_row_group_row_count(Some(32))
        .build();
    let mut w = parquet::arrow::ArrowWriter::try_new(
        std::fs::File::create(&p).unwrap(),
        nulls.schema(),
        Some(props),
    )
    .unwrap();
    w.write(&nulls).unwrap();
    w.close().unwrap();
    let p = p.to_string_lossy().into_owned();
    let mut args = vec!["inspect", p.as_str()];
    args.extend(COLS);
    args.extend(["--col", "score=policy.score"]);
    refused(
        &args,
        &[
            "nulls.parquet, row group 1, row 8",
            "column 3 ('next.reward')",
            "missing (null)",
        ],
    );
}

// Several files are their concatenation; an episode that continues in the next file is an
// error naming both files (unless --env-col makes runs continue).
#[test]
fn several_files_read_as_one_log() {
    let dir = Dir::new("several");
    let eps = episodes(60, 31);
    let all = dir.write("all.csv", csv(&eps.concat(), false, "episode").as_bytes());
    let parts = Dir::new("several-parts");
    parts.write(
        "part-0.csv",
        csv(&eps[..25].concat(), false, "episode").as_bytes(),
    );
    parts.write(
        "part-1.csv",
        csv(&eps[25..].concat(), false, "episode").as_bytes(),
    );
    let folder = parts.tmp.path().to_string_lossy().into_owned();
    let want = audit(&[&all]);
    assert_eq!(audit(&[&folder]), want);
    let (a, b) = (parts.path("part-0.csv"), parts.path("part-1.csv"));
    let (a, b) = (a.to_string_lossy(), b.to_string_lossy());
    assert_eq!(audit(&[&a, &b]), want);
    // Cut inside an episode: the second file continues it.
    let rows = eps.concat();
    let cut = rows.iter().position(|r| r.id == "30" && r.t == 1).unwrap();
    let x = dir.write("x.csv", csv(&rows[..cut], false, "episode").as_bytes());
    let y = dir.write("y.csv", csv(&rows[cut..], false, "episode").as_bytes());
    refused(
        &["audit", &x, &y],
        &[
            "y.csv, line 2",
            "episode '30' started in",
            "x.csv, line",
            "may not span files",
        ],
    );
    // A vector-environment log split in two files: runs continue.
    let rows = vector_env_rows(60);
    let whole = dir.write("env.csv", csv(&rows, false, "env").as_bytes());
    let e1 = dir.write("env-1.csv", csv(&rows[..203], false, "env").as_bytes());
    let e2 = dir.write("env-2.csv", csv(&rows[203..], false, "env").as_bytes());
    assert_eq!(
        audit(&[&e1, &e2, "--env-col", "env"]),
        audit(&[&whole, "--env-col", "env"])
    );
}

// Regression (the reader's record of finished ids was not counted against --max-memory):
// 200,000 one-step episodes need about 8.6 MB of id digests (262,144 buckets of 33 bytes).
#[test]
fn reader_finished_ids_count_against_the_budget() {
    let dir = Dir::new("ended-budget");
    let mut text = String::from("episode,reward,terminated\n");
    for i in 0..200_000 {
        writeln!(text, "{i},1,1").unwrap();
    }
    let p = dir.write("many.csv", text.as_bytes());
    refused(
        &["inspect", &p, "--max-memory", "4"],
        &[
            "many.csv, line",
            "finished episodes",
            "budget of 4 MB",
            "raise --max-memory",
        ],
    );
    let (code, _, err) = run(&["inspect", &p, "--max-memory", "64"]);
    assert_eq!(code, 0, "{err}");
}
