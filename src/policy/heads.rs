//! Action heads of an MLP actor: the log-density of the logged action given the trunk output
//! h_t, and its gradient with respect to the head's outputs.
//!
//! * Gaussian, a ~ N(mu, diag sigma^2), mu = dense(h), log sigma either a state-independent
//!   tensor or a dense output (optionally clipped to [lo, hi], where its gradient is 0):
//!   d log pi / d mu_i = (a_i - mu_i) / sigma_i^2, d / d log sigma_i = (a_i - mu_i)^2 / sigma_i^2 - 1.
//! * Tanh-squashed Gaussian, a = tanh(u), u ~ N(mu, sigma^2):
//!   log pi(a) = log N(u; mu, sigma^2) minus sum_i ln(1 - a_i^2). The Jacobian term does not depend on theta, so the score is the
//!   Gaussian score at the pre-squash sample u = atanh(a), which exists only for |a| < 1.
//! * Categorical over K logits l: d log pi(k) / d l_j = 1[j = k] - softmax(l)_j.
//! * Bernoulli with logit x: d log pi(a) / d x = a - sigmoid(x).

use super::activation::sigmoid;
use super::network::{Dense, Param, StepColumn, StepError};
use ndarray::{Array1, Array2, ArrayView2, Zip};
use std::f64::consts::PI;

/// Where a Gaussian head's log sigma comes from.
#[derive(Debug, Clone, PartialEq)]
pub enum Sigma {
    /// A learned tensor of one entry per action, the same in every state.
    Param(usize),
    /// A dense output of the trunk, clipped to [lo, hi] when `clip` is set.
    Layer {
        layer: Dense,
        clip: Option<(f64, f64)>,
    },
}

#[derive(Debug, Clone, PartialEq)]
pub enum Head {
    Gaussian {
        mean: Dense,
        sigma: Sigma,
        squash: bool,
    },
    Categorical {
        logits: Dense,
    },
    Bernoulli {
        logit: Dense,
    },
}

/// d log pi / d(output) of each of the head's dense layers, and of a log sigma tensor.
pub(crate) struct HeadGrads<'a> {
    pub layers: Vec<(&'a Dense, Array2<f64>)>,
    pub param: Option<(usize, Array2<f64>)>,
}

/// Gaussian intermediate values: the pre-squash sample u, mu, log sigma, and the mask that is 0
/// where log sigma was clipped.
struct Gauss {
    u: Array2<f64>,
    mu: Array2<f64>,
    log_sigma: Array2<f64>,
    mask: Option<Array2<f64>>,
}

fn not_finite(step: usize) -> StepError {
    StepError {
        step,
        column: None,
        message: "the network's output is not finite (an observation far outside the range \
                  the network was trained on?)"
            .into(),
    }
}

/// Row index of the first non-finite entry of `m`, if any.
fn first_non_finite(m: &Array2<f64>) -> Option<usize> {
    m.outer_iter()
        .position(|r| r.iter().any(|v| !v.is_finite()))
}

/// The discrete action of step t in 0..k.
fn index(a: f64, k: usize, step: usize) -> Result<usize, StepError> {
    if a.fract() == 0.0 && a >= 0.0 && (a as usize) < k {
        Ok(a as usize)
    } else {
        Err(StepError {
            step,
            column: Some(StepColumn::Act(0)),
            message: format!("action {a} is outside the discrete range 0..{}", k - 1),
        })
    }
}

fn log_sigmoid(x: f64) -> f64 {
    if x >= 0.0 {
        -(-x).exp().ln_1p()
    } else {
        x - x.exp().ln_1p()
    }
}

impl Head {
    pub fn n_act(&self) -> usize {
        match self {
            Head::Gaussian { mean, .. } => mean.n_out,
            Head::Categorical { .. } | Head::Bernoulli { .. } => 1,
        }
    }

    /// The head's dense layers (mean then log sigma, or the logits).
    pub fn layers(&self) -> Vec<&Dense> {
        match self {
            Head::Gaussian { mean, sigma, .. } => match sigma {
                Sigma::Param(_) => vec![mean],
                Sigma::Layer { layer, .. } => vec![mean, layer],
            },
            Head::Categorical { logits } => vec![logits],
            Head::Bernoulli { logit } => vec![logit],
        }
    }

    pub fn kind(&self) -> &'static str {
        match self {
            Head::Gaussian { squash: false, .. } => "gaussian",
            Head::Gaussian { squash: true, .. } => "tanh_gaussian",
            Head::Categorical { .. } => "categorical",
            Head::Bernoulli { .. } => "bernoulli",
        }
    }

    fn output(layer: &Dense, params: &[Param], h: &Array2<f64>) -> Result<Array2<f64>, StepError> {
        let z = layer.affine(params, &h.view());
        match first_non_finite(&z) {
            Some(t) => Err(not_finite(t)),
            None => Ok(z),
        }
    }

    fn gauss(
        mean: &Dense,
        sigma: &Sigma,
        squash: bool,
        params: &[Param],
        h: &Array2<f64>,
        act: ArrayView2<f64>,
    ) -> Result<Gauss, StepError> {
        let mu = Head::output(mean, params, h)?;
        let (log_sigma, mask) = match sigma {
            Sigma::Param(p) => {
                let row = params[*p].value.row(0);
                (
                    row.broadcast(mu.raw_dim()).expect("m entries").to_owned(),
                    None,
                )
            }
            Sigma::Layer { layer, clip } => {
                let mut ls = Head::output(layer, params, h)?;
                let mask = clip.map(|(lo, hi)| {
                    let m = ls.mapv(|v| f64::from(u8::from(v > lo && v < hi)));
                    ls.mapv_inplace(|v| v.clamp(lo, hi));
                    m
                });
                (ls, mask)
            }
        };
        let mut u = act.to_owned();
        if squash {
            for ((t, i), a) in u.indexed_iter_mut() {
                if a.abs() >= 1.0 {
                    return Err(StepError {
                        step: t,
                        column: Some(StepColumn::Act(i)),
                        message: format!(
                            "action {a} is outside (-1, 1), the range of a tanh-squashed \
                             Gaussian (the score needs atanh(a); log the action before any \
                             rescaling to the environment's bounds)"
                        ),
                    });
                }
                *a = a.atanh();
            }
        }
        Ok(Gauss {
            u,
            mu,
            log_sigma,
            mask,
        })
    }

    /// log pi(a_t | h_t) of each step.
    pub fn log_density(
        &self,
        params: &[Param],
        h: &Array2<f64>,
        act: ArrayView2<f64>,
    ) -> Result<Array1<f64>, StepError> {
        match self {
            Head::Gaussian {
                mean,
                sigma,
                squash,
            } => {
                let g = Head::gauss(mean, sigma, *squash, params, h, act)?;
                let mut lp = Array2::zeros(g.u.raw_dim());
                Zip::from(&mut lp)
                    .and(&g.u)
                    .and(&g.mu)
                    .and(&g.log_sigma)
                    .for_each(|lp, &u, &mu, &ls| {
                        let z = (u - mu) / ls.exp();
                        *lp = -0.5 * z * z - ls - 0.5 * (2.0 * PI).ln();
                    });
                if *squash {
                    Zip::from(&mut lp)
                        .and(&act)
                        .for_each(|lp, &a| *lp -= (1.0 - a * a).ln());
                }
                Ok(lp.sum_axis(ndarray::Axis(1)))
            }
            Head::Categorical { logits } => {
                let l = Head::output(logits, params, h)?;
                let mut out = Array1::zeros(l.nrows());
                for (t, row) in l.outer_iter().enumerate() {
                    let k = index(act[[t, 0]], row.len(), t)?;
                    let m = row.fold(f64::NEG_INFINITY, |m, &v| m.max(v));
                    out[t] = row[k] - m - row.mapv(|v| (v - m).exp()).sum().ln();
                }
                Ok(out)
            }
            Head::Bernoulli { logit } => {
                let x = Head::output(logit, params, h)?;
                let mut out = Array1::zeros(x.nrows());
                for t in 0..x.nrows() {
                    let a = index(act[[t, 0]], 2, t)?;
                    let v = x[[t, 0]];
                    out[t] = if a == 1 {
                        log_sigmoid(v)
                    } else {
                        log_sigmoid(-v)
                    };
                }
                Ok(out)
            }
        }
    }

    /// d log pi / d(output) of every head layer (and of a log sigma tensor).
    pub(crate) fn backward<'a>(
        &'a self,
        params: &[Param],
        h: &Array2<f64>,
        act: ArrayView2<f64>,
    ) -> Result<HeadGrads<'a>, StepError> {
        match self {
            Head::Gaussian {
                mean,
                sigma,
                squash,
            } => {
                let g = Head::gauss(mean, sigma, *squash, params, h, act)?;
                let (mut d_mu, mut d_ls) = (g.u.clone(), g.u);
                Zip::from(&mut d_mu)
                    .and(&mut d_ls)
                    .and(&g.mu)
                    .and(&g.log_sigma)
                    .for_each(|dm, dl, &mu, &ls| {
                        let inv_var = (-2.0 * ls).exp();
                        let r = *dm - mu;
                        *dm = r * inv_var;
                        *dl = r * r * inv_var - 1.0;
                    });
                if let Some(mask) = &g.mask {
                    d_ls *= mask;
                }
                Ok(match sigma {
                    Sigma::Param(p) => HeadGrads {
                        layers: vec![(mean, d_mu)],
                        param: Some((*p, d_ls)),
                    },
                    Sigma::Layer { layer, .. } => HeadGrads {
                        layers: vec![(mean, d_mu), (layer, d_ls)],
                        param: None,
                    },
                })
            }
            Head::Categorical { logits } => {
                let mut l = Head::output(logits, params, h)?;
                for (t, mut row) in l.outer_iter_mut().enumerate() {
                    let k = index(act[[t, 0]], row.len(), t)?;
                    let m = row.fold(f64::NEG_INFINITY, |m, &v| m.max(v));
                    row.mapv_inplace(|v| (v - m).exp());
                    let z = row.sum();
                    row.mapv_inplace(|v| -v / z);
                    row[k] += 1.0;
                }
                Ok(HeadGrads {
                    layers: vec![(logits, l)],
                    param: None,
                })
            }
            Head::Bernoulli { logit } => {
                let mut x = Head::output(logit, params, h)?;
                for t in 0..x.nrows() {
                    let a = index(act[[t, 0]], 2, t)? as f64;
                    x[[t, 0]] = a - sigmoid(x[[t, 0]]);
                }
                Ok(HeadGrads {
                    layers: vec![(logit, x)],
                    param: None,
                })
            }
        }
    }
}
