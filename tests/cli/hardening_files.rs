//! Output files and signals: `--out`, `--plot` and `--junit` never replace anything but a
//! regular file, never the input, keep an existing file's mode, are checked before the log is
//! read, are written all or none, and leave no temporary file behind on SIGINT or SIGTERM.
//! Baselines: every report the tool writes is accepted (nulls included), unknown schema versions
//! are refused, and errors give the file's own line and column.

use crate::util::{Dir, demo, run};
use std::os::unix::fs::{FileTypeExt, PermissionsExt};
use std::os::unix::process::ExitStatusExt;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

const FAST: [&str; 6] = [
    "--resamples",
    "300",
    "--splits",
    "20",
    "--estimators",
    "rtg,total",
];

fn audit_to(out: &str, extra: &[&str]) -> (i32, String, String) {
    let rover = demo("docking_rover.csv");
    let mut args = vec!["audit", rover.as_str()];
    args.extend_from_slice(&FAST);
    args.extend_from_slice(&["--out", out]);
    args.extend_from_slice(extra);
    run(&args)
}

fn mode(path: &Path) -> u32 {
    std::fs::metadata(path).unwrap().permissions().mode() & 0o7777
}

/// The names in `dir` that look like our temporary files.
fn temporaries(dir: &Path) -> Vec<String> {
    std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.starts_with(".gradaudit-") || n.contains(".tmp"))
        .collect()
}

#[test]
fn out_onto_a_symlink_does_not_replace_the_link() {
    let dir = Dir::new("symlink");
    let real = dir.write("real.txt", b"old report\n");
    std::fs::set_permissions(&real, std::fs::Permissions::from_mode(0o640)).unwrap();
    let link = dir.path("link.txt");
    std::os::unix::fs::symlink("real.txt", &link).unwrap();
    let (code, _, err) = audit_to(link.to_str().unwrap(), &[]);
    assert_eq!(code, 0, "{err}");
    let meta = std::fs::symlink_metadata(&link).unwrap();
    assert!(meta.file_type().is_symlink(), "the link stays a link");
    let text = std::fs::read_to_string(&real).unwrap();
    assert!(
        text.contains("gradaudit audit of"),
        "written through: {text}"
    );
    assert_eq!(mode(Path::new(&real)), 0o640);
    assert!(temporaries(dir.tmp.path()).is_empty());
}

#[test]
fn out_onto_a_device_fifo_or_dangling_link_is_refused() {
    let (code, _, err) = audit_to("/dev/null", &[]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("--out /dev/null: is a device"), "{err}");
    let meta = std::fs::symlink_metadata("/dev/null").unwrap();
    assert!(meta.file_type().is_char_device(), "/dev/null is left alone");

    let dir = Dir::new("dangling");
    let fifo = dir.path("pipe");
    assert!(
        Command::new("mkfifo")
            .arg(&fifo)
            .status()
            .unwrap()
            .success()
    );
    let (code, _, err) = audit_to(fifo.to_str().unwrap(), &[]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("is a FIFO"), "{err}");
    assert!(
        std::fs::symlink_metadata(&fifo)
            .unwrap()
            .file_type()
            .is_fifo()
    );

    let link = dir.path("gone.txt");
    std::os::unix::fs::symlink("missing.txt", &link).unwrap();
    let (code, _, err) = audit_to(link.to_str().unwrap(), &[]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("symbolic link"), "{err}");
    assert!(!dir.path("missing.txt").exists());
}

#[test]
fn out_onto_a_link_to_proc_self_fd_is_refused() {
    let dir = Dir::new("fdlink");
    let link = dir.path("stdout-link");
    std::os::unix::fs::symlink("/proc/self/fd/1", &link).unwrap();
    // `run` pipes stdout, so the link leads to a pipe: not a regular file.
    let (code, out, err) = audit_to(link.to_str().unwrap(), &[]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("stdout-link"), "{err}");
    assert!(out.is_empty());
    let meta = std::fs::symlink_metadata(&link).unwrap();
    assert!(meta.file_type().is_symlink(), "the link stays a link");
    assert_eq!(
        std::fs::read_link(&link).unwrap(),
        Path::new("/proc/self/fd/1")
    );
}

#[test]
fn out_equal_to_input_is_refused() {
    let dir = Dir::new("same");
    let original = std::fs::read(demo("docking_rover.csv")).unwrap();
    let log = dir.write("log.csv", &original);
    let alias = dir.path("alias.csv");
    std::os::unix::fs::symlink("log.csv", &alias).unwrap();
    let hard = dir.path("hard.csv");
    std::fs::hard_link(&log, &hard).unwrap();
    let dotted = format!("{}/./log.csv", dir.tmp.path().display());
    for out in [
        log.clone(),
        dotted,
        alias.to_string_lossy().into(),
        hard.to_string_lossy().into(),
    ] {
        for option in ["--out", "--plot"] {
            let mut args = vec!["audit", log.as_str()];
            args.extend_from_slice(&FAST);
            args.extend_from_slice(&[option, &out]);
            let (code, _, err) = run(&args);
            assert_eq!(code, 2, "{option} {out}: {err}");
            assert!(err.contains("the input"), "{option} {out}: {err}");
        }
    }
    assert_eq!(
        std::fs::read(&log).unwrap(),
        original,
        "the log is untouched"
    );
}

#[test]
fn two_outputs_on_one_file_are_refused() {
    let dir = Dir::new("twice");
    let out = dir.path("r.txt");
    let out = out.to_str().unwrap();
    let (code, _, err) = audit_to(out, &["--plot", out]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("--plot") && err.contains("--out"), "{err}");
    let rover = demo("docking_rover.csv");
    let (code, _, err) = run(&["gate", &rover, "--require", "rtg:snr>=0", "--junit", "-"]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("stdout"), "{err}");
    assert!(!Path::new(out).exists());
}

#[test]
fn existing_report_keeps_its_mode() {
    let dir = Dir::new("mode");
    let report = dir.write("report.txt", b"old\n");
    for wanted in [0o644, 0o640, 0o600] {
        std::fs::set_permissions(&report, std::fs::Permissions::from_mode(wanted)).unwrap();
        let (code, _, err) = audit_to(&report, &[]);
        assert_eq!(code, 0, "{err}");
        assert_eq!(mode(Path::new(&report)), wanted);
        assert!(std::fs::read_to_string(&report).unwrap().contains("rtg"));
    }
}

#[test]
fn existing_report_keeps_its_owner_when_run_as_root() {
    use std::os::unix::fs::MetadataExt;
    let dir = Dir::new("owner");
    let report = dir.write("report.txt", b"old\n");
    if std::fs::metadata(&report).unwrap().uid() != 0 {
        eprintln!("not root: only root may give a file to another owner");
        return;
    }
    std::os::unix::fs::chown(&report, Some(4321), Some(4322)).unwrap();
    let (code, _, err) = audit_to(&report, &[]);
    assert_eq!(code, 0, "{err}");
    let meta = std::fs::metadata(&report).unwrap();
    assert_eq!((meta.uid(), meta.gid()), (4321, 4322));
    assert!(std::fs::read_to_string(&report).unwrap().contains("rtg"));
}

#[test]
fn new_report_gets_the_umask_mode() {
    let dir = Dir::new("umask");
    let bin = assert_cmd::cargo::cargo_bin("gradaudit");
    for (umask, wanted) in [("022", 0o644), ("027", 0o640), ("077", 0o600)] {
        let out = dir.path(&format!("new-{umask}.txt"));
        let status = Command::new("sh")
            .arg("-c")
            .arg(format!(
                "umask {umask}; exec \"$0\" audit \"$1\" --resamples 300 --splits 20 \
                 --estimators rtg,total --out \"$2\""
            ))
            .arg(&bin)
            .arg(demo("docking_rover.csv"))
            .arg(&out)
            .status()
            .unwrap();
        assert!(status.success());
        // open(2) creates files with 0666 & !umask.
        assert_eq!(mode(&out), wanted, "umask {umask}");
    }
}

/// Starts `args` with the hidden pause hook at `stage`; returns once the child waits there.
fn paused_child(args: &[&str], stage: &str, control: &Path) -> (Child, PathBuf) {
    let flag = control.join(format!("pause-{stage}"));
    let child = Command::new(assert_cmd::cargo::cargo_bin("gradaudit"))
        .args(args)
        .env(
            "GRADAUDIT_TEST_PAUSE",
            format!("{stage}:{}", flag.display()),
        )
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    // Waits for an event, not a delay: the child creates the flag when it gets there.
    let start = Instant::now();
    while !flag.exists() {
        assert!(
            start.elapsed() < Duration::from_secs(100),
            "the child never reached {stage}"
        );
        std::thread::sleep(Duration::from_millis(10));
    }
    (child, flag)
}

fn signal_during_sync_leaves_no_temp_file(signal: &str, number: i32) {
    let out_dir = Dir::new("signal-out");
    let control = Dir::new("signal-control");
    let report = out_dir.path("report.json");
    let plot = out_dir.path("plot.svg");
    let rover = demo("docking_rover.csv");
    let mut args = vec!["audit", rover.as_str()];
    args.extend_from_slice(&FAST);
    args.extend_from_slice(&["--format", "json", "--out", report.to_str().unwrap()]);
    args.extend_from_slice(&["--plot", plot.to_str().unwrap()]);
    let (mut child, _flag) = paused_child(&args, "staged", control.tmp.path());
    // Both outputs are complete temporary files now, not yet renamed.
    let staged = temporaries(out_dir.tmp.path());
    assert_eq!(staged.len(), 2, "{staged:?}");
    for name in &staged {
        let len = std::fs::metadata(out_dir.path(name)).unwrap().len();
        assert!(len > 100, "{name} holds the whole output ({len} bytes)");
    }
    let sent = Command::new("sh")
        .arg("-c")
        .arg(format!("kill -{signal} {}", child.id()))
        .status()
        .unwrap();
    assert!(sent.success());
    let status = child.wait().unwrap();
    assert_eq!(
        status.signal(),
        Some(number),
        "ended by {signal}: {status:?}"
    );
    assert_eq!(temporaries(out_dir.tmp.path()), Vec::<String>::new());
    assert!(!report.exists() && !plot.exists(), "nothing was renamed");
}

#[test]
fn sigterm_during_sync_leaves_no_temp_file() {
    signal_during_sync_leaves_no_temp_file("TERM", 15);
}

#[test]
fn sigint_during_sync_leaves_no_temp_file() {
    signal_during_sync_leaves_no_temp_file("INT", 2);
}

#[test]
fn sighup_during_sync_leaves_no_temp_file() {
    signal_during_sync_leaves_no_temp_file("HUP", 1);
}

#[test]
fn out_folder_fails_before_reading() {
    let dir = Dir::new("early");
    let folder = dir.path("reports");
    std::fs::create_dir(&folder).unwrap();
    let folder = folder.to_str().unwrap();
    let missing = dir.path("missing-folder/r.txt");
    // The log does not exist: an error about it would mean it was opened first.
    let log = dir.path("no-such-log.csv");
    let log = log.to_str().unwrap();
    let rules = ["--require", "rtg:snr>=0"];
    let slash = format!("{folder}/");
    let cases: Vec<(Vec<&str>, &str)> = vec![
        (vec!["audit", log, "--out", folder], "is a folder"),
        (vec!["audit", log, "--out", &slash], "names a folder"),
        (vec!["audit", log, "--out", ""], "the path is empty"),
        (vec!["audit", log, "--plot", folder], "is a folder"),
        (
            vec!["audit", log, "--out", missing.to_str().unwrap()],
            "missing-folder",
        ),
        (
            vec!["sweep", log, "--over", "lambda", "--out", folder],
            "is a folder",
        ),
        (
            vec!["sweep", log, "--over", "lambda", "--plot", ""],
            "empty",
        ),
        (
            vec!["gate", log, rules[0], rules[1], "--out", folder],
            "is a folder",
        ),
        (
            vec!["gate", log, rules[0], rules[1], "--junit", folder],
            "is a folder",
        ),
        (
            vec!["gate", log, rules[0], rules[1], "--junit", ""],
            "empty",
        ),
    ];
    for (args, wanted) in cases {
        let (code, _, err) = run(&args);
        assert_eq!(code, 2, "{args:?}: {err}");
        assert!(err.contains(wanted), "{args:?}: {err}");
        assert!(
            !err.contains("no-such-log"),
            "{args:?} read the log first: {err}"
        );
    }
}

#[test]
fn junit_failure_writes_no_report() {
    let dir = Dir::new("allornone");
    let control = Dir::new("allornone-control");
    let report = dir.write("summary.txt", b"previous summary\n");
    let junit_dir = dir.path("junit");
    std::fs::create_dir(&junit_dir).unwrap();
    let junit = junit_dir.join("gate.xml");
    let rover = demo("docking_rover.csv");
    let mut args = vec!["gate", rover.as_str()];
    args.extend_from_slice(&FAST);
    args.extend_from_slice(&["--require", "rtg:snr>=0", "--out", &report]);
    args.extend_from_slice(&["--junit", junit.to_str().unwrap()]);
    let (child, flag) = paused_child(&args, "checked", control.tmp.path());
    // The paths were fine when checked; the JUnit folder goes away before the write.
    std::fs::remove_dir(&junit_dir).unwrap();
    std::fs::remove_file(&flag).unwrap();
    let out = child.wait_with_output().unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{err}");
    assert!(
        err.contains("--junit") && err.contains("no output was replaced"),
        "{err}"
    );
    assert_eq!(
        std::fs::read_to_string(&report).unwrap(),
        "previous summary\n",
        "the summary is left as it was"
    );
    assert_eq!(temporaries(dir.tmp.path()), Vec::<String>::new());
}

/// The rover log with every reward multiplied by 1e200: squared figures overflow f64, so the
/// report carries nulls for them.
fn overflowing_rover(dir: &Dir) -> String {
    let text = std::fs::read_to_string(demo("docking_rover.csv")).unwrap();
    let mut out = String::new();
    for (i, line) in text.lines().enumerate() {
        let mut f: Vec<String> = line.split(',').map(String::from).collect();
        if i > 0 {
            f[2] = format!("{:e}", f[2].parse::<f64>().unwrap() * 1e200);
        }
        out.push_str(&f.join(","));
        out.push('\n');
    }
    dir.write("huge.csv", out.as_bytes())
}

#[test]
fn baseline_accepts_reports_with_nulls() {
    let dir = Dir::new("nulls");
    let log = overflowing_rover(&dir);
    let base = dir.path("base.json");
    let base = base.to_str().unwrap();
    let mut args = vec!["audit", log.as_str()];
    args.extend_from_slice(&FAST);
    args.extend_from_slice(&["--format", "json", "--out", base]);
    let (code, _, err) = run(&args);
    assert_eq!(code, 0, "{err}");
    let v: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(base).unwrap()).unwrap();
    assert!(
        v["estimators"][0]["variance"].is_null(),
        "the report has nulls: {v}"
    );
    for report in ["audit", "gate"] {
        let used = if report == "audit" {
            base.to_string()
        } else {
            // A gate report (with the audit inside) is a baseline too.
            let g = dir.path("gate.json");
            // (on the plain demo: the overflowed log's undefined figures fail the baseline's
            // regression checks, which is hardening_numeric's rule)
            let rover = demo("docking_rover.csv");
            let mut args = vec!["gate", rover.as_str()];
            args.extend_from_slice(&FAST);
            args.extend_from_slice(&["--baseline", base, "--format", "json"]);
            args.extend_from_slice(&["--out", g.to_str().unwrap()]);
            let (code, _, err) = run(&args);
            assert_eq!(code, 0, "{err}");
            g.to_string_lossy().into_owned()
        };
        // The current run is the plain demo, so its figures are defined: a regression check
        // against an undefined baseline figure holds (there is nothing to regress from), while
        // a figure undefined in the current run never satisfies a check (hardening_numeric).
        let rover = demo("docking_rover.csv");
        let mut args = vec!["gate", rover.as_str()];
        args.extend_from_slice(&FAST);
        args.extend_from_slice(&["--baseline", &used, "--regress", "variance:10"]);
        let (code, out, err) = run(&args);
        assert_eq!(code, 0, "{report} report as baseline: {err}");
        if report == "audit" {
            assert!(out.contains("undefined in the baseline"), "{out}");
        } else {
            assert!(out.contains("rtg variance: baseline"), "{out}");
        }
    }
}

#[test]
fn baseline_unknown_version_is_refused() {
    let dir = Dir::new("version");
    let base = dir.path("base.json");
    let (code, _, err) = audit_to(base.to_str().unwrap(), &["--format", "json"]);
    assert_eq!(code, 0, "{err}");
    let text = std::fs::read_to_string(&base).unwrap();
    let line = 1 + text[..text.find("gradaudit.audit/1").unwrap()]
        .matches('\n')
        .count();
    let v2 = dir.write(
        "v2.json",
        text.replace("gradaudit.audit/1", "gradaudit.audit/2")
            .as_bytes(),
    );
    let rover = demo("docking_rover.csv");
    let (code, _, err) = run(&["gate", &rover, "--baseline", &v2]);
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains("unsupported report schema 'gradaudit.audit/2'"),
        "{err}"
    );
    assert!(
        err.contains(&format!("v2.json, line {line}, column ")),
        "{err}"
    );
}
