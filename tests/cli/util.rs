//! Test helpers: a temporary folder per test and a command builder for the binary.

use assert_cmd::Command;
use std::io::Write;
use std::path::PathBuf;

pub struct Dir {
    pub tmp: tempfile::TempDir,
}

impl Dir {
    pub fn new(name: &str) -> Dir {
        Dir {
            tmp: tempfile::Builder::new()
                .prefix(&format!("gradaudit-{name}-"))
                .tempdir()
                .expect("temp dir"),
        }
    }

    pub fn path(&self, file: &str) -> PathBuf {
        self.tmp.path().join(file)
    }

    pub fn write(&self, file: &str, bytes: &[u8]) -> String {
        let p = self.path(file);
        std::fs::write(&p, bytes).expect("write fixture");
        p.to_string_lossy().into_owned()
    }

    pub fn write_gz(&self, file: &str, bytes: &[u8]) -> String {
        let p = self.path(file);
        let f = std::fs::File::create(&p).expect("create");
        let mut gz = flate2::write::GzEncoder::new(f, flate2::Compression::default());
        gz.write_all(bytes).expect("gzip");
        gz.finish().expect("gzip finish");
        p.to_string_lossy().into_owned()
    }
}

pub fn gradaudit() -> Command {
    Command::cargo_bin("gradaudit").expect("binary built")
}

/// The repository's demo log of this name.
pub fn demo(name: &str) -> String {
    format!("{}/demo-data/{name}", env!("CARGO_MANIFEST_DIR"))
}

/// `crosscheck` of both logged columns (`adv`, `value_target`) of a rover demo log, as the
/// README runs it; a format is added by the caller.
pub fn crosscheck_args(log: &str) -> Vec<&str> {
    vec![
        "crosscheck",
        log,
        "--advantage",
        "adv",
        "--returns",
        "value_target",
    ]
}

/// Runs the binary and returns (exit code, stdout, stderr).
pub fn run(args: &[&str]) -> (i32, String, String) {
    let out = gradaudit().args(args).output().expect("runs");
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

/// Runs the binary, expects exit 0, and parses stdout as JSON.
pub fn run_json(args: &[&str]) -> serde_json::Value {
    let (code, out, err) = run(args);
    assert_eq!(code, 0, "{args:?}: {err}");
    serde_json::from_str(&out).expect("stdout is JSON")
}

/// The string field `key` of every element of the JSON array `list`.
pub fn strings<'a>(list: &'a serde_json::Value, key: &str) -> Vec<&'a str> {
    list.as_array()
        .expect("a JSON array")
        .iter()
        .map(|e| e[key].as_str().expect("a string field"))
        .collect()
}

/// Two audit reports (JSON) list the same estimators with the same variances, to `rel` relative:
/// the check behind "scores from a policy equal the logged ones".
pub fn assert_same_variances(a: &serde_json::Value, b: &serde_json::Value, rel: f64) {
    let (xs, ys) = (
        a["estimators"].as_array().unwrap(),
        b["estimators"].as_array().unwrap(),
    );
    assert_eq!(xs.len(), ys.len());
    for (x, y) in xs.iter().zip(ys) {
        assert_eq!(x["name"], y["name"]);
        let (vx, vy) = (
            x["variance"].as_f64().unwrap(),
            y["variance"].as_f64().unwrap(),
        );
        assert!(
            (vx - vy).abs() <= rel * vx.abs(),
            "{}: {vx} vs {vy}",
            x["name"]
        );
    }
}

/// A record batch of non-nullable columns, each named, in the order given.
pub fn named_batch(cols: Vec<(&str, arrow_array::ArrayRef)>) -> arrow_array::RecordBatch {
    let fields: Vec<arrow_schema::Field> = cols
        .iter()
        .map(|(n, a)| arrow_schema::Field::new(*n, a.data_type().clone(), false))
        .collect();
    arrow_array::RecordBatch::try_new(
        std::sync::Arc::new(arrow_schema::Schema::new(fields)),
        cols.into_iter().map(|c| c.1).collect(),
    )
    .unwrap()
}
