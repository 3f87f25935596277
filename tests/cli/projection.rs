//! Network policies at scale: `--project` (random projections of the scores), the reaching-arm
//! demo's weights against its logged scores, `--value-net`, and the clipped-action warning.

use crate::util::{Dir, demo, run, run_json};

const ARM: &str = "reaching_arm.csv";
const ARM_POLICY: &str = "reaching_arm.policy.json";

fn arm_audit(extra: &[&str]) -> Vec<String> {
    let mut args: Vec<String> = [
        "audit",
        &demo(ARM),
        "--policy",
        &demo(ARM_POLICY),
        "--scores-from",
        "policy",
        "--resamples",
        "300",
        "--splits",
        "20",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    args.extend(extra.iter().map(|s| s.to_string()));
    args
}

fn json(args: &[String]) -> serde_json::Value {
    let refs: Vec<&str> = args.iter().map(String::as_str).collect();
    run_json(&refs)
}

fn estimator<'a>(report: &'a serde_json::Value, name: &str) -> &'a serde_json::Value {
    report["estimators"]
        .as_array()
        .unwrap()
        .iter()
        .find(|e| e["name"] == name)
        .unwrap_or_else(|| panic!("no estimator {name}"))
}

// Source: the demo generator's own forward and backward pass (examples/rollouts/actor.rs),
// written apart from src/policy, computed the log's score columns; gradaudit's network module
// must reproduce them from the safetensors weights and the description alone.
#[test]
fn demo_weights_reproduce_the_demo_logs_scores() {
    use gradaudit::log::{LogReader, Progress, ReadOptions};
    let opts = ReadOptions {
        progress: Progress::Hidden,
        ..ReadOptions::default()
    };
    let mut reader = LogReader::open(&demo(ARM), &opts).unwrap();
    let policy = gradaudit::policy::Policy::load(&demo(ARM_POLICY), reader.schema()).unwrap();
    assert_eq!(policy.dim(), 132);
    let (mut steps, mut worst) = (0, 0.0f64);
    while let Some(ep) = reader.next_episode().unwrap() {
        let mut mine = ep.clone();
        policy.score_episode(&mut mine, ARM, ep.first_line).unwrap();
        assert_eq!(mine.scores.len(), ep.scores.len());
        for (a, b) in mine.scores.iter().zip(&ep.scores) {
            worst = worst.max((a - b).abs() / b.abs().max(1.0));
        }
        steps += ep.len();
    }
    assert!(steps > 600, "{steps} steps");
    assert!(worst <= 1e-9, "largest relative difference {worst:e}");
}

#[test]
fn small_networks_are_exact_unless_projection_is_asked_for() {
    let exact = json(&arm_audit(&["--format", "json"]));
    assert!(exact["input"]["sketch"].is_null());
    assert_eq!(exact["input"]["score_dim"], 132);
    let proj = json(&arm_audit(&["--format", "json", "--project", "16"]));
    let sk = &proj["input"]["sketch"];
    assert_eq!(sk["source"], "computed");
    assert_eq!(sk["k"], 16);
    assert_eq!(sk["full_dim"], 132);
    assert_eq!(proj["input"]["score_dim"], 16);
    let names: Vec<&str> = proj["estimators"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["name"].as_str().unwrap())
        .collect();
    let prec = sk["precision"].as_array().unwrap();
    assert_eq!(prec.len(), names.len());
    // The same bootstrap replicates (same seed): the projected variance is Hutchinson's
    // estimate of the exact one, unbiased, with the reported standard error. One draw, so we
    // only ask for 4 standard errors.
    for name in ["rtg", "total", "rtg_discounted"] {
        let v_exact = estimator(&exact, name)["variance"].as_f64().unwrap();
        let v_proj = estimator(&proj, name)["variance"].as_f64().unwrap();
        let se = prec.iter().find(|p| p["estimator"] == name).unwrap()["variance_se"]
            .as_f64()
            .unwrap();
        assert!(se > 0.0 && se < v_proj, "{name}: se {se}");
        assert!(
            (v_proj - v_exact).abs() < 4.0 * se,
            "{name}: projected {v_proj}, exact {v_exact}, se {se}"
        );
    }
    let mut table = arm_audit(&["--project", "16"]);
    table.insert(0, String::new());
    let refs: Vec<&str> = table[1..].iter().map(String::as_str).collect();
    let (code, out, err) = run(&refs);
    assert_eq!(code, 0, "{err}");
    // The table report wraps its notes at 100 columns.
    let out = out.split_whitespace().collect::<Vec<_>>().join(" ");
    assert!(out.contains("132 scores were projected onto 16"), "{out}");
    assert!(
        out.contains("measured from the spread over the 16 projections"),
        "{out}"
    );
    // Below 64 projections the measured spread is flagged as uncertain (src/sketch.rs).
    assert!(
        out.contains("with only 16 projections that measured error is itself uncertain"),
        "{out}"
    );
}

#[test]
fn projection_is_deterministic_for_any_thread_count() {
    let args = arm_audit(&["--format", "json", "--project", "12", "--seed", "5"]);
    let outs: Vec<String> = ["1", "2"]
        .iter()
        .map(|threads| {
            let out = crate::util::gradaudit()
                .env("RAYON_NUM_THREADS", threads)
                .args(&args)
                .output()
                .unwrap();
            assert!(out.status.success());
            String::from_utf8(out.stdout).unwrap()
        })
        .collect();
    assert_eq!(outs[0], outs[1]);
    let other = json(&arm_audit(&[
        "--format",
        "json",
        "--project",
        "12",
        "--seed",
        "6",
    ]));
    let first: serde_json::Value = serde_json::from_str(&outs[0]).unwrap();
    assert_ne!(
        estimator(&first, "rtg")["variance"],
        estimator(&other, "rtg")["variance"]
    );
}

#[test]
fn bad_projection_requests_are_usage_errors() {
    for (extra, needle) in [
        (vec!["--project", "1"], "at least 2 projections"),
        (
            vec!["--project", "many"],
            "neither auto, exact nor a number",
        ),
    ] {
        let (code, _, err) = run(&arm_audit(&extra)
            .iter()
            .map(String::as_str)
            .collect::<Vec<_>>());
        assert_eq!(code, 2, "{extra:?}");
        assert!(err.contains(needle), "{err}");
    }
    let rover = demo("docking_rover.csv");
    let (code, _, err) = run(&["audit", &rover, "--score-sketch", "8", "--project", "4"]);
    assert_eq!(code, 2);
    assert!(err.contains("do not combine it with --project"), "{err}");
    let (code, _, err) = run(&[
        "sweep",
        &demo(ARM),
        "--policy",
        &demo(ARM_POLICY),
        "--scores-from",
        "policy",
        "--over",
        "gamma",
        "--project",
        "8",
    ]);
    assert_eq!(code, 2);
    assert!(err.contains("--project exact"), "{err}");
}

/// The demo log with extra columns appended to every row: `f(fields)` gives the new fields.
fn with_columns(header: &str, f: impl Fn(&[&str]) -> String) -> String {
    let text = std::fs::read_to_string(demo(ARM)).unwrap();
    let mut lines = text.lines();
    let mut out = format!("{},{header}\n", lines.next().unwrap());
    for line in lines {
        let fields: Vec<&str> = line.split(',').collect();
        out.push_str(&format!("{line},{}\n", f(&fields)));
    }
    out
}

// Source: a closed form. A value network of one identity layer is V(s) = w . s + b; the audit
// with --value-net must equal the audit of the same log whose value column holds w . s + b
// (and whose truncated last rows hold next_value = V at that row's observation, the bootstrap
// the value network uses).
#[test]
fn a_value_network_gives_the_same_audit_as_its_values_in_columns() {
    let dir = Dir::new("value-net");
    let w = [0.5, -0.2, 1.0, -1.5];
    let b = 0.3;
    let desc = serde_json::json!({
        "schema": "gradaudit.policy/1",
        "family": "mlp_value",
        "features": ["obs_0", "obs_1", "obs_2", "obs_3"],
        "tensors": {"v.w": [w], "v.b": [b]},
        "layers": [{"weight": "v.w", "bias": "v.b", "activation": "identity"}],
    });
    let value_net = dir.write("value.json", desc.to_string().as_bytes());
    // Columns: episode,step,reward,terminated,truncated,logp,obs_0..obs_3 (6..9).
    let v = |f: &[&str]| -> f64 {
        (0..4)
            .map(|j| w[j] * f[6 + j].parse::<f64>().unwrap())
            .sum::<f64>()
            + b
    };
    let with_values = with_columns("value,next_value", |f| {
        let next = if f[4] == "1" {
            format!("{}", v(f))
        } else {
            String::new()
        };
        format!("{},{next}", v(f))
    });
    let log = dir.write("arm_values.csv", with_values.as_bytes());
    let base = |file: &str| -> Vec<String> {
        [
            "audit",
            file,
            "--resamples",
            "200",
            "--splits",
            "10",
            "--format",
            "json",
            "--estimators",
            "rtg,value_baseline,gae:0.95,td",
        ]
        .iter()
        .map(|s| s.to_string())
        .collect()
    };
    let cols = json(&base(&log));
    let mut args = base(&demo(ARM));
    args.extend(["--value-net".to_string(), value_net]);
    let net = json(&args);
    assert_eq!(net["input"]["value_net"]["bootstrap"], "last_observation");
    assert!(net["input"]["value_net"]["explained_variance"].is_number());
    assert!(
        !net["warnings"]
            .as_object()
            .unwrap()
            .contains_key("truncated_without_bootstrap")
    );
    for name in ["value_baseline", "gae:0.95", "td"] {
        for key in ["variance", "bias_sq", "gradient_norm"] {
            let (x, y) = (
                estimator(&cols, name)[key].as_f64().unwrap(),
                estimator(&net, name)[key].as_f64().unwrap(),
            );
            assert!(
                (x - y).abs() <= 1e-9 * x.abs().max(1e-12),
                "{name} {key}: {x} vs {y}"
            );
        }
    }
    // Without a value column or network the value-based estimators are skipped.
    let plain = json(&base(&demo(ARM)));
    assert!(
        plain["skipped"]
            .as_array()
            .unwrap()
            .iter()
            .any(|s| s["name"] == "td")
    );
}

#[test]
fn a_value_network_and_a_fitted_critic_exclude_each_other() {
    let (code, _, err) = run(&[
        "audit",
        &demo(ARM),
        "--fit-value",
        "--value-net",
        &demo(ARM_POLICY),
    ]);
    assert_eq!(code, 2);
    assert!(err.contains("choose one"), "{err}");
    // An actor description is not a value network: the message says what is expected.
    let (code, _, err) = run(&["audit", &demo(ARM), "--value-net", &demo(ARM_POLICY)]);
    assert_eq!(code, 2);
    assert!(err.contains("mlp_value"), "{err}");
}

#[test]
fn clipped_actions_in_the_log_are_warned_about() {
    // The demo logs the sampled actions: none sits exactly on the +-1 bounds.
    let clean = json(&arm_audit(&["--format", "json"]));
    assert!(
        !clean["warnings"]
            .as_object()
            .unwrap()
            .contains_key("clipped_actions")
    );
    // The same log with its actions clipped to the actuator limits, as some stacks record them.
    let text = std::fs::read_to_string(demo(ARM)).unwrap();
    let mut clipped = String::new();
    let mut on_bound = 0;
    for (i, line) in text.lines().enumerate() {
        let mut fields: Vec<String> = line.split(',').map(str::to_string).collect();
        if i > 0 {
            for f in &mut fields[10..12] {
                let a: f64 = f.parse().unwrap();
                if a.abs() >= 1.0 {
                    *f = format!("{}", a.clamp(-1.0, 1.0));
                    on_bound += 1;
                }
            }
        }
        clipped.push_str(&fields.join(","));
        clipped.push('\n');
    }
    let dir = Dir::new("clipped");
    let log = dir.write("arm_clipped.csv", clipped.as_bytes());
    let mut args = arm_audit(&["--format", "json"]);
    args[1] = log;
    let report = json(&args);
    let w = &report["warnings"]["clipped_actions"];
    assert_eq!(w["count"], on_bound, "{w}");
    assert!(on_bound >= 10);
    assert!(
        w["message"]
            .as_str()
            .unwrap()
            .contains("clipped to the actuator limits"),
        "{w}"
    );
}

#[test]
fn logged_score_columns_are_projected_only_on_request() {
    let rover = demo("docking_rover.csv");
    let base = [
        "audit",
        &rover,
        "--resamples",
        "100",
        "--splits",
        "10",
        "--format",
        "json",
    ];
    let plain = run_json(&base);
    assert!(plain["input"]["sketch"].is_null());
    let mut args = base.to_vec();
    args.extend(["--project", "4"]);
    let proj = run_json(&args);
    let sk = &proj["input"]["sketch"];
    assert_eq!(
        (sk["k"].as_u64(), sk["full_dim"].as_u64()),
        (Some(4), Some(8))
    );
    assert_eq!(sk["source"], "computed");
    assert_eq!(proj["input"]["parameters"][0], "projection_0");
}

#[test]
fn a_step_the_network_cannot_score_is_named_the_same_with_or_without_projection() {
    // The demo's actions exceed +-1 at some steps; a tanh-squashed head cannot have sampled
    // them, and must say at which row.
    let text = std::fs::read_to_string(demo(ARM_POLICY)).unwrap();
    let mut desc: serde_json::Value = serde_json::from_str(&text).unwrap();
    desc["head"]["kind"] = "tanh_gaussian".into();
    desc["weights"] = demo("reaching_arm.safetensors").into();
    let dir = Dir::new("squashed");
    let path = dir.write("squashed.json", desc.to_string().as_bytes());
    let errs: Vec<String> = ["exact", "16"]
        .iter()
        .map(|k| {
            let mut args = arm_audit(&["--project", k]);
            args[3] = path.clone();
            let (code, _, err) = run(&args.iter().map(String::as_str).collect::<Vec<_>>());
            assert_eq!(code, 2, "{err}");
            err
        })
        .collect();
    assert!(errs[0].contains(", line "), "{}", errs[0]);
    assert_eq!(errs[0], errs[1]);
}
