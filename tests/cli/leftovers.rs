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
