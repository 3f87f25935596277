//! What `inspect --policy` shows of a policy: its family, the columns it reads, and for a
//! network every layer (shape, activation, parameter count, whether it is in theta) and the
//! input normalisation.

use super::{Model, Policy};
use serde::Serialize;

/// One tensor of a network as `inspect` lists it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TensorSummary {
    pub name: String,
    pub shape: Vec<usize>,
    pub params: usize,
    pub in_theta: bool,
}

/// A dense layer: where it sits, its activation and its tensors.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LayerSummary {
    /// "layer 1", ..., or the head's "mean", "log sigma", "logits", "logit".
    pub role: String,
    pub inputs: usize,
    pub outputs: usize,
    pub activation: String,
    pub tensors: Vec<TensorSummary>,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct NormSummary {
    pub mean: String,
    pub var: String,
    pub eps: f64,
    pub clip: Option<f64>,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PolicySummary {
    pub family: String,
    /// For a network: the head kind (gaussian, tanh_gaussian, categorical, bernoulli).
    pub head: Option<String>,
    pub features: Vec<String>,
    pub actions: Vec<String>,
    /// Gradient dimension (the number of parameters in theta).
    pub dim: usize,
    /// All parameters of the network, in theta or not.
    pub total_params: usize,
    pub normalisation: Option<NormSummary>,
    pub layers: Vec<LayerSummary>,
    /// A state-independent log sigma tensor.
    pub log_sigma: Option<TensorSummary>,
    /// The theta groups in flattening order.
    pub theta: Vec<String>,
}

impl Policy {
    pub fn summary(&self) -> PolicySummary {
        let names = |c: &[(usize, String)]| c.iter().map(|x| x.1.clone()).collect();
        let mut s = PolicySummary {
            family: String::new(),
            head: None,
            features: names(&self.feature_cols),
            actions: names(&self.action_cols),
            dim: self.dim(),
            total_params: self.dim(),
            normalisation: None,
            layers: Vec::new(),
            log_sigma: None,
            theta: Vec::new(),
        };
        match &self.model {
            Model::Linear(f) => {
                s.family = match f {
                    super::Family::Gaussian { .. } => "gaussian_linear",
                    super::Family::Softmax { .. } => "softmax_linear",
                    super::Family::Bernoulli { .. } => "bernoulli_logistic",
                }
                .into();
            }
            Model::Network(n) => network(n, &mut s),
        }
        s
    }
}

fn network(n: &super::Network, s: &mut PolicySummary) {
    let params = &n.mlp.params;
    let tensor = |p: usize| TensorSummary {
        name: params[p].name.clone(),
        shape: params[p].shape.clone(),
        params: params[p].value.len(),
        in_theta: n.theta_params.contains(&p),
    };
    let layer = |role: String, d: &super::network::Dense| LayerSummary {
        role,
        inputs: d.n_in,
        outputs: d.n_out,
        activation: d.activation.name(),
        tensors: [Some(d.weight), d.bias]
            .into_iter()
            .flatten()
            .map(tensor)
            .collect(),
    };
    s.family = "mlp".into();
    s.head = Some(n.head.kind().into());
    s.total_params = params.iter().map(|p| p.value.len()).sum();
    s.normalisation = n.mlp.norm.as_ref().map(|m| NormSummary {
        mean: m.names.0.clone(),
        var: m.names.1.clone(),
        eps: m.eps,
        clip: m.clip,
    });
    for (i, d) in n.mlp.layers.iter().enumerate() {
        s.layers.push(layer(format!("layer {}", i + 1), d));
    }
    let roles: &[&str] = match &n.head {
        super::heads::Head::Gaussian { .. } => &["mean", "log sigma"],
        super::heads::Head::Categorical { .. } => &["logits"],
        super::heads::Head::Bernoulli { .. } => &["logit"],
    };
    for (d, role) in n.head.layers().into_iter().zip(roles) {
        s.layers.push(layer(role.to_string(), d));
    }
    if let super::heads::Head::Gaussian {
        sigma: super::heads::Sigma::Param(p),
        ..
    } = &n.head
    {
        s.log_sigma = Some(tensor(*p));
    }
    s.theta = n.theta.iter().map(|g| g.name.clone()).collect();
}

impl PolicySummary {
    /// The plain-text block `inspect` prints under the log's summary.
    pub fn render_text(&self) -> String {
        let mut out = format!("\npolicy: {}", self.family);
        if let Some(h) = &self.head {
            out.push_str(&format!(", {h} head"));
        }
        out.push_str(&format!(
            "\n  features: {}\n  actions: {}\n",
            self.features.join(", "),
            self.actions.join(", ")
        ));
        if let Some(n) = &self.normalisation {
            let clip = n.clip.map_or("none".to_string(), |c| format!("+-{c}"));
            out.push_str(&format!(
                "  normalisation: (x - {}) / sqrt({} + {:e}), clip {clip}\n",
                n.mean, n.var, n.eps
            ));
        }
        for l in &self.layers {
            out.push_str(&format!(
                "  {:<10} {:>5} -> {:<5} {:<16}",
                l.role, l.inputs, l.outputs, l.activation
            ));
            let ts: Vec<String> = l.tensors.iter().map(tensor_text).collect();
            out.push_str(&ts.join("  "));
            out.push('\n');
        }
        if let Some(t) = &self.log_sigma {
            out.push_str(&format!(
                "  {:<10} {:>33}{}\n",
                "log sigma",
                "",
                tensor_text(t)
            ));
        }
        out.push_str(&format!(
            "  parameters: {} in all, {} in theta{}\n",
            self.total_params,
            self.dim,
            if self.theta.is_empty() {
                String::new()
            } else {
                format!(" ({})", self.theta.join(", "))
            }
        ));
        out
    }
}

fn tensor_text(t: &TensorSummary) -> String {
    format!(
        "{} {:?} {}{}",
        t.name,
        t.shape,
        t.params,
        if t.in_theta { " theta" } else { "" }
    )
}
