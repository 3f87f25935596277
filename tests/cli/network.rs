//! `--policy` with an MLP actor: weights from a safetensors file written here with the
//! safetensors crate, scores end to end through `audit`, `inspect --policy`, and bad files.

use crate::util::{Dir, demo, run, run_json};
use safetensors::Dtype;
use safetensors::tensor::TensorView;

/// Writes F64 tensors (name, shape, values) with the safetensors crate's serializer.
fn write_weights(dir: &Dir, file: &str, tensors: &[(&str, Vec<usize>, Vec<f64>)]) {
    let bytes: Vec<Vec<u8>> = tensors
        .iter()
        .map(|t| t.2.iter().flat_map(|x| x.to_le_bytes()).collect())
        .collect();
    let views: Vec<(String, TensorView)> = tensors
        .iter()
        .zip(&bytes)
        .map(|(t, b)| {
            (
                t.0.to_string(),
                TensorView::new(Dtype::F64, t.1.clone(), b).unwrap(),
            )
        })
        .collect();
    dir.write(file, &safetensors::serialize(views, None).unwrap());
}

/// The docking rover's linear Gaussian policy (demo-data/docking_rover.policy.json) as an MLP
/// without hidden layers: it must give the logged scores, so the audit's variances match the
/// score columns' (to 1e-9 relative: the logged scores are printed to round-trip precision).
#[test]
fn a_network_policy_reproduces_the_logged_scores() {
    let dir = Dir::new("net_rover");
    write_weights(
        &dir,
        "rover.safetensors",
        &[
            ("mu.weight", vec![2, 2], vec![-0.8, 0.0, 0.0, -0.8]),
            ("mu.bias", vec![2], vec![0.05, -0.05]),
            ("log_std", vec![2], vec![0.5f64.ln(), 0.4f64.ln()]),
        ],
    );
    let desc = r#"{"schema": "gradaudit.policy/1", "family": "mlp", "features": ["obs_0", "obs_1"],
        "actions": ["act_0", "act_1"], "weights": "rover.safetensors",
        "head": {"kind": "gaussian", "mean": {"weight": "mu.weight", "bias": "mu.bias"}, "log_sigma": "log_std"}}"#;
    let policy = dir.write("rover.json", desc.as_bytes());
    let rover = demo("docking_rover.csv");
    let base = [
        "audit",
        rover.as_str(),
        "--resamples",
        "200",
        "--format",
        "json",
        "--estimators",
        "rtg,gae:0.9",
    ];
    let cols = run_json(&base);
    let mut with = base.to_vec();
    with.extend(["--policy", policy.as_str(), "--scores-from", "policy"]);
    let net = run_json(&with);
    assert_eq!(net["input"]["parameters"][0], "mu.weight[0,0]");
    assert_eq!(net["input"]["parameters"][7], "log_std[1]");
    crate::util::assert_same_variances(&cols, &net, 1e-9);
}

fn hidden_actor(dir: &Dir) -> String {
    write_weights(
        dir,
        "actor.safetensors",
        &[
            (
                "pi.0.weight",
                vec![3, 2],
                vec![0.5, -0.25, 0.125, 0.75, -0.5, 0.25],
            ),
            ("pi.0.bias", vec![3], vec![0.0, 0.125, -0.125]),
            (
                "mu.weight",
                vec![2, 3],
                vec![0.5, 0.0, -0.5, 0.25, 0.5, 0.0],
            ),
            ("mu.bias", vec![2], vec![0.0, 0.0]),
            ("log_std", vec![2], vec![-0.5, -0.5]),
            ("obs_rms.mean", vec![2], vec![0.1, -0.1]),
            ("obs_rms.var", vec![2], vec![2.0, 0.5]),
        ],
    );
    let desc = r#"{"schema": "gradaudit.policy/1", "family": "mlp", "features": ["obs_0", "obs_1"],
        "actions": ["act_0", "act_1"], "weights": "actor.safetensors",
        "normalize": {"mean": "obs_rms.mean", "var": "obs_rms.var", "clip": 10},
        "layers": [{"weight": "pi.0.weight", "bias": "pi.0.bias", "activation": "elu"}],
        "head": {"kind": "gaussian", "mean": {"weight": "mu.weight", "bias": "mu.bias"}, "log_sigma": "log_std"},
        "theta": ["mu.weight", "mu.bias", "log_std"]}"#;
    dir.write("actor.json", desc.as_bytes())
}

#[test]
fn inspect_shows_the_network() {
    let dir = Dir::new("net_inspect");
    let policy = hidden_actor(&dir);
    let rover = demo("docking_rover.csv");
    let (code, out, err) = run(&["inspect", &rover, "--policy", &policy]);
    assert_eq!(code, 0, "{err}");
    assert!(out.contains("policy: mlp, gaussian head"), "{out}");
    assert!(
        out.contains("normalisation: (x - obs_rms.mean) / sqrt(obs_rms.var + 1e-8), clip +-10"),
        "{out}"
    );
    assert!(
        out.contains("layer 1") && out.contains("elu") && out.contains("pi.0.weight [3, 2] 6"),
        "{out}"
    );
    // 6 + 3 trunk, 6 + 2 mean, 2 log sigma = 19 in all; theta is the head's 6 + 2 + 2 = 10.
    assert!(
        out.contains("parameters: 19 in all, 10 in theta (mu.weight, mu.bias, log_std)"),
        "{out}"
    );
    let j = run_json(&["inspect", &rover, "--policy", &policy, "--format", "json"]);
    assert_eq!(j["policy"]["dim"], 10);
    assert_eq!(j["policy"]["layers"][0]["tensors"][0]["in_theta"], false);
    assert_eq!(j["policy"]["layers"][1]["tensors"][0]["in_theta"], true);
    assert_eq!(j["policy"]["theta"][2], "log_std");
    let plain = run_json(&["inspect", &rover, "--format", "json"]);
    assert!(plain.get("policy").is_none());
}

#[test]
fn audit_with_a_hidden_layer_network_runs() {
    let dir = Dir::new("net_audit");
    let policy = hidden_actor(&dir);
    let rover = demo("docking_rover.csv");
    let j = run_json(&[
        "audit",
        &rover,
        "--policy",
        &policy,
        "--scores-from",
        "policy",
        "--resamples",
        "100",
        "--format",
        "json",
    ]);
    assert_eq!(j["input"]["parameters"].as_array().unwrap().len(), 10);
    assert_eq!(j["input"]["parameters"][0], "mu.weight[0,0]");
    assert!(j["estimators"][0]["variance"].as_f64().unwrap() > 0.0);
}

#[test]
fn bad_weights_exit_2_naming_file_and_tensor() {
    let dir = Dir::new("net_bad");
    let policy = hidden_actor(&dir);
    let rover = demo("docking_rover.csv");
    let desc = std::fs::read_to_string(&policy).unwrap();
    let cases = [
        (
            desc.replace("\"pi.0.bias\"", "\"pi.1.bias\""),
            "no tensor named 'pi.1.bias' (the bias of layer 1); did you mean 'pi.0.bias'?",
        ),
        (
            desc.replace("\"log_sigma\": \"log_std\"", "\"log_sigma\": \"pi.0.bias\""),
            "is named twice",
        ),
        (
            desc.replace("\"var\": \"obs_rms.var\"", "\"var\": \"pi.0.bias\""),
            "tensor 'pi.0.bias' (the normalisation variance) has shape [3], expected [2]",
        ),
    ];
    for (text, want) in cases {
        let p = dir.write("bad.json", text.as_bytes());
        let (code, _, err) = run(&["audit", &rover, "--policy", &p, "--scores-from", "policy"]);
        assert_eq!(code, 2, "{err}");
        assert!(err.contains(want), "{want}: {err}");
        assert!(
            err.contains("actor.safetensors") || err.contains("bad.json"),
            "{err}"
        );
    }
    // The rover's actions reach 1.59: a tanh-squashed head cannot have produced them.
    let p = dir.write(
        "tanh.json",
        desc.replace("\"kind\": \"gaussian\"", "\"kind\": \"tanh_gaussian\"")
            .as_bytes(),
    );
    let (code, _, err) = run(&["audit", &rover, "--policy", &p, "--scores-from", "policy"]);
    assert_eq!(code, 2);
    // First row of the log: act_0 = 1.589909 at line 2, column 11.
    assert!(
        err.contains("docking_rover.csv, line 2, column 11 ('act_0')"),
        "{err}"
    );
    assert!(err.contains("outside (-1, 1)"), "{err}");
}
