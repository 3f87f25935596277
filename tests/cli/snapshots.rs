//! Snapshot tests of the text outputs on the demo logs: every table, Markdown and summary layout
//! is kept under tests/snapshots/, so a change of layout (or of a figure) is a visible diff in
//! review. After a deliberate change, rewrite them with
//! `GRADAUDIT_BLESS=1 cargo test --locked --test cli snapshots` and read the diff before
//! committing it.
//!
//! The runs use the default seed and the repository-relative demo paths (the binary runs in the
//! repository root), so the files hold nothing of the machine.

use crate::util::gradaudit;
use std::path::PathBuf;

const ROVER: &str = "demo-data/docking_rover.csv";
const DIVERTER: &str = "demo-data/parcel_diverter.csv";

/// (snapshot file, arguments, expected exit code).
fn cases() -> Vec<(&'static str, Vec<&'static str>, i32)> {
    let gate = [
        "gate",
        ROVER,
        "--require",
        "gae:0.5:snr>=2",
        "--require",
        "rtg:snr>=1000",
    ];
    vec![
        ("audit_rover.txt", vec!["audit", ROVER], 0),
        (
            "audit_rover_wide.txt",
            vec!["audit", ROVER, "--wide", "--resamples", "500"],
            0,
        ),
        (
            "audit_rover.md",
            vec!["audit", ROVER, "--format", "markdown"],
            0,
        ),
        ("audit_diverter.txt", vec!["audit", DIVERTER], 0),
        (
            "sweep_rover_lambda.txt",
            vec!["sweep", ROVER, "--over", "lambda"],
            0,
        ),
        (
            "sweep_rover_lambda.md",
            vec!["sweep", ROVER, "--over", "lambda", "--format", "markdown"],
            0,
        ),
        (
            "sweep_rover_nstep.txt",
            vec!["sweep", ROVER, "--over", "nstep", "--resamples", "500"],
            0,
        ),
        (
            "gate_rover.txt",
            [&gate[..], &["--resamples", "500"]].concat(),
            1,
        ),
        (
            "gate_rover.md",
            [&gate[..], &["--resamples", "500", "--format", "markdown"]].concat(),
            1,
        ),
        ("inspect_rover.txt", vec!["inspect", ROVER], 0),
        ("inspect_diverter.txt", vec!["inspect", DIVERTER], 0),
    ]
}

fn snapshot_path(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/snapshots")
        .join(name)
}

/// The output of `args`, run in the repository root.
pub fn output(args: &[&str], code: i32) -> String {
    let out = gradaudit()
        .args(args)
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .expect("runs");
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(code), "{args:?}: {stderr}");
    String::from_utf8(out.stdout).expect("UTF-8 output")
}

/// The first line where two texts differ, both versions shown.
fn first_difference(want: &str, got: &str) -> String {
    let (w, g): (Vec<&str>, Vec<&str>) = (want.lines().collect(), got.lines().collect());
    let i = (0..w.len().max(g.len()))
        .find(|&i| w.get(i) != g.get(i))
        .unwrap_or(0);
    format!(
        "first difference at line {}:\n  snapshot: {:?}\n  now:      {:?}",
        i + 1,
        w.get(i).unwrap_or(&"(end)"),
        g.get(i).unwrap_or(&"(end)")
    )
}

#[test]
fn snapshots_of_the_text_outputs_on_the_demo_logs() {
    let bless = std::env::var_os("GRADAUDIT_BLESS").is_some_and(|v| v == "1");
    let mut stale = Vec::new();
    for (name, args, code) in cases() {
        let got = output(&args, code);
        let path = snapshot_path(name);
        if bless {
            std::fs::create_dir_all(path.parent().unwrap()).unwrap();
            std::fs::write(&path, &got).unwrap();
            continue;
        }
        let want = std::fs::read_to_string(&path).unwrap_or_default();
        if want != got {
            stale.push(format!(
                "{name} ({}): {}",
                args.join(" "),
                first_difference(&want, &got)
            ));
        }
    }
    assert!(
        stale.is_empty(),
        "outputs differ from tests/snapshots/ (after a deliberate change: \
         GRADAUDIT_BLESS=1 cargo test --locked --test cli snapshots, then read the diff):\n{}",
        stale.join("\n")
    );
}
