//! `inspect`: counts, roles and warnings, in both formats; accepted odd-but-valid inputs.

use crate::util::{Dir, demo, gradaudit, run};

fn json(args: &[&str]) -> serde_json::Value {
    let (code, out, err) = run(args);
    assert_eq!(code, 0, "{err}");
    serde_json::from_str(&out).expect("valid JSON")
}

#[test]
fn counts_on_a_small_interleaved_log() {
    // Two episodes interleaved row by row (two robots logging into one file); a is truncated
    // with a bootstrap value, b terminates; c is still open at the end of the log.
    let dir = Dir::new("interleaved");
    let path = dir.write(
        "log.csv",
        b"episode,step,reward,terminated,truncated,value,next_value,score_0\n\
          a,0,1,0,0,0.5,,0.1\n\
          b,0,2,0,0,0.5,,0.2\n\
          a,1,3,0,1,0.5,4,0.3\n\
          b,1,4,1,0,0.5,,0.4\n\
          c,0,5,0,0,0.5,,0.5\n",
    );
    let v = json(&["inspect", &path, "--format", "json"]);
    assert_eq!(v["rows"], 5);
    assert_eq!(v["episodes"], 3);
    assert_eq!(v["terminated"], 1);
    assert_eq!(v["truncated"], 2);
    assert_eq!(v["truncated_with_bootstrap"], 1);
    assert_eq!(v["episode_length"]["max"], 2.0);
    assert_eq!(v["episode_return"]["mean"], (4.0 + 6.0 + 5.0) / 3.0);
    assert_eq!(v["score_dim"], 1);
    assert_eq!(v["warnings"]["open_at_end_of_log"]["count"], 1);
    assert_eq!(v["warnings"]["truncated_without_bootstrap"]["count"], 1);
}

#[test]
fn bom_crlf_gzip_and_stdin_are_accepted() {
    let dir = Dir::new("odd");
    let text = "episode,reward,terminated,score_0\r\na,1,0,1\r\na,2,1,1\r\n";
    let mut bom = b"\xEF\xBB\xBF".to_vec();
    bom.extend_from_slice(text.as_bytes());
    let p = dir.write("bom.csv", &bom);
    let v = json(&["inspect", &p, "--format", "json"]);
    assert_eq!(v["episodes"], 1);
    assert_eq!(v["episode_return"]["mean"], 3.0);
    let gz = dir.write_gz("log.gz", text.as_bytes());
    assert_eq!(json(&["inspect", &gz, "--format", "json"])["rows"], 2);
    let out = gradaudit()
        .args(["inspect", "-", "--format", "json"])
        .write_stdin(text)
        .output()
        .unwrap();
    assert!(out.status.success());
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["file"], "<stdin>");
}

#[test]
fn without_end_flags_each_episode_ends_at_its_last_row() {
    let dir = Dir::new("noflags");
    let p = dir.write("log.csv", b"ep;r;g1\nx;1;0\ny;1;0\nx;1;0\n");
    let v = json(&[
        "inspect",
        &p,
        "--format",
        "json",
        "--delimiter",
        ";",
        "--col",
        "episode=ep",
        "--col",
        "reward=r",
        "--score-prefix",
        "g",
    ]);
    assert_eq!(v["episodes"], 2);
    assert_eq!(v["terminated"], 2);
    assert_eq!(v["warnings"]["no_end_flags"]["count"], 1);
    assert_eq!(v["score_dim"], 1);
}

#[test]
fn demo_logs_read_cleanly() {
    let v = json(&["inspect", &demo("docking_rover.csv"), "--format", "json"]);
    assert_eq!(v["score_dim"], 8);
    assert!(v["warnings"].as_object().unwrap().is_empty());
    let v = json(&["inspect", &demo("parcel_diverter.csv"), "--format", "json"]);
    assert_eq!(v["truncated"], 0);
}
