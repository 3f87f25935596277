//! Stumbling points from a user trial of the network, value-network and report paths: each
//! test holds one of them (named after what the user met).

use crate::util::{Dir, demo, run};

/// The names the description's `activation` accepts, as the error must list them.
const ACTIVATIONS: &str =
    "identity, tanh, relu, elu, leaky_relu, silu (or swish), sigmoid, softplus";

/// Runs `audit` on the rover demo with `flag FILE` (a policy or a value network) and returns
/// (exit code, stderr).
fn audit_with(flag: &str, file: &str) -> (i32, String) {
    let rover = demo("docking_rover.csv");
    let mut args = vec!["audit", rover.as_str(), flag, file];
    if flag == "--policy" {
        args.extend(["--scores-from", "policy"]);
    }
    let (code, _, err) = run(&args);
    (code, err)
}

/// A value network and an actor whose layers leave out a required field: the error names the
/// file, the layer (its entry number and its tensor's name) and the field, exit 2; a missing
/// activation lists the accepted names. Before, serde said only "missing field `activation`
/// at line 3 column 43".
#[test]
fn a_layer_without_a_required_field_is_named_with_its_file_and_index() {
    let dir = Dir::new("leftover_layer");
    let value = dir.write(
        "value.json",
        br#"{"schema": "gradaudit.policy/1", "family": "mlp_value", "features": ["obs_0", "obs_1"],
 "tensors": {"w1": [[0.5, 0.25], [0.1, 0.2]], "b1": [0.1, 0.2], "w2": [[1.0, -1.0]]},
 "layers": [ {"weight": "w1", "bias": "b1", "activation": "tanh"}, {"weight": "w2"} ]}"#,
    );
    let (code, err) = audit_with("--value-net", &value);
    assert_eq!(code, 2, "{err}");
    let want = format!(
        "value.json: \"layers\" entry 2 of 2 (\"weight\": \"w2\") has no \"activation\"; every \
         layer names one of: {ACTIVATIONS}"
    );
    assert!(err.contains(&want), "{err}");
    assert!(!err.contains("missing field"), "{err}");
    // A misspelt field or a wrong type keeps serde's line and names the entry too.
    let typo = std::fs::read_to_string(&value).unwrap().replace(
        r#"{"weight": "w2"}"#,
        r#"{"weight": "w2", "activaton": "identity"}"#,
    );
    let typo = dir.write("typo.json", typo.as_bytes());
    let (code, err) = audit_with("--value-net", &typo);
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains(
            "typo.json, line 3: invalid policy file: \"layers\" entry 2 of 2 (\"weight\": \"w2\"): \
             unknown field `activaton`"
        ),
        "{err}"
    );

    let actor = |layers: &str, head_mean: &str, normalize: &str| {
        format!(
            r#"{{"schema": "gradaudit.policy/1", "family": "mlp", "features": ["obs_0", "obs_1"],
 "actions": ["act_0", "act_1"], {normalize}
 "tensors": {{"w1": [[0.5, 0.25], [0.1, 0.2]], "b1": [0.1, 0.2], "ls": [0.0, 0.0],
             "m": [0.0, 0.0], "v": [1.0, 1.0]}},
 "layers": [{layers}],
 "head": {{"kind": "gaussian", "mean": {head_mean}, "log_sigma": "ls"}}}}"#
        )
    };
    let good_layer = r#"{"weight": "w1", "bias": "b1", "activation": "tanh"}"#;
    let good_mean = r#"{"weight": "w1", "bias": "b1"}"#;
    let cases = [
        (
            actor(
                &format!(r#"{good_layer}, {{"bias": "b1", "activation": "relu"}}"#),
                good_mean,
                "",
            ),
            "\"layers\" entry 2 of 2 (\"bias\": \"b1\") has no \"weight\" (the name of its \
             [out, in] weight tensor)",
        ),
        (
            actor(good_layer, r#"{"bias": "b1"}"#, ""),
            "the mean layer of the head (\"bias\": \"b1\") has no \"weight\"",
        ),
        (
            actor(good_layer, good_mean, r#""normalize": {"mean": "m"},"#),
            "\"normalize\" has no \"var\" (the tensor name of the running variance, [n_obs])",
        ),
        (
            actor(r#"{"weight": "w1"}"#, good_mean, ""),
            "\"layers\" entry 1 of 1 (\"weight\": \"w1\") has no \"activation\"",
        ),
    ];
    for (i, (text, want)) in cases.iter().enumerate() {
        let file = format!("actor{i}.json");
        let p = dir.write(&file, text.as_bytes());
        let (code, err) = audit_with("--policy", &p);
        assert_eq!(code, 2, "{want}: {err}");
        assert!(err.contains(&format!("{file}: {want}")), "{want}: {err}");
    }
}

/// A small log of `n` three-step episodes with one obs and one score column, every third
/// episode truncated without `next_value`; `next_obs` adds a `next_obs_0` column.
fn truncating_log(n: usize, next_obs: bool) -> String {
    let mut s = String::from("episode,step,reward,terminated,truncated,obs_0,score_0");
    s.push_str(if next_obs { ",next_obs_0\n" } else { "\n" });
    for e in 0..n {
        for t in 0..3 {
            let last = t == 2;
            let (term, trunc) = match (last, e % 3 == 0) {
                (true, true) => (0, 1),
                (true, false) => (1, 0),
                _ => (0, 0),
            };
            let obs = (e * 3 + t) as f64 * 0.1;
            let score = ((e * 7 + t * 3) % 5) as f64 - 2.0;
            s.push_str(&format!(
                "e{e},{t},{},{term},{trunc},{obs},{score}",
                1.0 + t as f64
            ));
            if next_obs {
                s.push_str(&format!(",{}", obs + 0.1));
            }
            s.push('\n');
        }
    }
    s
}

/// The `truncated_without_bootstrap` message of a JSON report, or None when not counted.
fn no_bootstrap_message(report: &serde_json::Value) -> Option<String> {
    let w = &report["warnings"]["truncated_without_bootstrap"];
    w["message"].as_str().map(|m| {
        // 30 episodes, every third truncated: episodes 0, 3, .., 27.
        assert_eq!(w["count"], 10, "{report}");
        m.to_string()
    })
}

/// The warning about truncated episodes without a bootstrap value says how to give them one
/// (`--value-net FILE` or `--fit-value`, worded for the command and the log's columns), and
/// following either advice removes it.
#[test]
fn the_no_bootstrap_warning_suggests_a_value_network_or_a_fit() {
    let dir = Dir::new("leftover_boot");
    let log = dir.write("log.csv", truncating_log(30, false).as_bytes());
    let audit = |log: &str, extra: &[&str]| {
        let mut args = vec![
            "audit",
            log,
            "--estimators",
            "rtg,td",
            "--resamples",
            "50",
            "--format",
            "json",
        ];
        args.extend(extra);
        crate::util::run_json(&args)
    };
    let m = no_bootstrap_message(&audit(&log, &[])).expect("counted");
    assert!(
        m.ends_with(
            "its tail value is taken as 0, which biases value-based estimators; to bootstrap \
             truncated episodes, pass --value-net FILE (a value network's V at its last logged \
             observation, as the log has no next-observation columns) or --fit-value (a \
             cross-fitted ridge fit of V on obs and time; reads the log twice)"
        ),
        "{m}"
    );
    let inspect = crate::util::run_json(&["inspect", &log, "--format", "json"]);
    let m = no_bootstrap_message(&inspect).expect("counted");
    assert!(
        m.contains("to bootstrap truncated episodes, audit with --value-net FILE"),
        "{m}"
    );
    // With next-observation columns the value network's bootstrap state is named.
    let with_next = dir.write("next.csv", truncating_log(30, true).as_bytes());
    let m = no_bootstrap_message(&audit(&with_next, &[])).expect("counted");
    assert!(
        m.contains(
            "--value-net FILE (a value network's V at the logged next observation (next_obs_0))"
        ),
        "{m}"
    );
    // Without obs columns only the fit can help.
    let no_obs: String = truncating_log(30, false)
        .lines()
        .map(|l| {
            let f: Vec<&str> = l.split(',').collect();
            format!("{},{}\n", f[..5].join(","), f[6])
        })
        .collect();
    let no_obs = dir.write("no_obs.csv", no_obs.as_bytes());
    let m = no_bootstrap_message(&audit(&no_obs, &[])).expect("counted");
    assert!(
        m.contains("pass --fit-value (a cross-fitted ridge fit of V; on time alone")
            && m.contains("or add obs columns for --value-net FILE"),
        "{m}"
    );
    // Following the advice: both options bootstrap every truncated end, so no warning.
    let value = dir.write(
        "value.json",
        br#"{"schema": "gradaudit.policy/1", "family": "mlp_value", "features": ["obs_0"],
 "tensors": {"w": [[0.5]], "b": [0.25]},
 "layers": [{"weight": "w", "bias": "b", "activation": "identity"}]}"#,
    );
    let fitted = audit(&with_next, &["--fit-value"]);
    assert_eq!(no_bootstrap_message(&fitted), None, "{fitted}");
    let net = audit(&with_next, &["--value-net", &value]);
    assert_eq!(no_bootstrap_message(&net), None, "{net}");
    assert_eq!(
        net["input"]["value_net"]["bootstrap"],
        "logged_next_observation"
    );
    // A shard cannot take either option: its merge advises auditing the whole log with them.
    let shard = dir.path("log.shard").to_string_lossy().into_owned();
    let (code, _, err) = run(&["shard", &log, "--out", &shard, "--estimators", "rtg,td"]);
    assert_eq!(code, 0, "{err}");
    let merged = crate::util::run_json(&["merge", &shard, "--format", "json"]);
    let m = no_bootstrap_message(&merged).expect("counted");
    assert!(
        m.contains("to bootstrap truncated episodes, audit the whole log with --value-net FILE"),
        "{m}"
    );
}

/// The text of every `<p class="facts">` of an HTML page.
fn html_facts(html: &str) -> Vec<String> {
    let doc = crate::report_html::parse(html);
    doc.descendants()
        .filter(|n| n.has_tag_name("p") && crate::report_html::has_class(n, "facts"))
        .map(|n| {
            n.descendants()
                .filter(|d| d.is_text())
                .filter_map(|d| d.text())
                .collect()
        })
        .collect()
}

/// The Markdown audit gives the value network's line (and the critic's) as the terminal and
/// HTML reports do, with the JSON's figures: the file, the explained variance to 3 decimals,
/// the bootstrap note. Before, the Markdown had neither.
#[test]
fn markdown_audit_names_the_value_network_like_the_other_formats() {
    let dir = Dir::new("leftover_md");
    let value = dir.write(
        "value.json",
        br#"{"schema": "gradaudit.policy/1", "family": "mlp_value", "features": ["obs_0", "obs_1"],
 "tensors": {"w": [[-1.5, -0.5]], "b": [-2.0]},
 "layers": [{"weight": "w", "bias": "b", "activation": "identity"}]}"#,
    );
    let rover = demo("docking_rover.csv");
    let args = |format: &'static str| {
        vec![
            "audit",
            rover.as_str(),
            "--estimators",
            "rtg,td,gae:0.9",
            "--resamples",
            "100",
            "--value-net",
            value.as_str(),
            "--format",
            format,
        ]
    };
    let json = crate::util::run_json(&args("json"));
    let v = &json["input"]["value_net"];
    let ev = v["explained_variance"]
        .as_f64()
        .expect("defined on the rover");
    let note = v["note"].as_str().unwrap();
    assert!(note.contains("last logged observation"), "{note}");
    let (code, md, err) = run(&args("markdown"));
    assert_eq!(code, 0, "{err}");
    let want =
        format!("- value network `{value}`: explains {ev:.3} of the return variance; {note}");
    let md_lines: Vec<&str> = md.lines().collect();
    assert!(md_lines.contains(&want.as_str()), "{want}\n{md}");
    // In the header's list, before the table.
    let at = md_lines.iter().position(|l| *l == want).unwrap();
    let table = md_lines
        .iter()
        .position(|l| l.starts_with("| estimator"))
        .unwrap();
    assert!(at < table, "{md}");
    // The terminal report: the same figure and note (wrapped at 100 columns).
    let (_, text, _) = run(&args("table"));
    let flat = text.split_whitespace().collect::<Vec<_>>().join(" ");
    let words = |s: &str| s.split_whitespace().collect::<Vec<_>>().join(" ");
    assert!(
        flat.contains(&words(&format!(
            "value network {value} (explains {ev:.3} of the return variance): {note}"
        ))),
        "{text}"
    );
    // The HTML page: one facts paragraph with the same, as a sentence.
    let (_, html, _) = run(&args("html"));
    let facts = html_facts(&html);
    let want = format!("Value network {value} explains {ev:.3} of the return variance; {note}.");
    assert!(facts.contains(&want), "{want}\n{facts:?}");

    // --fit-value: the critic's line, with the JSON's explained variance.
    let fit = |format: &'static str| {
        run(&[
            "audit",
            rover.as_str(),
            "--estimators",
            "rtg,td",
            "--resamples",
            "100",
            "--fit-value",
            "--format",
            format,
        ])
    };
    let json: serde_json::Value = serde_json::from_str(&fit("json").1).unwrap();
    let c = &json["input"]["critic"];
    let want = format!(
        "- critic: fitted by 5-fold cross-fitted ridge regression on {} features, explained \
         variance {:.3} (the recorded critic, ignored: {:.3})",
        c["fitted_features"],
        c["fitted_explained_variance"].as_f64().unwrap(),
        c["recorded_explained_variance"].as_f64().unwrap()
    );
    let md = fit("markdown").1;
    assert!(md.lines().any(|l| l == want), "{want}\n{md}");
    assert!(!md.contains("value network"), "{md}");
}

/// Splits the rover demo into `k` logs by episode (episode i into part i mod k), writes each
/// one's shard, and returns (shard paths, log paths).
fn rover_shards(dir: &Dir, k: usize) -> (Vec<String>, Vec<String>) {
    let text = std::fs::read_to_string(demo("docking_rover.csv")).unwrap();
    let mut lines = text.lines();
    let header = lines.next().unwrap();
    let mut parts = vec![format!("{header}\n"); k];
    for line in lines {
        // Ids are rover-NNNN.
        let i: usize = line[6..10].parse().unwrap();
        parts[i % k].push_str(line);
        parts[i % k].push('\n');
    }
    let mut shards = Vec::new();
    let mut logs = Vec::new();
    for (i, p) in parts.iter().enumerate() {
        let log = dir.write(&format!("part{i}.csv"), p.as_bytes());
        let shard = dir
            .path(&format!("part{i}.shard"))
            .to_string_lossy()
            .into_owned();
        let (code, _, err) = run(&["shard", &log, "--out", &shard, "--resamples", "100"]);
        assert_eq!(code, 0, "{err}");
        shards.push(shard);
        logs.push(log);
    }
    (shards, logs)
}

/// The merge page's kicker (and title, and the text reports' heading) says it is a merge of
/// N shards and names them and their logs; up to three in full, more as first .. last. An
/// audit page still says "audit of". Before, a merge said "gradaudit audit of a + b".
#[test]
fn the_merge_page_says_it_merges_shards() {
    use crate::report_html::{assert_self_contained, by_id, has_class, parse};
    let dir = Dir::new("leftover_merge");
    let (shards, logs) = rover_shards(&dir, 4);
    let text_of = |n: roxmltree::Node| -> String {
        n.descendants()
            .filter(|d| d.is_text())
            .filter_map(|d| d.text())
            .collect()
    };
    let kicker = |html: &str| -> (String, String) {
        let doc = parse(html);
        assert_self_contained(html, &doc);
        let k = doc
            .descendants()
            .find(|n| n.has_tag_name("p") && has_class(n, "kicker"))
            .expect("a kicker");
        // The kicker sits in the header, above the verdict.
        assert_eq!(k.next_sibling_element().unwrap(), by_id(&doc, "verdict"));
        let codes: Vec<String> = k
            .children()
            .filter(|c| c.has_tag_name("code"))
            .map(text_of)
            .collect();
        let title = doc
            .descendants()
            .find(|n| n.has_tag_name("title"))
            .map(text_of)
            .unwrap();
        assert_eq!(title, text_of(k), "the page's title is its kicker");
        (text_of(k), codes.join("|"))
    };
    let merge = |parts: &[String], format: &str| {
        let mut args = vec!["merge"];
        args.extend(parts.iter().map(String::as_str));
        args.extend(["--format", format]);
        let (code, out, err) = run(&args);
        assert_eq!(code, 0, "{err}");
        out
    };
    let three = &shards[..3];
    let (text, codes) = kicker(&merge(three, "html"));
    assert_eq!(
        text,
        format!(
            "gradaudit merge of 3 shards ({}, {}, {}) of {}, {}, {}",
            shards[0], shards[1], shards[2], logs[0], logs[1], logs[2]
        )
    );
    assert_eq!(codes, [&shards[..3], &logs[..3]].concat().join("|"));
    let (text, _) = kicker(&merge(&shards, "html"));
    assert_eq!(
        text,
        format!(
            "gradaudit merge of 4 shards ({} .. {}) of {} .. {}",
            shards[0], shards[3], logs[0], logs[3]
        )
    );
    let (text, _) = kicker(&merge(&shards[..1], "html"));
    assert_eq!(
        text,
        format!("gradaudit merge of 1 shard ({}) of {}", shards[0], logs[0])
    );
    // The text reports' headings say the same.
    // (The terminal report wraps long lines at 100 columns.)
    let table = merge(three, "table");
    let flat = table.split_whitespace().collect::<Vec<_>>().join(" ");
    assert!(
        flat.starts_with(&format!(
            "gradaudit merge of 3 shards ({}, {}, {}) of {}, {}, {}",
            shards[0], shards[1], shards[2], logs[0], logs[1], logs[2]
        )),
        "{table}"
    );
    assert!(merge(&shards, "markdown").starts_with("### gradaudit merge of 4 shards ("));
    // An audit's page is still an audit's.
    let (code, html, err) = run(&["audit", &logs[0], "--resamples", "100", "--format", "html"]);
    assert_eq!(code, 0, "{err}");
    assert_eq!(kicker(&html).0, format!("gradaudit audit of {}", logs[0]));
}

/// The permission bits of a file.
fn mode(path: &std::path::Path) -> u32 {
    use std::os::unix::fs::PermissionsExt;
    std::fs::metadata(path).unwrap().permissions().mode() & 0o7777
}

/// `inspect --out FILE` writes what stdout would show, through a temporary file (none left),
/// keeps an existing file's mode, writes through a symbolic link, and refuses what every
/// `--out` refuses, before the log is read: a folder, an empty path, a missing folder, a FIFO,
/// a dangling link, the log itself (also by another name) and the policy file. `audit` now also
/// refuses to write over its `--value-net` description.
#[test]
fn inspect_writes_its_summary_with_out_like_the_other_commands() {
    use std::os::unix::fs::{FileTypeExt, PermissionsExt};
    let dir = Dir::new("leftover_inspect_out");
    let rover = demo("docking_rover.csv");
    for format in ["table", "json", "html"] {
        let (code, shown, err) = run(&["inspect", &rover, "--format", format]);
        assert_eq!(code, 0, "{err}");
        let out = dir.path(&format!("summary.{format}"));
        let out = out.to_str().unwrap();
        let (code, stdout, err) = run(&["inspect", &rover, "--format", format, "--out", out]);
        assert_eq!(code, 0, "{err}");
        assert_eq!(stdout, "", "the summary goes to the file only");
        assert_eq!(std::fs::read_to_string(out).unwrap(), shown, "{format}");
    }
    let existing = dir.write("old.txt", b"old\n");
    std::fs::set_permissions(&existing, std::fs::Permissions::from_mode(0o640)).unwrap();
    let (code, _, err) = run(&["inspect", &rover, "--out", &existing]);
    assert_eq!(code, 0, "{err}");
    assert_eq!(mode(std::path::Path::new(&existing)), 0o640);
    assert!(
        std::fs::read_to_string(&existing)
            .unwrap()
            .contains("episodes")
    );
    let link = dir.path("link.txt");
    std::os::unix::fs::symlink("old.txt", &link).unwrap();
    let (code, _, err) = run(&[
        "inspect",
        &rover,
        "--format",
        "json",
        "--out",
        link.to_str().unwrap(),
    ]);
    assert_eq!(code, 0, "{err}");
    assert!(
        std::fs::symlink_metadata(&link)
            .unwrap()
            .file_type()
            .is_symlink()
    );
    assert!(std::fs::read_to_string(&existing).unwrap().starts_with('{'));
    let leftovers: Vec<String> = std::fs::read_dir(dir.tmp.path())
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.starts_with(".gradaudit-") || n.contains(".tmp"))
        .collect();
    assert!(leftovers.is_empty(), "{leftovers:?}");

    // Refusals: all before the (missing) log is opened, so its name never shows.
    let missing_log = dir.path("no-such-log.csv").to_string_lossy().into_owned();
    let folder = dir.path("reports");
    std::fs::create_dir(&folder).unwrap();
    let fifo = dir.path("pipe");
    assert!(
        std::process::Command::new("mkfifo")
            .arg(&fifo)
            .status()
            .unwrap()
            .success()
    );
    let dangling = dir.path("gone.txt");
    std::os::unix::fs::symlink("missing.txt", &dangling).unwrap();
    let in_missing = dir.path("missing-folder/s.txt");
    let cases = [
        (folder.to_str().unwrap(), "is a folder"),
        ("", "the path is empty"),
        (in_missing.to_str().unwrap(), "missing-folder"),
        (fifo.to_str().unwrap(), "is a FIFO"),
        (dangling.to_str().unwrap(), "symbolic link"),
    ];
    for (out, wanted) in cases {
        let (code, _, err) = run(&["inspect", &missing_log, "--out", out]);
        assert_eq!(code, 2, "{out}: {err}");
        let named = if out.is_empty() {
            "--out:".to_string()
        } else {
            format!("--out {out}")
        };
        assert!(err.contains(&named) && err.contains(wanted), "{out}: {err}");
        assert!(
            !err.contains("no-such-log"),
            "{out}: read the log first: {err}"
        );
    }
    assert!(
        std::fs::symlink_metadata(&fifo)
            .unwrap()
            .file_type()
            .is_fifo()
    );
    assert!(!dir.path("missing.txt").exists());

    // Never over an input: the log (also through a link), the policy, a value network.
    let original = std::fs::read(&rover).unwrap();
    let log = dir.write("log.csv", &original);
    let alias = dir.path("alias.csv");
    std::os::unix::fs::symlink("log.csv", &alias).unwrap();
    let policy_text = std::fs::read(demo("docking_rover.policy.json")).unwrap();
    let policy = dir.write("policy.json", &policy_text);
    for out in [log.as_str(), alias.to_str().unwrap(), policy.as_str()] {
        let (code, _, err) = run(&["inspect", &log, "--policy", &policy, "--out", out]);
        assert_eq!(code, 2, "{out}: {err}");
        assert!(err.contains("the input"), "{out}: {err}");
    }
    let value = dir.write(
        "value.json",
        br#"{"schema": "gradaudit.policy/1", "family": "mlp_value", "features": ["obs_0"],
 "tensors": {"w": [[0.5]], "b": [0.25]},
 "layers": [{"weight": "w", "bias": "b", "activation": "identity"}]}"#,
    );
    let (code, _, err) = run(&["audit", &log, "--value-net", &value, "--out", &value]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("the input"), "{err}");
    assert_eq!(std::fs::read(&log).unwrap(), original);
    assert_eq!(std::fs::read(&policy).unwrap(), policy_text);
    assert!(
        std::fs::read_to_string(&value)
            .unwrap()
            .contains("mlp_value")
    );
}

/// 1,500 two-step episodes, all open at once (every first row, then every second row), with
/// 256 obs columns and, when `next`, 256 next-observation columns.
fn many_open_episodes(dir: &Dir, next: bool) -> String {
    use std::fmt::Write;
    const EPISODES: usize = 1500;
    const WIDTH: usize = 256;
    let mut text = String::from("episode,step,reward,terminated,score_0");
    for k in 0..WIDTH {
        write!(text, ",obs_{k}").unwrap();
    }
    if next {
        for k in 0..WIDTH {
            write!(text, ",next_obs_{k}").unwrap();
        }
    }
    text.push('\n');
    let obs = ",0.25".repeat(WIDTH);
    let next_obs = if next {
        ",0.5".repeat(WIDTH)
    } else {
        String::new()
    };
    for step in 0..2 {
        for e in 0..EPISODES {
            writeln!(text, "e{e},{step},1,{step},0.5{obs}{next_obs}").unwrap();
        }
    }
    dir.write(if next { "next.csv" } else { "obs.csv" }, text.as_bytes())
}

/// The next observation each open episode holds is charged to the memory ledger with the rest
/// of the episode. Per open one-step episode: its step, 8 x (256 obs + 1 score + 5) = 2,096
/// bytes, its table entry and id (about 420), and now its next observation, 8 x 256 = 2,048
/// bytes: 1,500 open episodes hold about 3.8 MB without it and 6.9 MB with it (the messages
/// at `--max-memory 3` give 2.52 and 4.57 kB per open episode). At
/// `--max-memory 5` the log without next observations fits, and the one with them, which fit
/// before (the binary without this charge read it at 4 MB, exit 0), is refused naming the
/// open episodes and their next observations; at 8 MB it fits.
#[test]
fn open_episodes_charge_their_next_observation() {
    let dir = Dir::new("leftover_next_obs_ledger");
    let obs = many_open_episodes(&dir, false);
    let next = many_open_episodes(&dir, true);
    let (code, _, err) = run(&["inspect", &obs, "--max-memory", "5"]);
    assert_eq!(code, 0, "{err}");
    let (code, _, err) = run(&["inspect", &next, "--max-memory", "5"]);
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains("next.csv, line ")
            && err.contains(" open, each with its next observation of 256 values; 'e")
            && err.contains("over the memory budget of 5 MB (--max-memory)")
            && err.contains("most is held by open episodes"),
        "{err}"
    );
    // Refused while the first rows are read: between 1,000 and 1,500 episodes open.
    let open: usize = err
        .split("open episodes (")
        .nth(1)
        .and_then(|s| s.split(' ').next())
        .and_then(|n| n.parse().ok())
        .expect("the open count");
    assert!((1000..1500).contains(&open), "{err}");
    let (code, out, err) = run(&["inspect", &next, "--max-memory", "8", "--format", "json"]);
    assert_eq!(code, 0, "{err}");
    let j: serde_json::Value = serde_json::from_str(&out).unwrap();
    assert_eq!(j["episodes"], 1500);
}

/// The rover demo with its `episode` and `reward` headers renamed.
fn renamed_rover(dir: &Dir, file: &str, episode: &str, reward: &str) -> String {
    let text = std::fs::read_to_string(demo("docking_rover.csv")).unwrap();
    let (header, rest) = text.split_once('\n').unwrap();
    let header = header
        .replacen("episode,", &format!("{episode},"), 1)
        .replacen(",reward,", &format!(",{reward},"), 1);
    dir.write(file, format!("{header}\n{rest}").as_bytes())
}

/// Headers `rewards` and `episode_id` are read as the reward and the episode id when they are
/// the only candidates: the audit equals the demo's (every figure, whatever the file name),
/// and inspect says they were found under another name. With both `reward` and `rewards`
/// (or `episode` and `episode_id`) neither is guessed: exit 2 naming both columns and the
/// two --col choices; naming one with --col reads it.
#[test]
fn rewards_and_episode_id_headers_are_read_when_unambiguous() {
    let dir = Dir::new("leftover_aliases");
    let aliased = renamed_rover(&dir, "aliased.csv", "episode_id", "rewards");
    let audit = |log: &str, extra: &[&str]| {
        let mut args = vec![
            "audit",
            log,
            "--estimators",
            "rtg,gae:0.9",
            "--resamples",
            "200",
            "--format",
            "json",
        ];
        args.extend(extra);
        let mut j = crate::util::run_json(&args);
        j["input"]["file"] = serde_json::Value::Null;
        j
    };
    let rover = demo("docking_rover.csv");
    assert_eq!(audit(&aliased, &[]), audit(&rover, &[]));
    let j = crate::util::run_json(&["inspect", &aliased, "--format", "json"]);
    let roles: Vec<(String, String, String)> = j["columns"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|a| a["role"] == "episode" || a["role"] == "reward")
        .map(|a| {
            (
                a["role"].as_str().unwrap().to_string(),
                a["headers"][0].as_str().unwrap().to_string(),
                a["found"].as_str().unwrap().to_string(),
            )
        })
        .collect();
    let want = |r: &str, h: &str| (r.to_string(), h.to_string(), "synonym".to_string());
    assert_eq!(
        roles,
        [want("episode", "episode_id"), want("reward", "rewards")]
    );

    // Two candidates: the header keeps `reward` and gains `rewards` (a copy of `value`).
    let text = std::fs::read_to_string(&rover).unwrap();
    let (header, _) = text.split_once('\n').unwrap();
    let both = dir.write(
        "both.csv",
        text.replacen(header, &header.replacen(",value,", ",rewards,", 1), 1)
            .as_bytes(),
    );
    let (code, _, err) = run(&["inspect", &both]);
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains(
            "both.csv, line 1: the log has 'reward' (column 3) and 'rewards' (column 6) \
             for role reward: either could be it, so neither is read by default"
        ) && err.contains("name the one to read: --col reward=reward or --col reward=rewards"),
        "{err}"
    );
    // Naming one reads it (`rewards` is then unused; the log has lost its value column, so
    // gae:0.9 is skipped and rtg, which needs no value, is the demo's).
    let chosen = audit(&both, &["--col", "reward=reward"]);
    let rtg = |j: &serde_json::Value| {
        j["estimators"]
            .as_array()
            .unwrap()
            .iter()
            .find(|e| e["name"] == "rtg")
            .cloned()
            .unwrap()
    };
    assert_eq!(rtg(&chosen), rtg(&audit(&rover, &[])));
    assert_eq!(chosen["skipped"][0]["name"], "gae:0.9");
    let ids = dir.write(
        "ids.csv",
        text.replacen(header, &header.replacen(",value,", ",episode_id,", 1), 1)
            .as_bytes(),
    );
    let (code, _, err) = run(&["inspect", &ids]);
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains("'episode' (column 1) and 'episode_id' (column 6) for role episode"),
        "{err}"
    );
}

/// The same rule for a Parquet file, whose roles come from the same resolution: `episode_id`
/// and `rewards` are read alone, refused together with `reward`.
#[test]
fn parquet_rewards_and_episode_id_columns_follow_the_same_rule() {
    use arrow_array::{ArrayRef, BooleanArray, Float64Array, StringArray};
    use std::sync::Arc;
    let dir = Dir::new("leftover_aliases_parquet");
    let write = |file: &str, with_reward: bool| {
        let mut cols: Vec<(&str, ArrayRef)> = vec![
            (
                "episode_id",
                Arc::new(StringArray::from(vec!["a", "a", "b", "b", "c", "c"])),
            ),
            (
                "rewards",
                Arc::new(Float64Array::from(vec![1.0, 2.0, 3.0, 1.0, 2.0, 2.0])),
            ),
            (
                "terminated",
                Arc::new(BooleanArray::from(vec![
                    false, true, false, true, false, true,
                ])),
            ),
            (
                "score_0",
                Arc::new(Float64Array::from(vec![0.1, 0.3, 0.5, -0.2, 0.1, 0.4])),
            ),
        ];
        if with_reward {
            cols.push(("reward", Arc::new(Float64Array::from(vec![0.0; 6]))));
        }
        let batch = crate::util::named_batch(cols);
        let path = dir.path(file);
        let mut w = parquet::arrow::ArrowWriter::try_new(
            std::fs::File::create(&path).unwrap(),
            batch.schema(),
            None,
        )
        .unwrap();
        w.write(&batch).unwrap();
        w.close().unwrap();
        path.to_string_lossy().into_owned()
    };
    let alone = write("alone.parquet", false);
    let j = crate::util::run_json(&["inspect", &alone, "--format", "json"]);
    assert_eq!(j["episodes"], 3);
    // Returns 3, 4, 4: the rewards column was read.
    assert_eq!(j["episode_return"]["max"], 4.0);
    assert_eq!(j["episode_return"]["min"], 3.0);
    let both = write("both.parquet", true);
    let (code, _, err) = run(&["inspect", &both]);
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains("'reward' (column 5) and 'rewards' (column 2) for role reward"),
        "{err}"
    );
}
