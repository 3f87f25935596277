//! MLP actors: scores against central finite differences of the network's own log-density
//! (every activation, every head, with and without normalisation), against the linear families
//! (a network without hidden layers), against a 1-hidden-unit network worked by the chain rule,
//! and the safetensors reader (F32, F64, BF16, F16) and its errors.

use super::*;
use crate::log::ColumnSpec;
use ndarray::{Array2, array};
use serde_json::{Value, json};

fn schema() -> Schema {
    let headers = [
        "episode", "reward", "obs_0", "obs_1", "obs_2", "act_0", "act_1",
    ];
    Schema::resolve(
        &ColumnSpec::default(),
        headers.iter().map(|s| s.to_string()).collect(),
        "log.csv",
    )
    .unwrap()
}

/// A deterministic stream of numbers in [-1, 1) (splitmix64), for weights and data.
struct Gen(u64);

impl Gen {
    fn next(&mut self) -> f64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^= z >> 31;
        (z >> 11) as f64 / (1u64 << 52) as f64 - 1.0
    }
    fn mat(&mut self, r: usize, c: usize, scale: f64) -> Value {
        json!(
            (0..r)
                .map(|_| (0..c).map(|_| scale * self.next()).collect::<Vec<_>>())
                .collect::<Vec<_>>()
        )
    }
    fn vec(&mut self, n: usize, scale: f64) -> Value {
        json!((0..n).map(|_| scale * self.next()).collect::<Vec<_>>())
    }
}

const HEADS: &[&str] = &[
    "gaussian",
    "gaussian_layer",
    "tanh_gaussian",
    "tanh_gaussian_layer",
    "categorical",
    "bernoulli",
];

/// A 3 -> 4 -> 3 -> head network with inline tensors.
fn describe(activation: &str, head: &str, norm: bool, seed: u64) -> Value {
    let mut g = Gen(seed);
    let mut tensors = serde_json::Map::new();
    for (name, v) in [
        ("W1", g.mat(4, 3, 0.9)),
        ("b1", g.vec(4, 0.3)),
        ("W2", g.mat(3, 4, 0.9)),
        ("b2", g.vec(3, 0.3)),
        ("Wm", g.mat(2, 3, 0.8)),
        ("bm", g.vec(2, 0.2)),
        ("ls", g.vec(2, 0.5)),
        ("Ws", g.mat(2, 3, 0.5)),
        ("bs", g.vec(2, 0.2)),
        ("Wl", g.mat(3, 3, 1.0)),
        ("bl", g.vec(3, 0.2)),
        ("Wb", g.mat(1, 3, 1.0)),
        ("bb", g.vec(1, 0.2)),
        ("m", json!([0.1, -0.2, 0.3])),
        ("v", json!([1.5, 0.5, 2.0])),
    ] {
        tensors.insert(name.into(), v);
    }
    let sigma_layer = json!({"weight": "Ws", "bias": "bs", "clip": [-5.0, 2.0]});
    let (head, acts) = match head {
        "gaussian" | "tanh_gaussian" => (
            json!({"kind": head, "mean": {"weight": "Wm", "bias": "bm"}, "log_sigma": "ls"}),
            json!({"actions": ["act_0", "act_1"]}),
        ),
        "gaussian_layer" | "tanh_gaussian_layer" => (
            json!({"kind": head.trim_end_matches("_layer"), "mean": {"weight": "Wm", "bias": "bm"},
                   "log_sigma": sigma_layer}),
            json!({"actions": ["act_0", "act_1"]}),
        ),
        "categorical" => (
            json!({"kind": "categorical", "logits": {"weight": "Wl", "bias": "bl"}}),
            json!({"action": "act_0"}),
        ),
        "bernoulli" => (
            json!({"kind": "bernoulli", "logit": {"weight": "Wb", "bias": "bb"}}),
            json!({"action": "act_1"}),
        ),
        other => panic!("{other}"),
    };
    let mut d = json!({
        "schema": "gradaudit.policy/1", "family": "mlp",
        "features": ["obs_0", "obs_1", "obs_2"],
        "tensors": tensors,
        "layers": [
            {"weight": "W1", "bias": "b1", "activation": activation},
            {"weight": "W2", "bias": "b2", "activation": activation},
        ],
        "head": head,
    });
    for (k, v) in acts.as_object().unwrap() {
        d[k] = v.clone();
    }
    if norm {
        d["normalize"] = json!({"mean": "m", "var": "v", "eps": 1e-8, "clip": 2.0});
    }
    d
}

fn network(desc: &Value) -> Network {
    let p = Policy::from_json(&desc.to_string(), "net.json", &schema()).unwrap();
    p.network().expect("an mlp").clone()
}

/// Four steps of obs (raw, up to +-3 so that the +-2 clip is active for some) and actions the
/// head accepts.
fn data(head: &str) -> (Array2<f64>, Array2<f64>) {
    let obs = array![
        [0.5, -1.2, 2.0],
        [-0.3, 0.8, -0.7],
        [3.0, 0.1, 0.4],
        [-1.1, -2.9, 1.3]
    ];
    let act = match head {
        "categorical" => array![[0.0], [2.0], [1.0], [2.0]],
        "bernoulli" => array![[1.0], [0.0], [1.0], [0.0]],
        _ => array![[0.8, -0.4], [-0.9, 0.3], [0.1, 0.95], [-0.2, -0.6]],
    };
    (obs, act)
}

/// Checks every score component of every step against central differences of log pi.
///
/// Tolerance: (f(x + h) - f(x - h)) / 2h errs by h^2 f'''/6 (truncation) plus about
/// eps |f| / h (rounding). With h = 1e-5 and these small networks of unit-scale weights and
/// inputs, |f'''| stays well under 1e3 (the largest factor is 1/sigma^3 with sigma >= e^-1.5,
/// and atanh(0.95)'' in the squashed head), so truncation is under 2e-8, and rounding under
/// 1e-10 for |log pi| < 10. 1e-6 (relative to max(1, |score|)) leaves a wide margin yet catches
/// any wrong term, which is off by O(0.01) or more for these inputs.
fn assert_matches_finite_differences(
    net: &Network,
    obs: &Array2<f64>,
    act: &Array2<f64>,
    what: &str,
) -> f64 {
    let scores = net.scores(obs.view(), act.view()).unwrap();
    assert_eq!(scores.ncols(), net.dim());
    let h = 1e-5;
    let mut col = 0;
    // The largest discrepancy seen, relative to max(1, |score|).
    let mut worst = 0.0f64;
    for &p in &net.theta_params {
        for k in 0..net.mlp.params[p].value.len() {
            let (mut up, mut down) = (net.clone(), net.clone());
            up.mlp.params[p].value.as_slice_mut().unwrap()[k] += h;
            down.mlp.params[p].value.as_slice_mut().unwrap()[k] -= h;
            let fd = (up.log_density(obs.view(), act.view()).unwrap()
                - down.log_density(obs.view(), act.view()).unwrap())
                / (2.0 * h);
            for t in 0..obs.nrows() {
                let s = scores[[t, col]];
                worst = worst.max((fd[t] - s).abs() / s.abs().max(1.0));
                assert!(
                    (fd[t] - s).abs() < 1e-6 * s.abs().max(1.0),
                    "{what}: {} component {k}, step {t}: score {s} vs finite difference {}",
                    net.mlp.params[p].name,
                    fd[t]
                );
            }
            col += 1;
        }
    }
    assert_eq!(col, net.dim());
    worst
}

/// No pre-activation sits within 1e-3 of a kink (relu, leaky relu, elu at 0), where a
/// finite difference of step 1e-5 would straddle it.
fn assert_clear_of_kinks(net: &Network, obs: &Array2<f64>) {
    let pass = net.mlp.pass(obs.view(), false);
    for (l, layer) in net.mlp.layers.iter().enumerate() {
        let z = layer.affine(&net.mlp.params, &pass.inputs[l].view());
        assert!(
            z.iter().all(|v| v.abs() > 1e-3),
            "a pre-activation near 0: {z}"
        );
    }
}

#[test]
fn every_activation_and_head_matches_finite_differences() {
    let activations = [
        "identity",
        "tanh",
        "relu",
        "elu",
        "leaky_relu",
        "silu",
        "swish",
        "sigmoid",
        "softplus",
    ];
    let (mut worst, mut cases) = (0.0f64, 0);
    for (i, act) in activations.iter().enumerate() {
        for head in HEADS {
            for norm in [false, true] {
                let mut d = describe(act, head, norm, 11 + i as u64);
                if *act == "elu" && norm {
                    d["layers"][0]["alpha"] = json!(0.5);
                }
                if *act == "leaky_relu" && norm {
                    d["layers"][1]["negative_slope"] = json!(0.2);
                }
                let net = network(&d);
                let (obs, a) = data(head);
                assert_clear_of_kinks(&net, &obs);
                worst = worst.max(assert_matches_finite_differences(
                    &net,
                    &obs,
                    &a,
                    &format!("{act} {head} norm={norm}"),
                ));
                cases += 1;
            }
        }
    }
    eprintln!(
        "{cases} networks; largest |score - central difference| / max(1, |score|): {worst:.2e}"
    );
}

#[test]
fn a_clipped_log_sigma_layer_has_zero_gradient_where_it_clips() {
    // Clip to [-0.05, 0.05]: almost every step is clipped, so d/dWs and d/dbs vanish there,
    // and finite differences (which see a flat log-density) agree.
    let mut d = describe("tanh", "gaussian_layer", true, 5);
    d["head"]["log_sigma"]["clip"] = json!([-0.05, 0.05]);
    let net = network(&d);
    let (obs, a) = data("gaussian");
    assert_matches_finite_differences(&net, &obs, &a, "clipped");
    let s = net.scores(obs.view(), a.view()).unwrap();
    let off = net
        .theta_groups()
        .iter()
        .take_while(|g| g.name != "Ws")
        .map(|g| g.size)
        .sum::<usize>();
    let clipped = (0..4)
        .filter(|&t| {
            s.row(t)
                .slice(ndarray::s![off..off + 8])
                .iter()
                .all(|v| *v == 0.0)
        })
        .count();
    assert!(clipped >= 1, "some steps are clipped: {s}");
}

#[test]
fn a_theta_selection_gives_the_matching_columns_of_the_full_score() {
    let full_d = describe("elu", "gaussian", true, 3);
    let full = network(&full_d);
    let (obs, a) = data("gaussian");
    let all = full.scores(obs.view(), a.view()).unwrap();
    let offsets: Vec<(String, usize, usize)> = full
        .theta_groups()
        .iter()
        .scan(0, |off, g| {
            let r = (g.name.clone(), *off, g.size);
            *off += g.size;
            Some(r)
        })
        .collect();
    for pick in [vec!["ls"], vec!["bm", "Wm"], vec!["W1"], vec!["b2", "ls"]] {
        let mut d = full_d.clone();
        d["theta"] = json!(pick);
        let net = network(&d);
        let s = net.scores(obs.view(), a.view()).unwrap();
        // Network order, whatever order the list gives.
        let mut col = 0;
        for (name, off, size) in &offsets {
            if pick.contains(&name.as_str()) {
                for k in 0..*size {
                    for t in 0..4 {
                        assert_eq!(s[[t, col]], all[[t, off + k]], "{pick:?} {name}[{k}]");
                    }
                    col += 1;
                }
            }
        }
        assert_eq!(col, net.dim(), "{pick:?}");
        let names: Vec<&str> = net.theta_groups().iter().map(|g| g.name.as_str()).collect();
        assert!(names.iter().all(|n| pick.contains(n)));
    }
}

#[test]
fn factored_weight_gradients_flatten_row_major() {
    let net = network(&describe("tanh", "bernoulli", false, 9));
    let (obs, a) = data("bernoulli");
    let f = net.score_factors(obs.view(), a.view()).unwrap();
    let GroupGrad::Outer { delta, input } = &f[0] else {
        panic!("W1 is a dense weight")
    };
    assert_eq!((delta.ncols(), input.ncols()), (4, 3));
    let s = net.scores(obs.view(), a.view()).unwrap();
    // Component o * in + i of W1's block is delta[o] * x[i].
    assert_eq!(s[[2, 3 + 1]], delta[[2, 1]] * input[[2, 1]]);
    assert_eq!(s[[2, 2 * 3]], delta[[2, 2]] * input[[2, 0]]);
    assert!(matches!(f[1], GroupGrad::Full(_)));
}

fn episode(obs: &Array2<f64>, act: &Array2<f64>) -> crate::episode::Episode {
    let mut ep = crate::episode::Episode::new(
        "e".into(),
        2,
        &crate::episode::Layout {
            obs_dim: obs.ncols(),
            act_dim: act.ncols(),
            ..Default::default()
        },
    );
    ep.rewards = vec![0.0; obs.nrows()];
    ep.obs = obs.iter().copied().collect();
    ep.act = act.iter().copied().collect();
    ep.lines = (0..obs.nrows() as u64).map(|t| 2 + t).collect();
    ep
}

/// A network with no hidden layer is the linear family: the same parameters in the same
/// order give the same scores (to 1e-12: only the order of floating-point operations differs).
#[test]
fn no_hidden_layer_equals_the_linear_families() {
    let s = schema();
    let obs = array![[0.5, -1.2, 2.0], [-0.3, 0.8, -0.7], [1.4, 0.1, 0.4]];
    let cases = [
        (
            json!({"family": "gaussian_linear", "features": ["obs_0", "obs_1", "obs_2"], "actions": ["act_0", "act_1"],
                   "W": [[0.3, -0.7, 0.2], [-0.1, 0.4, 0.9]], "c": [0.05, -0.2], "log_sigma": [-0.5, 0.26]}),
            json!({"family": "mlp", "features": ["obs_0", "obs_1", "obs_2"], "actions": ["act_0", "act_1"],
                   "tensors": {"W": [[0.3, -0.7, 0.2], [-0.1, 0.4, 0.9]], "c": [0.05, -0.2], "ls": [-0.5, 0.26]},
                   "head": {"kind": "gaussian", "mean": {"weight": "W", "bias": "c"}, "log_sigma": "ls"}}),
            array![[0.8, -0.4], [-0.9, 0.3], [0.1, 2.5]],
        ),
        (
            json!({"family": "softmax_linear", "features": ["obs_0", "obs_1", "obs_2"], "action": "act_0",
                   "theta": [[1.0, 0.0, -0.5], [0.0, 1.0, 0.3], [0.5, 0.5, 0.0]]}),
            json!({"family": "mlp", "features": ["obs_0", "obs_1", "obs_2"], "action": "act_0",
                   "tensors": {"theta": [[1.0, 0.0, -0.5], [0.0, 1.0, 0.3], [0.5, 0.5, 0.0]]},
                   "head": {"kind": "categorical", "logits": {"weight": "theta"}}}),
            array![[0.0, 0.0], [2.0, 0.0], [1.0, 0.0]],
        ),
        (
            json!({"family": "bernoulli_logistic", "features": ["obs_0", "obs_1", "obs_2"], "action": "act_1",
                   "w": [1.6, 0.2, -2.0], "c": -1.0}),
            json!({"family": "mlp", "features": ["obs_0", "obs_1", "obs_2"], "action": "act_1",
                   "tensors": {"w": [[1.6, 0.2, -2.0]], "c": [-1.0]},
                   "head": {"kind": "bernoulli", "logit": {"weight": "w", "bias": "c"}}}),
            array![[0.0, 1.0], [0.0, 0.0], [0.0, 1.0]],
        ),
    ];
    for (lin, net, act) in cases {
        let load = |mut d: Value| {
            d["schema"] = json!(POLICY_SCHEMA);
            Policy::from_json(&d.to_string(), "p.json", &s).unwrap()
        };
        let (lin, net) = (load(lin), load(net));
        assert_eq!(lin.dim(), net.dim());
        let (mut a, mut b) = (episode(&obs, &act), episode(&obs, &act));
        lin.score_episode(&mut a, "log.csv", 2).unwrap();
        net.score_episode(&mut b, "log.csv", 2).unwrap();
        for (x, y) in a.scores.iter().zip(&b.scores) {
            assert!((x - y).abs() < 1e-12, "{:?} vs {:?}", a.scores, b.scores);
        }
    }
}

// A network with one hidden tanh unit, one obs x and a Gaussian mean:
//   z = w1 x + b1, h = tanh(z), mu = w2 h + b2, log pi = -(a - mu)^2 / (2 sigma^2) - ls - ln sqrt(2 pi)
// By the chain rule, with g = d log pi / d mu = (a - mu) / sigma^2:
//   d/dw2 = g h, d/db2 = g, d/dls = (a - mu)^2 / sigma^2 - 1,
//   d/dw1 = g w2 (1 - h^2) x, d/db1 = g w2 (1 - h^2).
// Worked for x = 0.5, w1 = 2, b1 = -0.5, w2 = 1.5, b2 = 0.1, sigma = 0.5, a = 1:
//   z = 0.5, h = tanh(0.5) = 0.46211715726, mu = 0.79317573589, a - mu = 0.20682426411,
//   g = 0.82729705644, 1 - h^2 = 0.78644773297;
//   d/dw1 = 0.82729705644 * 1.5 * 0.78644773297 * 0.5 = 0.48796942, d/db1 = 0.97593884,
//   d/dw2 = 0.82729705644 * 0.46211715726 = 0.38230816, d/db2 = 0.82729706,
//   d/dls = 0.04277627622 / 0.25 - 1 = -0.82889490.
#[test]
fn one_hidden_tanh_unit_by_the_chain_rule() {
    let headers = ["episode", "reward", "obs_0", "act_0"];
    let s = Schema::resolve(
        &ColumnSpec::default(),
        headers.iter().map(|s| s.to_string()).collect(),
        "log.csv",
    )
    .unwrap();
    let d = json!({"schema": POLICY_SCHEMA, "family": "mlp", "features": ["obs_0"], "actions": ["act_0"],
        "tensors": {"w1": [[2.0]], "b1": [-0.5], "w2": [[1.5]], "b2": [0.1], "ls": [0.5f64.ln()]},
        "layers": [{"weight": "w1", "bias": "b1", "activation": "tanh"}],
        "head": {"kind": "gaussian", "mean": {"weight": "w2", "bias": "b2"}, "log_sigma": "ls"}});
    let p = Policy::from_json(&d.to_string(), "p.json", &s).unwrap();
    assert_eq!(
        p.parameters,
        ["w1[0,0]", "b1[0]", "w2[0,0]", "b2[0]", "ls[0]"]
    );
    let got = p
        .network()
        .unwrap()
        .scores(array![[0.5]].view(), array![[1.0]].view())
        .unwrap();
    let (x, w2, a) = (0.5f64, 1.5, 1.0);
    let h = (2.0 * x - 0.5f64).tanh();
    let mu = w2 * h + 0.1;
    let g = (a - mu) / 0.25;
    let want = [
        g * w2 * (1.0 - h * h) * x,
        g * w2 * (1.0 - h * h),
        g * h,
        g,
        (a - mu).powi(2) / 0.25 - 1.0,
    ];
    let decimals = [0.48796942, 0.97593884, 0.38230816, 0.82729706, -0.82889490];
    for k in 0..5 {
        assert!((got[[0, k]] - want[k]).abs() < 1e-12, "{got} vs {want:?}");
        assert!(
            (got[[0, k]] - decimals[k]).abs() < 1e-8,
            "{got} vs {decimals:?}"
        );
    }
}

#[test]
fn a_value_network_is_the_trunk_forward_pass() {
    // V = w2 . elu(W1 x_n + b1) + b2 with x_n = (x - 1) / sqrt(3 + 1) = (x - 1) / 2.
    // For x = 5: x_n = 2, W1 x_n + b1 = [2 - 1, -2 * 2 + 1] = [1, -3], elu = [1, e^-3 - 1],
    // V = 2 * 1 + 0.5 * (e^-3 - 1) + 0.25 = 1.77489353.
    let headers = ["episode", "reward", "obs_0"];
    let s = Schema::resolve(
        &ColumnSpec::default(),
        headers.iter().map(|s| s.to_string()).collect(),
        "log.csv",
    )
    .unwrap();
    let d = json!({"schema": POLICY_SCHEMA, "family": "mlp_value", "features": ["obs_0"],
        "tensors": {"W1": [[1.0], [-2.0]], "b1": [-1.0, 1.0], "w2": [[2.0, 0.5]], "b2": [0.25],
                    "m": [1.0], "v": [4.0]},
        "normalize": {"mean": "m", "var": "v", "eps": 0.0},
        "layers": [{"weight": "W1", "bias": "b1", "activation": "elu"},
                   {"weight": "w2", "bias": "b2", "activation": "identity"}]});
    let v = spec::ValueNet::from_json(&d.to_string(), "v.json", &s).unwrap();
    let out = network::forward(&v.mlp, array![[5.0]].view());
    let want = 2.0 + 0.5 * ((-3.0f64).exp() - 1.0) + 0.25;
    assert!((out[[0, 0]] - want).abs() < 1e-14);
    assert!((want - 1.77489353).abs() < 1e-8);
    let mut bad = d.clone();
    bad["layers"][1]["activation"] = json!("tanh");
    let e = spec::ValueNet::from_json(&bad.to_string(), "v.json", &s).unwrap_err();
    assert!(e.to_string().contains("activation 'identity'"), "{e}");
}

/// Little-endian bytes of `values` as `dtype`.
pub fn encode(dtype: safetensors::Dtype, values: &[f64]) -> Vec<u8> {
    use safetensors::Dtype;
    values
        .iter()
        .flat_map(|&x| match dtype {
            Dtype::F64 => x.to_le_bytes().to_vec(),
            Dtype::F32 => (x as f32).to_le_bytes().to_vec(),
            Dtype::BF16 => half::bf16::from_f64(x).to_le_bytes().to_vec(),
            Dtype::F16 => half::f16::from_f64(x).to_le_bytes().to_vec(),
            Dtype::I64 => (x as i64).to_le_bytes().to_vec(),
            other => panic!("{other:?}"),
        })
        .collect()
}

/// Writes a safetensors file with the safetensors crate's own serializer.
/// One tensor to write: name, dtype, shape, values.
type Row<'a> = (&'a str, safetensors::Dtype, Vec<usize>, Vec<f64>);

pub fn write_safetensors(path: &std::path::Path, tensors: &[Row]) {
    let bytes: Vec<(String, Vec<usize>, safetensors::Dtype, Vec<u8>)> = tensors
        .iter()
        .map(|(n, d, s, v)| (n.to_string(), s.clone(), *d, encode(*d, v)))
        .collect();
    let views: Vec<(String, safetensors::tensor::TensorView)> = bytes
        .iter()
        .map(|(n, s, d, b)| {
            (
                n.clone(),
                safetensors::tensor::TensorView::new(*d, s.clone(), b).unwrap(),
            )
        })
        .collect();
    std::fs::write(path, safetensors::serialize(views, None).unwrap()).unwrap();
}

/// The tensors of `describe(.., "gaussian", true, ..)` as (name, shape, values); every value is
/// a multiple of 1/64 below 4 in size, exact in bf16 and f16 (8 significant bits suffice).
fn exact_tensors(seed: u64) -> Vec<(String, Vec<usize>, Vec<f64>)> {
    let d = describe("elu", "gaussian", true, seed);
    let mut out = Vec::new();
    for (name, v) in d["tensors"].as_object().unwrap() {
        let rows: Vec<Vec<f64>> = match v {
            Value::Array(a) if a.first().is_some_and(Value::is_array) => {
                serde_json::from_value(v.clone()).unwrap()
            }
            _ => vec![serde_json::from_value(v.clone()).unwrap()],
        };
        let shape = if v[0].is_array() {
            vec![rows.len(), rows[0].len()]
        } else {
            vec![rows[0].len()]
        };
        let vals = rows
            .iter()
            .flatten()
            .map(|x| (x * 64.0).round() / 64.0)
            .collect();
        out.push((name.clone(), shape, vals));
    }
    out
}

#[test]
fn safetensors_files_of_every_float_dtype_read_the_same() {
    use safetensors::Dtype;
    let dir = tempfile::tempdir().unwrap();
    let tensors = exact_tensors(21);
    let mut inline = describe("elu", "gaussian", true, 21);
    for (name, shape, vals) in &tensors {
        inline["tensors"][name] = if shape.len() == 2 {
            json!(vals.chunks(shape[1]).collect::<Vec<_>>())
        } else {
            json!(vals)
        };
    }
    let (obs, a) = data("gaussian");
    let want = network(&inline).scores(obs.view(), a.view()).unwrap();
    for dtype in [Dtype::F32, Dtype::F64, Dtype::BF16, Dtype::F16] {
        let file = format!("actor_{dtype:?}.safetensors");
        let rows: Vec<_> = tensors
            .iter()
            .map(|(n, s, v)| (n.as_str(), dtype, s.clone(), v.clone()))
            .collect();
        write_safetensors(&dir.path().join(&file), &rows);
        let mut d = describe("elu", "gaussian", true, 21);
        d.as_object_mut().unwrap().remove("tensors");
        d["weights"] = json!(file);
        // Relative to the description file's folder.
        let desc = dir.path().join("actor.json");
        std::fs::write(&desc, d.to_string()).unwrap();
        let p = Policy::load(desc.to_str().unwrap(), &schema()).unwrap();
        let got = p.network().unwrap().scores(obs.view(), a.view()).unwrap();
        assert_eq!(got, want, "{dtype:?}");
    }
}

#[test]
fn bad_weights_files_name_the_file_and_the_tensor() {
    use safetensors::Dtype;
    let dir = tempfile::tempdir().unwrap();
    let tensors = exact_tensors(4);
    let try_with = |edit: &dyn Fn(&mut Vec<Row>)| -> String {
        let mut rows: Vec<_> = tensors
            .iter()
            .map(|(n, s, v)| (n.as_str(), Dtype::F32, s.clone(), v.clone()))
            .collect();
        edit(&mut rows);
        write_safetensors(&dir.path().join("w.safetensors"), &rows);
        let mut d = describe("elu", "gaussian", true, 4);
        d.as_object_mut().unwrap().remove("tensors");
        d["weights"] = json!("w.safetensors");
        let desc = dir.path().join("a.json");
        std::fs::write(&desc, d.to_string()).unwrap();
        Policy::load(desc.to_str().unwrap(), &schema())
            .unwrap_err()
            .to_string()
    };
    let e = try_with(&|r| r.retain(|t| t.0 != "W2"));
    assert!(
        e.contains("w.safetensors") && e.contains("no tensor named 'W2' (the weight of layer 2)"),
        "{e}"
    );
    let e = try_with(&|r| {
        r.iter_mut().filter(|t| t.0 == "W2").for_each(|t| {
            t.2 = vec![4, 3];
            t.3.truncate(12);
        })
    });
    assert!(
        e.contains("tensor 'W2' (the weight of layer 2) has shape [4, 3], expected [out, 4]")
            && e.contains("it looks transposed"),
        "{e}"
    );
    let e = try_with(&|r| {
        r.iter_mut()
            .filter(|t| t.0 == "ls")
            .for_each(|t| t.1 = Dtype::I64)
    });
    assert!(
        e.contains("tensor 'ls' has dtype I64; gradaudit reads F32, F64, BF16 and F16"),
        "{e}"
    );
    let e = try_with(&|r| {
        r.iter_mut()
            .filter(|t| t.0 == "v")
            .for_each(|t| t.3[1] = -1.0)
    });
    assert!(e.contains("normalisation variance 'v' entry 1"), "{e}");
    std::fs::write(dir.path().join("w.safetensors"), b"not a safetensors file").unwrap();
    let desc = dir.path().join("a.json");
    let err = Policy::load(desc.to_str().unwrap(), &schema())
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("w.safetensors") && err.contains("not a readable safetensors file"),
        "{err}"
    );
    // A weights file that is not there is named with the description that names it.
    std::fs::remove_file(dir.path().join("w.safetensors")).unwrap();
    let err = Policy::load(desc.to_str().unwrap(), &schema())
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("a.json") && err.contains("cannot read the weights file"),
        "{err}"
    );
}

// Activation names are read in any case, so the frameworks' class names work as they are.
#[test]
fn activation_names_ignore_case() {
    use super::activation::Activation;
    for (name, want) in [
        ("Tanh", Activation::Tanh),
        ("ReLU", Activation::Relu),
        ("LeakyReLU", Activation::LeakyRelu { slope: 0.01 }),
        ("SiLU", Activation::Silu),
        ("Identity", Activation::Identity),
    ] {
        assert_eq!(Activation::parse(name, None, None), Ok(want), "{name}");
    }
    let e = Activation::parse("GELU", None, None).unwrap_err();
    assert!(e.contains("unknown activation 'GELU'"), "{e}");
}

#[test]
fn description_errors_are_clear() {
    let s = schema();
    let err = |d: &Value| {
        Policy::from_json(&d.to_string(), "n.json", &s)
            .unwrap_err()
            .to_string()
    };
    let base = describe("tanh", "gaussian", false, 1);
    let mut d = base.clone();
    d["layers"][0]["activation"] = json!("gelu");
    assert!(
        err(&d).contains("layer 1: unknown activation 'gelu'"),
        "{}",
        err(&d)
    );
    let mut d = base.clone();
    d["layers"][0]["alpha"] = json!(2.0);
    assert!(err(&d).contains("\"alpha\" is elu's parameter, not tanh's"));
    let mut d = base.clone();
    d["theta"] = json!(["Wm", "nope"]);
    assert!(
        err(&d).contains("\"theta\" lists 'nope', which is no tensor"),
        "{}",
        err(&d)
    );
    let mut d = describe("tanh", "gaussian", true, 1);
    d["theta"] = json!(["m"]);
    assert!(err(&d).contains("a normalisation statistic"), "{}", err(&d));
    let mut d = base.clone();
    d["layers"][1]["weight"] = json!("Wm");
    assert!(
        err(&d).contains("tensor 'Wm' (the weight of layer 2) has shape [2, 3], expected [out, 4]"),
        "{}",
        err(&d)
    );
    let mut d = base.clone();
    d["layers"][1]["weight"] = json!("W1");
    assert!(
        err(&d).contains("tensor 'W1' is named twice"),
        "{}",
        err(&d)
    );
    let mut d = base.clone();
    d["head"]["kind"] = json!("beta");
    assert!(
        err(&d).contains("n.json") && err(&d).contains("beta"),
        "{}",
        err(&d)
    );
    let mut d = base.clone();
    d["head"]["mean"]["weight"] = json!("Wl");
    assert!(
        err(&d).contains(
            "tensor 'Wl' (the weight of the mean layer) has shape [3, 3], expected [2, 3]"
        ),
        "{}",
        err(&d)
    );
    let mut d = base.clone();
    d["head"]["log_sigma"] = json!({"wieght": "Ws"});
    assert!(
        err(&d).contains("\"log_sigma\" is a tensor name or a layer") && err(&d).contains("wieght"),
        "{}",
        err(&d)
    );
    let mut d = base;
    d["tensors"]["Wx"] = json!([[1.0, 2.0], [3.0]]);
    d["layers"][0]["weight"] = json!("Wx");
    assert!(
        err(&d).contains("inline tensor 'Wx': row 1 has 1 entries"),
        "{}",
        err(&d)
    );
}

#[test]
fn squashed_actions_outside_the_open_interval_name_the_step_and_column() {
    let p = Policy::from_json(
        &describe("relu", "tanh_gaussian", false, 2).to_string(),
        "n.json",
        &schema(),
    )
    .unwrap();
    let (obs, mut a) = data("tanh_gaussian");
    a[[2, 1]] = 1.0;
    let e = p
        .network()
        .unwrap()
        .scores(obs.view(), a.view())
        .unwrap_err();
    assert_eq!((e.step, e.column), (2, Some(StepColumn::Act(1))));
    assert!(e.message.contains("outside (-1, 1)"), "{}", e.message);
    let mut ep = episode(&obs, &a);
    let msg = p
        .score_episode(&mut ep, "log.csv", 2)
        .unwrap_err()
        .to_string();
    // Step 2's row is line 4; act_1 is header column 7.
    assert!(
        msg.starts_with("log.csv, line 4, column 7 ('act_1'): episode 'e', step 2"),
        "{msg}"
    );
}

#[test]
fn linear_policy_errors_name_the_rows_own_line_and_column() {
    let d = json!({"schema": POLICY_SCHEMA, "family": "softmax_linear", "features": ["obs_0"], "action": "act_1",
                   "theta": [[1.0], [0.0]]});
    let p = Policy::from_json(&d.to_string(), "p.json", &schema()).unwrap();
    let obs = array![[0.1, 0.0, 0.0], [0.2, 0.0, 0.0], [0.3, 0.0, 0.0]];
    let act = array![[0.0, 1.0], [0.0, 0.0], [0.0, 5.0]];
    let mut ep = episode(&obs, &act);
    let msg = p
        .score_episode(&mut ep, "log.csv", 2)
        .unwrap_err()
        .to_string();
    assert!(
        msg.starts_with("log.csv, line 4, column 7 ('act_1'): episode 'e', step 2: action 5"),
        "{msg}"
    );
}

#[test]
fn the_network_fuzz_seeds_are_valid_policies() {
    // The fuzz target's header (see fuzzing.rs): four obs and two act columns.
    let headers = [
        "episode", "reward", "obs_0", "obs_1", "obs_2", "obs_3", "act_0", "act_1",
    ];
    let s = Schema::resolve(
        &ColumnSpec::default(),
        headers.iter().map(|s| s.to_string()).collect(),
        "fuzz.csv",
    )
    .unwrap();
    for (name, dim) in [("mlp", 2 * 3 + 2 + 4 + 2 + 2), ("mlp_categorical", 2 + 6)] {
        let path = format!(
            "{}/fuzz/seeds/policy/{name}.json",
            env!("CARGO_MANIFEST_DIR")
        );
        assert_eq!(Policy::load(&path, &s).unwrap().dim(), dim, "{name}");
    }
}

// bfloat16 keeps float32's sign and 8 exponent bits and 7 mantissa bits: 0x3DCD is 0.1
// rounded to nearest, the float32 bit pattern 0x3DCD0000 = 0.10009765625. IEEE 754 binary16:
// 0x2E66 has exponent 11 - 15 = -4 and mantissa 1 + 614/1024, so 1.599609375 / 16 =
// 0.0999755859375. Both little-endian, as the safetensors format stores them.
#[test]
fn half_precision_bytes_convert_to_their_exact_values() {
    use safetensors::Dtype;
    let bf = weights::convert(Dtype::BF16, &[0xCD, 0x3D, 0x80, 0xBF]).unwrap();
    assert_eq!(bf, [0.10009765625, -1.0]);
    let f16 = weights::convert(Dtype::F16, &[0x66, 0x2E, 0x00, 0x3C]).unwrap();
    assert_eq!(f16, [0.0999755859375, 1.0]);
    let f32 = weights::convert(Dtype::F32, &0.1f32.to_le_bytes()).unwrap();
    assert_eq!(f32, [f64::from(0.1f32)]);
    assert!(weights::convert(Dtype::I32, &[0, 0, 0, 0]).is_none());
}
