//! MLP actors: forward and backward passes over an episode's T steps as matrix products.
//!
//! Trunk: x_0 = the listed obs columns, optionally normalised as trainers do it,
//! x_0 = clip((s - mean) / sqrt(var + eps), -c, c); then for each dense layer l,
//! z_l = x_{l-1} W_l^T + b_l (W_l stored [out, in], as the common frameworks save it) and
//! x_l = f_l(z_l). The head's own dense layers read x_L (see heads.rs).
//!
//! Backward (the chain rule, batched over steps): the head gives g = d log pi / d(head output)
//! per step; a dense layer with output gradient delta (T x out) and input x (T x in) has
//! d/dW = delta_t outer x_t at each step t, d/db = delta_t, and passes delta W (T x in) down;
//! an activation multiplies by f'(z) elementwise. Weight gradients are never materialised per
//! step: they are returned factored (`GroupGrad::Outer`), and `scores` flattens them only when
//! asked. Backpropagation stops below the lowest layer that holds a theta parameter.
//! Normalisation statistics are not parameters (trainers update them by running averages, not
//! by gradient), so they never enter theta.

use super::activation::Activation;
use super::heads::Head;
use ndarray::{Array1, Array2, ArrayView2, Axis, s};

/// Per-step gradient of log pi with respect to one parameter tensor, in factored form.
#[derive(Debug, Clone, PartialEq)]
pub enum GroupGrad {
    /// A dense weight [out, in]: the step-t gradient is delta_t (out) outer x_t (in), flattened
    /// row-major (index o * in + i), matching the tensor's [out, in] layout.
    Outer {
        delta: Array2<f64>, /* T x out */
        input: Array2<f64>, /* T x in */
    },
    /// Any other tensor (bias, log sigma, ...): the T x n per-step gradient itself.
    Full(Array2<f64>),
}

/// One tensor of theta: its name (as in the weights file), shape and element count.
#[derive(Debug, Clone, PartialEq)]
pub struct ThetaGroup {
    pub name: String,
    pub shape: Vec<usize>,
    pub size: usize,
}

/// Which column of the step's inputs a `StepError` is about: a position in the description's
/// `features` or `actions` list.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum StepColumn {
    Obs(usize),
    Act(usize),
}

/// A step at which the policy cannot score the logged action.
#[derive(Debug, Clone, PartialEq)]
pub struct StepError {
    /// Step index within the episode (0-based).
    pub step: usize,
    pub column: Option<StepColumn>,
    pub message: String,
}

/// A named tensor of the network, held as a matrix (a 1-D tensor of n as 1 x n).
#[derive(Debug, Clone, PartialEq)]
pub struct Param {
    pub name: String,
    pub shape: Vec<usize>,
    pub value: Array2<f64>,
}

/// A dense layer: indices of its weight `[out, in]` and bias `[out]` in the parameter list.
#[derive(Debug, Clone, PartialEq)]
pub struct Dense {
    pub weight: usize,
    pub bias: Option<usize>,
    pub activation: Activation,
    pub n_in: usize,
    pub n_out: usize,
}

/// Input normalisation x = clip((s - mean) / sqrt(var + eps), -clip, clip).
#[derive(Debug, Clone, PartialEq)]
pub struct Normalizer {
    pub mean: Array1<f64>,
    /// 1 / sqrt(var + eps)
    pub inv_std: Array1<f64>,
    pub eps: f64,
    pub clip: Option<f64>,
    /// Tensor names of the mean and the variance, for `inspect`.
    pub names: (String, String),
}

/// A trunk: normalisation and dense layers, with the tensors they read. A value network is an
/// `Mlp` whose last layer has one output and the identity activation.
#[derive(Debug, Clone, PartialEq)]
pub struct Mlp {
    pub params: Vec<Param>,
    pub norm: Option<Normalizer>,
    pub layers: Vec<Dense>,
    pub n_in: usize,
}

/// The trunk's intermediate values over T steps: `inputs[l]` is the input of layer l (so
/// `inputs[0]` is the normalised obs and `inputs[L]` the trunk output), `slopes[l]` the
/// activation's derivative f'(z_l) (None for the identity, or when not asked for).
pub(crate) struct Pass {
    pub inputs: Vec<Array2<f64>>,
    pub slopes: Vec<Option<Array2<f64>>>,
}

impl Dense {
    /// z = x W^T + b.
    pub fn affine(&self, params: &[Param], x: &ArrayView2<f64>) -> Array2<f64> {
        let mut z = x.dot(&params[self.weight].value.t());
        if let Some(b) = self.bias {
            z += &params[b].value.row(0);
        }
        z
    }
}

impl Normalizer {
    pub fn apply(&self, obs: ArrayView2<f64>) -> Array2<f64> {
        let mut x = obs.to_owned();
        x -= &self.mean;
        x *= &self.inv_std;
        if let Some(c) = self.clip {
            x.mapv_inplace(|v| v.clamp(-c, c));
        }
        x
    }
}

impl Mlp {
    /// The number of parameters of the trunk's layers.
    pub fn layer_params(&self) -> usize {
        self.layers
            .iter()
            .flat_map(|l| [Some(l.weight), l.bias])
            .flatten()
            .map(|p| self.params[p].value.len())
            .sum()
    }

    /// The forward pass; `slopes` keeps f'(z) of every layer for a backward pass.
    pub(crate) fn pass(&self, obs: ArrayView2<f64>, slopes: bool) -> Pass {
        let x0 = match &self.norm {
            Some(n) => n.apply(obs),
            None => obs.to_owned(),
        };
        let mut pass = Pass {
            inputs: vec![x0],
            slopes: Vec::with_capacity(self.layers.len()),
        };
        for layer in &self.layers {
            let mut z = layer.affine(&self.params, &pass.inputs.last().expect("x_0").view());
            pass.slopes
                .push(layer.activation.forward_in_place(&mut z, slopes));
            pass.inputs.push(z);
        }
        pass
    }
}

/// A plain MLP forward pass, usable for a value network: T x n_in -> T x n_out (the last
/// layer's output after its activation; normalisation, when the description has it, is
/// applied here, so pass the raw obs columns).
///
/// For a critic: write an `"family": "mlp_value"` description (the actor's fields `features`,
/// `normalize`, `layers`, `weights` / `tensors`; no head, theta or actions; its last layer has
/// one output and activation `identity`), load it with
/// `policy::spec::ValueNet::load(path, reader.schema())`, and either call
/// `value_net.values(&episode)` (V(s_t) for each step, an Array1) or
/// `forward(&value_net.mlp, policy::gather(&ep.obs, ep.obs_dim, &value_net.features).view())`
/// and read column 0.
pub fn forward(mlp: &Mlp, obs: ArrayView2<f64>) -> Array2<f64> {
    mlp.pass(obs, false)
        .inputs
        .pop()
        .expect("x_0 is always present")
}

/// An MLP actor: trunk, head and the selection of tensors that forms theta.
#[derive(Debug, Clone, PartialEq)]
pub struct Network {
    pub mlp: Mlp,
    pub head: Head,
    pub(crate) theta: Vec<ThetaGroup>,
    /// The parameter index of each theta group.
    pub(crate) theta_params: Vec<usize>,
    dim: usize,
}

impl Network {
    pub fn new(mlp: Mlp, head: Head, theta_params: Vec<usize>) -> Network {
        let theta: Vec<ThetaGroup> = theta_params
            .iter()
            .map(|&p| ThetaGroup {
                name: mlp.params[p].name.clone(),
                shape: mlp.params[p].shape.clone(),
                size: mlp.params[p].value.len(),
            })
            .collect();
        let dim = theta.iter().map(|g| g.size).sum();
        Network {
            mlp,
            head,
            theta,
            theta_params,
            dim,
        }
    }

    /// The parameter groups that form theta, in theta order (flattening order of the score).
    pub fn theta_groups(&self) -> &[ThetaGroup] {
        &self.theta
    }

    /// Sum of theta group sizes.
    pub fn dim(&self) -> usize {
        self.dim
    }

    /// Number of action columns the head reads.
    pub fn n_act(&self) -> usize {
        self.head.n_act()
    }

    /// log pi(a_t | s_t) of each step (for checks; the squashed head includes its Jacobian).
    pub fn log_density(
        &self,
        obs: ArrayView2<f64>,
        act: ArrayView2<f64>,
    ) -> Result<Array1<f64>, StepError> {
        let pass = self.mlp.pass(obs, false);
        let h = pass.inputs.last().expect("x_0");
        self.head.log_density(&self.mlp.params, h, act)
    }

    /// Forward and backward over one episode's T steps: obs is T x n_obs (the raw logged obs
    /// columns the description lists, in order), act is T x n_act. Returns one GroupGrad per
    /// theta group, in theta order. Err names the step index and the action/obs column at
    /// fault.
    pub fn score_factors(
        &self,
        obs: ArrayView2<f64>,
        act: ArrayView2<f64>,
    ) -> Result<Vec<GroupGrad>, StepError> {
        let params = &self.mlp.params;
        let mut pass = self.mlp.pass(obs, true);
        let n_layers = self.mlp.layers.len();
        let head = self.head.backward(params, &pass.inputs[n_layers], act)?;
        let mut grads: Vec<Option<GroupGrad>> = vec![None; params.len()];
        let wanted = |p: usize| self.theta_params.contains(&p);
        let lowest = self
            .mlp
            .layers
            .iter()
            .position(|l| wanted(l.weight) || l.bias.is_some_and(wanted));
        // d log pi / d x_L, needed only when a trunk layer is in theta.
        let mut g: Option<Array2<f64>> = None;
        let n_head = head.layers.len();
        for (i, (layer, delta)) in head.layers.into_iter().enumerate() {
            if lowest.is_some() {
                let down = delta.dot(&params[layer.weight].value);
                g = Some(match g {
                    Some(acc) => acc + down,
                    None => down,
                });
            }
            if i + 1 == n_head && self.theta_params.contains(&layer.weight) {
                // The trunk's backward pass needs only the slopes: x_L can move.
                let x = std::mem::take(&mut pass.inputs[n_layers]);
                self.take_dense_owned(layer, delta, x, &mut grads);
            } else {
                self.take_dense(layer, delta, &pass.inputs[n_layers], &mut grads);
            }
        }
        if let Some((p, full)) = head.param {
            grads[p] = Some(GroupGrad::Full(full));
        }
        if let (Some(lowest), Some(mut g)) = (lowest, g) {
            for l in (lowest..n_layers).rev() {
                let layer = &self.mlp.layers[l];
                if let Some(d) = &pass.slopes[l] {
                    g *= d;
                }
                let next = (l > lowest).then(|| g.dot(&params[layer.weight].value));
                let input = std::mem::take(&mut pass.inputs[l]);
                self.take_dense_owned(layer, g, input, &mut grads);
                match next {
                    Some(n) => g = n,
                    None => break,
                }
            }
        }
        Ok(self
            .theta_params
            .iter()
            .map(|&p| grads[p].take().expect("every theta group gets a gradient"))
            .collect())
    }

    /// Records the gradients of a head layer's weight and bias, when they are in theta.
    fn take_dense(
        &self,
        layer: &Dense,
        delta: Array2<f64>,
        input: &Array2<f64>,
        grads: &mut [Option<GroupGrad>],
    ) {
        let input = if self.theta_params.contains(&layer.weight) {
            input.clone()
        } else {
            Array2::zeros((0, 0))
        };
        self.take_dense_owned(layer, delta, input, grads);
    }

    /// Records the gradients of a dense layer's weight and bias, when they are in theta,
    /// moving `delta` and `input` into them (the bias gets a copy when both are in theta).
    fn take_dense_owned(
        &self,
        layer: &Dense,
        delta: Array2<f64>,
        input: Array2<f64>,
        grads: &mut [Option<GroupGrad>],
    ) {
        let weight = self.theta_params.contains(&layer.weight);
        let bias = layer.bias.filter(|b| self.theta_params.contains(b));
        match (weight, bias) {
            (true, Some(b)) => {
                grads[b] = Some(GroupGrad::Full(delta.clone()));
                grads[layer.weight] = Some(GroupGrad::Outer { delta, input });
            }
            (true, None) => grads[layer.weight] = Some(GroupGrad::Outer { delta, input }),
            (false, Some(b)) => grads[b] = Some(GroupGrad::Full(delta)),
            (false, None) => {}
        }
    }

    /// Dense T x dim scores (the flattening of score_factors), for small d.
    pub fn scores(
        &self,
        obs: ArrayView2<f64>,
        act: ArrayView2<f64>,
    ) -> Result<Array2<f64>, StepError> {
        let factors = self.score_factors(obs, act)?;
        Ok(flatten(&factors, obs.nrows(), self.dim))
    }
}

/// Writes factored group gradients as a dense T x dim matrix, groups side by side.
pub fn flatten(factors: &[GroupGrad], t: usize, dim: usize) -> Array2<f64> {
    let mut out = Array2::zeros((t, dim));
    let mut off = 0;
    for g in factors {
        match g {
            GroupGrad::Full(m) => {
                out.slice_mut(s![.., off..off + m.ncols()]).assign(m);
                off += m.ncols();
            }
            GroupGrad::Outer { delta, input } => {
                let (n_out, n_in) = (delta.ncols(), input.ncols());
                for (mut row, (d, x)) in out
                    .axis_iter_mut(Axis(0))
                    .zip(delta.outer_iter().zip(input.outer_iter()))
                {
                    for o in 0..n_out {
                        let mut block = row.slice_mut(s![off + o * n_in..off + (o + 1) * n_in]);
                        block.assign(&x);
                        block *= d[o];
                    }
                }
                off += n_out * n_in;
            }
        }
    }
    out
}
