//! Elementwise activations of dense layers and their derivatives.
//!
//! For y = f(z): tanh f' = 1 - y^2; relu f' = 1(z > 0); elu (alpha) y = z for z > 0 else
//! alpha (e^z - 1), f' = 1 or y + alpha; leaky relu (slope s) f' = 1 or s; silu (swish)
//! y = z sigmoid(z), f' = sigmoid(z) (1 + z (1 - sigmoid(z))); sigmoid f' = y (1 - y);
//! softplus y = ln(1 + e^z), f' = sigmoid(z). At the kinks of relu and leaky relu (z = 0) the
//! derivative taken is the left one (0, or s), as the common frameworks' autograd does.

use ndarray::{Array2, Zip};

#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Activation {
    Identity,
    Tanh,
    Relu,
    Elu { alpha: f64 },
    LeakyRelu { slope: f64 },
    Silu,
    Sigmoid,
    Softplus,
}

pub const NAMES: &str = "identity, tanh, relu, elu, leaky_relu, silu (or swish), sigmoid, softplus";

pub(crate) fn sigmoid(x: f64) -> f64 {
    if x >= 0.0 {
        1.0 / (1.0 + (-x).exp())
    } else {
        let e = x.exp();
        e / (1.0 + e)
    }
}

impl Activation {
    /// The activation called `name`; `alpha` is elu's alpha, `slope` leaky relu's negative
    /// slope (torch's defaults 1 and 0.01 when absent). Case is ignored, so the frameworks'
    /// class names (`Tanh`, `ReLU`, `LeakyReLU`, `SiLU`) are read too.
    pub fn parse(name: &str, alpha: Option<f64>, slope: Option<f64>) -> Result<Self, String> {
        let a = match name.to_ascii_lowercase().as_str() {
            "identity" | "linear" => Activation::Identity,
            "tanh" => Activation::Tanh,
            "relu" => Activation::Relu,
            "elu" => Activation::Elu {
                alpha: alpha.unwrap_or(1.0),
            },
            "leaky_relu" | "leakyrelu" => Activation::LeakyRelu {
                slope: slope.unwrap_or(0.01),
            },
            "silu" | "swish" => Activation::Silu,
            "sigmoid" => Activation::Sigmoid,
            "softplus" => Activation::Softplus,
            _ => return Err(format!("unknown activation '{name}'; known: {NAMES}")),
        };
        if alpha.is_some() && !matches!(a, Activation::Elu { .. }) {
            return Err(format!("\"alpha\" is elu's parameter, not {name}'s"));
        }
        if slope.is_some() && !matches!(a, Activation::LeakyRelu { .. }) {
            return Err(format!(
                "\"negative_slope\" is leaky_relu's parameter, not {name}'s"
            ));
        }
        if !alpha.is_none_or(f64::is_finite) || !slope.is_none_or(f64::is_finite) {
            return Err(format!("the parameter of {name} must be finite"));
        }
        Ok(a)
    }

    pub fn name(&self) -> String {
        match self {
            Activation::Identity => "identity".into(),
            Activation::Tanh => "tanh".into(),
            Activation::Relu => "relu".into(),
            Activation::Elu { alpha } if *alpha == 1.0 => "elu".into(),
            Activation::Elu { alpha } => format!("elu(alpha={alpha})"),
            Activation::LeakyRelu { slope } => format!("leaky_relu({slope})"),
            Activation::Silu => "silu".into(),
            Activation::Sigmoid => "sigmoid".into(),
            Activation::Softplus => "softplus".into(),
        }
    }

    pub fn apply(&self, z: f64) -> f64 {
        match *self {
            Activation::Identity => z,
            Activation::Tanh => z.tanh(),
            Activation::Relu => z.max(0.0),
            Activation::Elu { alpha } => {
                if z > 0.0 {
                    z
                } else {
                    alpha * z.exp_m1()
                }
            }
            Activation::LeakyRelu { slope } => {
                if z > 0.0 {
                    z
                } else {
                    slope * z
                }
            }
            Activation::Silu => z * sigmoid(z),
            Activation::Sigmoid => sigmoid(z),
            Activation::Softplus => z.max(0.0) + (-z.abs()).exp().ln_1p(),
        }
    }

    /// f'(z), given also y = f(z).
    pub fn derivative(&self, z: f64, y: f64) -> f64 {
        match *self {
            Activation::Identity => 1.0,
            Activation::Tanh => 1.0 - y * y,
            Activation::Relu => f64::from(u8::from(z > 0.0)),
            Activation::Elu { alpha } => {
                if z > 0.0 {
                    1.0
                } else {
                    y + alpha
                }
            }
            Activation::LeakyRelu { slope } => {
                if z > 0.0 {
                    1.0
                } else {
                    slope
                }
            }
            Activation::Silu => {
                let s = sigmoid(z);
                s * (1.0 + z * (1.0 - s))
            }
            Activation::Sigmoid => y * (1.0 - y),
            Activation::Softplus => sigmoid(z),
        }
    }

    /// Replaces z by y = f(z) elementwise; with `slopes`, also returns f'(z) (for the
    /// backward pass, which then needs neither z nor y).
    pub fn forward_in_place(&self, z: &mut Array2<f64>, slopes: bool) -> Option<Array2<f64>> {
        if *self == Activation::Identity {
            return None;
        }
        if !slopes {
            z.mapv_inplace(|v| self.apply(v));
            return None;
        }
        let mut d = Array2::zeros(z.raw_dim());
        Zip::from(z).and(&mut d).for_each(|z, d| {
            let y = self.apply(*z);
            *d = self.derivative(*z, y);
            *z = y;
        });
        Some(d)
    }
}
