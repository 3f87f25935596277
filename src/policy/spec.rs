//! The MLP description (`family: "mlp"` for an actor, `"mlp_value"` for a critic) and its
//! validation into a `Network` / `Mlp`: every tensor is named explicitly, looked up in the
//! safetensors file or the inline `tensors`, and checked against the shape its place needs
//! (dense weights `[out, in]`, biases `[out]`, log sigma `[m]` or `[1, m]`, statistics
//! `[n_obs]`).
//!
//! theta is every parameter tensor by default, or the tensors listed in `theta`; either way
//! in network order (trunk layers first to last, weight before bias, then the head: mean,
//! log sigma; or the logits), whatever order the list gives.

use super::activation::{Activation, NAMES};
use super::description::Ctx;
use super::heads::{Head, Sigma};
use super::network::{Dense, Mlp, Network, Normalizer, Param};
use super::weights::{Inline, Tensors, Want};
use super::{Built, Model};
use crate::error::Result;
use ndarray::Array1;
use serde::Deserialize;
use std::collections::BTreeMap;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct Wire {
    #[allow(dead_code)]
    schema: String,
    #[allow(dead_code)]
    family: String,
    #[serde(default)]
    #[allow(dead_code)]
    note: Option<String>,
    features: Vec<String>,
    #[serde(default)]
    actions: Option<Vec<String>>,
    #[serde(default)]
    action: Option<String>,
    #[serde(default)]
    weights: Option<String>,
    #[serde(default)]
    tensors: BTreeMap<String, Inline>,
    #[serde(default)]
    normalize: Option<NormWire>,
    #[serde(default)]
    layers: Vec<LayerWire>,
    #[serde(default)]
    head: Option<HeadWire>,
    #[serde(default)]
    theta: Option<Vec<String>>,
    /// Actuator limits [low, high] per action (read by clipping.rs).
    #[serde(default)]
    #[allow(dead_code)]
    action_bounds: Option<Vec<[f64; 2]>>,
}

fn default_eps() -> f64 {
    1e-8
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct NormWire {
    #[serde(default)]
    mean: Option<String>,
    #[serde(default)]
    var: Option<String>,
    #[serde(default = "default_eps")]
    eps: f64,
    #[serde(default)]
    clip: Option<f64>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct LayerWire {
    /// Required, like `activation`; both optional here so that a missing one is named with
    /// its layer (serde's own message gives only a position).
    #[serde(default)]
    weight: Option<String>,
    #[serde(default)]
    bias: Option<String>,
    #[serde(default)]
    activation: Option<String>,
    #[serde(default)]
    alpha: Option<f64>,
    #[serde(default)]
    negative_slope: Option<f64>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct DenseWire {
    /// Required; optional here so that a missing one is named with its layer.
    #[serde(default)]
    weight: Option<String>,
    #[serde(default)]
    bias: Option<String>,
    /// Only for a log sigma layer: clip its output to [lo, hi].
    #[serde(default)]
    clip: Option<[f64; 2]>,
}

/// A Gaussian head's log sigma: a tensor name, or a layer object. Kept as JSON until the
/// head is built, so that a bad layer object gets serde's own message (an untagged enum's
/// would only say that no variant matched).
type SigmaWire = serde_json::Value;

#[derive(Debug, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
enum HeadWire {
    Gaussian {
        mean: DenseWire,
        log_sigma: SigmaWire,
    },
    TanhGaussian {
        mean: DenseWire,
        log_sigma: SigmaWire,
    },
    Categorical {
        logits: DenseWire,
    },
    Bernoulli {
        logit: DenseWire,
    },
}

/// Collects the parameter tensors in network order.
struct Builder<'a> {
    ctx: Ctx<'a>,
    tensors: Tensors,
    params: Vec<Param>,
    /// Names of the normalisation statistics (not parameters).
    stats: Vec<String>,
}

impl Builder<'_> {
    fn add(&mut self, name: &str, want: Want, role: &str) -> Result<usize> {
        if self.params.iter().any(|p| p.name == name) || self.stats.iter().any(|s| s == name) {
            return Err(self.ctx.bad(format!(
                "tensor '{name}' is named twice; each place in the network needs its own tensor"
            )));
        }
        let p = self.tensors.get(name, want, role)?;
        self.params.push(p);
        Ok(self.params.len() - 1)
    }

    /// A dense layer reading `n_in` inputs; `n_out` fixes its output count when known.
    fn dense(
        &mut self,
        w: &str,
        b: Option<&str>,
        n_in: usize,
        n_out: Option<usize>,
        activation: Activation,
        role: &str,
    ) -> Result<Dense> {
        let want = Want::Matrix {
            rows: n_out,
            cols: n_in,
        };
        let weight = self.add(w, want, &format!("the weight of {role}"))?;
        let n_out = self.params[weight].value.nrows();
        let bias = match b {
            Some(b) => Some(self.add(b, Want::Vector(n_out), &format!("the bias of {role}"))?),
            None => None,
        };
        Ok(Dense {
            weight,
            bias,
            activation,
            n_in,
            n_out,
        })
    }

    fn normalizer(&mut self, n: &NormWire, n_in: usize) -> Result<Normalizer> {
        if !(n.eps.is_finite() && n.eps >= 0.0) {
            return Err(self
                .ctx
                .bad("\"normalize\": \"eps\" must be finite and at least 0"));
        }
        if n.clip.is_some_and(|c| !(c.is_finite() && c > 0.0)) {
            return Err(self
                .ctx
                .bad("\"normalize\": \"clip\" must be finite and positive"));
        }
        let missing = |field: &str, what: &str| {
            self.ctx.bad(format!(
                "\"normalize\" has no \"{field}\" (the tensor name of the {what}, [n_obs])"
            ))
        };
        let mean_name = n
            .mean
            .as_deref()
            .ok_or_else(|| missing("mean", "running mean"))?;
        let var_name = n
            .var
            .as_deref()
            .ok_or_else(|| missing("var", "running variance"))?;
        let mean = self
            .tensors
            .get(mean_name, Want::Vector(n_in), "the normalisation mean")?;
        let var = self
            .tensors
            .get(var_name, Want::Vector(n_in), "the normalisation variance")?;
        if let Some(k) = var
            .value
            .iter()
            .position(|&v| (v + n.eps).partial_cmp(&0.0) != Some(std::cmp::Ordering::Greater))
        {
            return Err(self.ctx.bad(format!(
                "normalisation variance '{var_name}' entry {k} is {}: var + eps must be positive",
                var.value[[0, k]]
            )));
        }
        let names = (mean_name.to_string(), var_name.to_string());
        self.stats = vec![names.0.clone(), names.1.clone()];
        Ok(Normalizer {
            mean: mean.value.row(0).to_owned(),
            inv_std: var.value.row(0).mapv(|v| 1.0 / (v + n.eps).sqrt()),
            eps: n.eps,
            clip: n.clip,
            names,
        })
    }

    fn trunk(&mut self, w: &Wire, n_in: usize) -> Result<(Option<Normalizer>, Vec<Dense>)> {
        let norm = match &w.normalize {
            Some(n) => Some(self.normalizer(n, n_in)?),
            None => None,
        };
        let mut layers = Vec::new();
        let mut width = n_in;
        for (i, l) in w.layers.iter().enumerate() {
            let role = format!("layer {}", i + 1);
            let (weight, activation) = required_layer_fields(&self.ctx, l, i, w.layers.len())?;
            let act = Activation::parse(activation, l.alpha, l.negative_slope)
                .map_err(|e| self.ctx.bad(format!("{role}: {e}")))?;
            let d = self.dense(weight, l.bias.as_deref(), width, None, act, &role)?;
            width = d.n_out;
            layers.push(d);
        }
        Ok((norm, layers))
    }
}

/// A trunk layer's `weight` and `activation`, or an error naming the file, the layer (its
/// index, and its tensor names when it has some) and the missing field.
fn required_layer_fields<'l>(
    ctx: &Ctx,
    l: &'l LayerWire,
    i: usize,
    n: usize,
) -> Result<(&'l str, &'l str)> {
    let named = match (&l.weight, &l.bias) {
        (Some(w), _) => format!(" (\"weight\": \"{w}\")"),
        (None, Some(b)) => format!(" (\"bias\": \"{b}\")"),
        (None, None) => String::new(),
    };
    let layer = format!("\"layers\" entry {} of {n}{named}", i + 1);
    let weight = l.weight.as_deref().ok_or_else(|| {
        ctx.bad(format!(
            "{layer} has no \"weight\" (the name of its [out, in] weight tensor)"
        ))
    })?;
    let activation = l.activation.as_deref().ok_or_else(|| {
        ctx.bad(format!(
            "{layer} has no \"activation\"; every layer names one of: {NAMES} (\"identity\" \
             for a layer without one)"
        ))
    })?;
    Ok((weight, activation))
}

/// A head layer's `weight`, or an error naming the layer.
fn required_weight<'d>(b: &Builder, d: &'d DenseWire, role: &str) -> Result<&'d str> {
    d.weight.as_deref().ok_or_else(|| {
        let named = d
            .bias
            .as_ref()
            .map_or(String::new(), |b| format!(" (\"bias\": \"{b}\")"));
        b.ctx.bad(format!(
            "{role} of the head{named} has no \"weight\" (the name of its [out, in] weight tensor)"
        ))
    })
}

/// The trunk's output width.
fn width(layers: &[Dense], n_in: usize) -> usize {
    layers.last().map_or(n_in, |l| l.n_out)
}

fn head_dense(
    b: &mut Builder,
    d: &DenseWire,
    n_in: usize,
    n_out: Option<usize>,
    role: &str,
) -> Result<Dense> {
    if d.clip.is_some() {
        return Err(b.ctx.bad(format!(
            "{role}: \"clip\" applies only to a log sigma layer"
        )));
    }
    let weight = required_weight(b, d, role)?;
    b.dense(
        weight,
        d.bias.as_deref(),
        n_in,
        n_out,
        Activation::Identity,
        role,
    )
}

fn gaussian_head(
    b: &mut Builder,
    mean: &DenseWire,
    sigma: &SigmaWire,
    squash: bool,
    h: usize,
    m: usize,
) -> Result<Head> {
    let mean = head_dense(b, mean, h, Some(m), "the mean layer")?;
    let sigma = match sigma {
        serde_json::Value::String(name) => {
            Sigma::Param(b.add(name, Want::Vector(m), "log sigma")?)
        }
        other => {
            let d: DenseWire = serde_json::from_value(other.clone()).map_err(|e| {
                b.ctx.bad(format!(
                    "\"log_sigma\" is a tensor name or a layer {{\"weight\", \"bias\", \"clip\"}}: {e}"
                ))
            })?;
            sigma_layer(b, &d, h, m)?
        }
    };
    Ok(Head::Gaussian {
        mean,
        sigma,
        squash,
    })
}

/// A log-sigma output layer, clipped to [lo, hi] when `clip` is given.
fn sigma_layer(b: &mut Builder, d: &DenseWire, h: usize, m: usize) -> Result<Sigma> {
    let clip = match d.clip {
        Some([lo, hi]) if lo.is_finite() && hi.is_finite() && lo < hi => Some((lo, hi)),
        Some(_) => {
            return Err(b
                .ctx
                .bad("the log sigma layer's \"clip\" must be [lo, hi], finite, lo < hi"));
        }
        None => None,
    };
    let role = "the log sigma layer";
    let bias = d.bias.as_deref();
    let weight = required_weight(b, d, role)?;
    let layer = b.dense(weight, bias, h, Some(m), Activation::Identity, role)?;
    Ok(Sigma::Layer { layer, clip })
}

/// The head and the action columns it reads.
fn head(b: &mut Builder, w: &Wire, hw: &HeadWire, h: usize) -> Result<(Head, Vec<usize>)> {
    let ctx = b.ctx;
    let one = |kind: &str| -> Result<Vec<usize>> {
        let a = w
            .action
            .clone()
            .ok_or_else(|| ctx.bad(format!("a {kind} head needs \"action\" (one column)")))?;
        if w.actions.is_some() {
            return Err(ctx.bad(format!(
                "a {kind} head reads one \"action\", not \"actions\""
            )));
        }
        ctx.act(&[a])
    };
    let many = |kind: &str| -> Result<Vec<usize>> {
        let a = w.actions.clone().ok_or_else(|| {
            ctx.bad(format!(
                "a {kind} head needs \"actions\" (a list of columns)"
            ))
        })?;
        if w.action.is_some() || a.is_empty() {
            return Err(ctx.bad(format!(
                "a {kind} head reads a non-empty \"actions\" list, not \"action\""
            )));
        }
        ctx.act(&a)
    };
    Ok(match hw {
        HeadWire::Gaussian { mean, log_sigma } | HeadWire::TanhGaussian { mean, log_sigma } => {
            let squash = matches!(hw, HeadWire::TanhGaussian { .. });
            let acts = many(if squash { "tanh_gaussian" } else { "gaussian" })?;
            (
                gaussian_head(b, mean, log_sigma, squash, h, acts.len())?,
                acts,
            )
        }
        HeadWire::Categorical { logits } => {
            let acts = one("categorical")?;
            let logits = head_dense(b, logits, h, None, "the logits layer")?;
            if logits.n_out < 2 {
                return Err(
                    ctx.bad("a categorical head needs at least 2 logits (rows of its weight)")
                );
            }
            (Head::Categorical { logits }, acts)
        }
        HeadWire::Bernoulli { logit } => {
            let acts = one("bernoulli")?;
            (
                Head::Bernoulli {
                    logit: head_dense(b, logit, h, Some(1), "the logit layer")?,
                },
                acts,
            )
        }
    })
}

/// Parameter indices forming theta: all, or those `listed`, in network order.
fn select_theta(b: &Builder, listed: Option<&[String]>) -> Result<Vec<usize>> {
    let Some(listed) = listed else {
        return Ok((0..b.params.len()).collect());
    };
    if listed.is_empty() {
        return Err(b
            .ctx
            .bad("\"theta\" is empty; leave it out to use every parameter"));
    }
    for (i, name) in listed.iter().enumerate() {
        if listed[..i].contains(name) {
            return Err(b.ctx.bad(format!("\"theta\" lists '{name}' twice")));
        }
        if b.stats.contains(name) {
            return Err(b.ctx.bad(format!(
                "\"theta\" lists '{name}', a normalisation statistic, not a parameter"
            )));
        }
        if !b.params.iter().any(|p| &p.name == name) {
            let known: Vec<&str> = b.params.iter().map(|p| p.name.as_str()).collect();
            return Err(b.ctx.bad(format!(
                "\"theta\" lists '{name}', which is no tensor of the network (its parameters: {})",
                known.join(", ")
            )));
        }
    }
    Ok((0..b.params.len())
        .filter(|&p| listed.contains(&b.params[p].name))
        .collect())
}

/// Component names of a tensor, row-major: `name[i,j]` (2-D) or `name[k]` (1-D).
pub fn component_names(name: &str, shape: &[usize]) -> Vec<String> {
    match shape {
        [r, c] => (0..*r)
            .flat_map(|i| (0..*c).map(move |j| format!("{name}[{i},{j}]")))
            .collect(),
        _ => (0..shape.iter().product())
            .map(|k| format!("{name}[{k}]"))
            .collect(),
    }
}

fn start<'a>(ctx: Ctx<'a>, w: &Wire) -> Result<(Builder<'a>, Vec<usize>)> {
    if w.features.is_empty() {
        return Err(ctx.bad("the network has no features (list its obs columns in \"features\")"));
    }
    let features = ctx.obs(&w.features)?;
    let tensors = Tensors::open(ctx.file, w.weights.as_deref(), w.tensors.clone())?;
    Ok((
        Builder {
            ctx,
            tensors,
            params: Vec::new(),
            stats: Vec::new(),
        },
        features,
    ))
}

/// Parses the description strictly (serde's message keeps its line); when the error is one
/// of a `layers` entry's own (an unknown field, a wrong type), the entry is named too.
fn parse_wire(ctx: &Ctx, text: &str) -> Result<Wire> {
    ctx.parse(text).map_err(|mut err| {
        if let (Some(label), crate::error::Error::Input(e)) = (bad_layer(text), &mut err)
            && e.message.contains(&label.1)
        {
            e.message = e.message.replacen(
                "invalid policy file: ",
                &format!("invalid policy file: {}: ", label.0),
                1,
            );
        }
        err
    })
}

/// The first `layers` entry that does not read as a layer on its own, and serde's message
/// for it (without a position), when the file is JSON with a `layers` list.
fn bad_layer(text: &str) -> Option<(String, String)> {
    let v: serde_json::Value = serde_json::from_str(text).ok()?;
    let layers = v.get("layers")?.as_array()?;
    layers.iter().enumerate().find_map(|(i, l)| {
        serde_json::from_value::<LayerWire>(l.clone())
            .err()
            .map(|e| {
                let named = l
                    .get("weight")
                    .and_then(|w| w.as_str())
                    .map_or(String::new(), |w| format!(" (\"weight\": \"{w}\")"));
                let label = format!("\"layers\" entry {} of {}{named}", i + 1, layers.len());
                (label, e.to_string())
            })
    })
}

/// Parses an `mlp` actor description.
pub fn build(ctx: Ctx, text: &str) -> Result<Built> {
    let w = parse_wire(&ctx, text)?;
    let hw = w
        .head
        .as_ref()
        .ok_or_else(|| ctx.bad("an mlp policy needs a \"head\""))?;
    let (mut b, features) = start(ctx, &w)?;
    let n_in = features.len();
    let (norm, layers) = b.trunk(&w, n_in)?;
    let (head, actions) = head(&mut b, &w, hw, width(&layers, n_in))?;
    let theta = select_theta(&b, w.theta.as_deref())?;
    let parameters = theta
        .iter()
        .flat_map(|&p| component_names(&b.params[p].name, &b.params[p].shape))
        .collect();
    let mlp = Mlp {
        params: b.params,
        norm,
        layers,
        n_in,
    };
    Ok(Built {
        model: Model::Network(Box::new(Network::new(mlp, head, theta))),
        features,
        constant_feature: false,
        actions,
        parameters,
    })
}

/// A value network: an `mlp_value` description's trunk, whose last layer has one output.
#[derive(Debug, Clone, PartialEq)]
pub struct ValueNet {
    pub mlp: Mlp,
    /// Positions of its input columns within the episode's obs vector.
    pub features: Vec<usize>,
}

impl ValueNet {
    pub fn load(path: &str, schema: &crate::log::Schema) -> Result<ValueNet> {
        let text = std::fs::read_to_string(path).map_err(|e| crate::error::Error::io(path, e))?;
        ValueNet::from_json(&text, path, schema)
    }

    pub fn from_json(text: &str, file: &str, schema: &crate::log::Schema) -> Result<ValueNet> {
        let ctx = Ctx { file, schema };
        let family = ctx.family(text)?;
        if family != "mlp_value" {
            return Err(ctx.bad(format!(
                "a value network's family is 'mlp_value', not '{family}'"
            )));
        }
        let w = parse_wire(&ctx, text)?;
        if w.head.is_some() || w.theta.is_some() || w.actions.is_some() || w.action.is_some() {
            return Err(ctx.bad(
                "an mlp_value network has no head, theta or actions: its last layer is the value",
            ));
        }
        let (mut b, features) = start(ctx, &w)?;
        let (norm, layers) = b.trunk(&w, features.len())?;
        if width(&layers, features.len()) != 1
            || layers
                .last()
                .is_some_and(|l| l.activation != Activation::Identity)
        {
            return Err(ctx.bad(
                "an mlp_value network's last layer must have 1 output and activation 'identity'",
            ));
        }
        let n_in = features.len();
        Ok(ValueNet {
            mlp: Mlp {
                params: b.params,
                norm,
                layers,
                n_in,
            },
            features,
        })
    }

    /// V(s_t) of each step of an episode.
    pub fn values(&self, ep: &crate::episode::Episode) -> Array1<f64> {
        let obs = super::gather(&ep.obs, ep.obs_dim, &self.features);
        super::network::forward(&self.mlp, obs.view())
            .column(0)
            .to_owned()
    }

    /// V(s) at one observation vector `obs` (laid out as the log's obs columns).
    pub fn value_at(&self, obs: &[f64]) -> f64 {
        let x = super::gather(obs, obs.len(), &self.features);
        super::network::forward(&self.mlp, x.view())[(0, 0)]
    }
}
