//! Temporary stand-in for the network module's gradient types (removed when it lands).
use ndarray::Array2;

/// The per-step gradient of one parameter tensor over an episode.
#[derive(Debug, Clone, PartialEq)]
pub enum GroupGrad {
    /// dense weight [out, in]: step-t gradient is delta_t (out) outer x_t (in), row-major o*in+i
    Outer {
        delta: Array2<f64>,
        input: Array2<f64>,
    },
    /// any other tensor: the T x n per-step gradient itself
    Full(Array2<f64>),
}

/// One parameter tensor.
#[derive(Debug, Clone, PartialEq)]
pub struct ThetaGroup {
    pub name: String,
    pub shape: Vec<usize>,
    pub size: usize,
}
