//! A value baseline without a critic: V(s_t) fitted by ridge regression of the discounted
//! return on features of the state and of the time remaining before the time limit, with
//! K-fold cross-fitting by episode. Each episode's values come from the model fitted on the
//! other folds, so its baseline does not depend on its own returns: an in-sample fit would
//! absorb part of each episode's action-dependent return and bias value-based gradients
//! (by about p / N for p features and N episodes: the average diagonal of the hat matrix).
//!
//! Features phi(s_t, t) = [1, obs, obs^2 (elementwise), t, t^2]. The time remaining before a
//! time limit T, tau = (T - t) / T, is affine in t, so [t, t^2] span the same functions as
//! [tau, tau^2] without knowing T in advance (the fit is solved in standardised coordinates,
//! an exact reparametrisation, so the scale of t does not hurt its conditioning). The bootstrap
//! value of a truncated episode is the fitted value at its last observed state with the time
//! after its last step (logs hold no next-state features).
//!
//! Fitting is one streaming pass (per-fold sums X^T X and X^T y only) and applying it another:
//! the caller reads the log twice.

pub mod net;

use crate::episode::{End, Episode};
use crate::error::{Error, Result};
use crate::estimator::scan;
use crate::log::LogReader;
use nalgebra::{DMatrix, DVector};
use serde::Serialize;

/// How to fit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FitConfig {
    pub folds: usize,
    /// Ridge penalty as a fraction of the mean diagonal of X^T X.
    pub ridge: f64,
    pub gamma: f64,
    /// Fit on all episodes and apply to the same ones (biased; for comparison only).
    pub in_sample: bool,
}

impl Default for FitConfig {
    fn default() -> Self {
        FitConfig {
            folds: 5,
            ridge: 1e-3,
            gamma: 0.99,
            in_sample: false,
        }
    }
}

/// The fitted models, one per fold.
#[derive(Debug, Clone, PartialEq)]
pub struct Critic {
    weights: Vec<Vec<f64>>,
    folds: usize,
    in_sample: bool,
    obs_dim: usize,
}

/// The critic quality figures of a report.
#[derive(Debug, Clone, PartialEq, Serialize, Default)]
pub struct CriticQuality {
    /// 1 - Var(G - V) / Var(G) for the log's value column, when it has one.
    pub recorded_explained_variance: Option<f64>,
    /// The same for the fitted values, with --fit-value.
    pub fitted_explained_variance: Option<f64>,
    pub fitted_folds: Option<usize>,
    pub fitted_features: Option<usize>,
}

/// Accumulates 1 - Var(G - V) / Var(G) over steps.
#[derive(Debug, Clone, Copy, Default)]
pub struct ExplainedVariance {
    n: f64,
    g: f64,
    g2: f64,
    e: f64,
    e2: f64,
}

impl ExplainedVariance {
    pub fn push(&mut self, g: f64, v: f64) {
        let e = g - v;
        self.n += 1.0;
        self.g += g;
        self.g2 += g * g;
        self.e += e;
        self.e2 += e * e;
    }

    /// Adds another accumulator's sums (for combining per-episode sums in a fixed order).
    pub fn merge(&mut self, other: &ExplainedVariance) {
        self.n += other.n;
        self.g += other.g;
        self.g2 += other.g2;
        self.e += other.e;
        self.e2 += other.e2;
    }

    pub fn value(&self) -> Option<f64> {
        if self.n < 2.0 {
            return None;
        }
        let var_g = self.g2 / self.n - (self.g / self.n).powi(2);
        let var_e = self.e2 / self.n - (self.e / self.n).powi(2);
        (var_g > 0.0).then(|| 1.0 - var_e / var_g)
    }

    /// Adds an episode's steps with its recorded (or fitted) values.
    pub fn push_episode(&mut self, ep: &Episode, gamma: f64, buf: &mut Vec<f64>) {
        if let Some(values) = &ep.values {
            scan::discounted_returns(&ep.rewards, gamma, buf);
            for (g, v) in buf.iter().zip(values) {
                self.push(*g, *v);
            }
        }
    }
}

/// Fold of an episode: FNV-1a of its id, so assignment ignores row order and thread count.
fn fold_of(id: &str, folds: usize) -> usize {
    let mut h: u64 = 0xcbf29ce484222325;
    for b in id.bytes() {
        h ^= u64::from(b);
        h = h.wrapping_mul(0x100000001b3);
    }
    (h % folds as u64) as usize
}

fn features(ep: &Episode, t: usize, out: &mut Vec<f64>) {
    out.clear();
    out.push(1.0);
    let obs = &ep.obs[t * ep.obs_dim..(t + 1) * ep.obs_dim];
    out.extend_from_slice(obs);
    out.extend(obs.iter().map(|x| x * x));
    out.push(t as f64);
    out.push((t as f64) * (t as f64));
}

/// First pass: fits the fold models on a log, keeping only per-fold sums.
pub fn fit(mut reader: LogReader, cfg: &FitConfig) -> Result<Critic> {
    if cfg.folds < 2 && !cfg.in_sample {
        return Err(Error::usage("--folds must be at least 2 for cross-fitting"));
    }
    let obs_dim = reader.schema().obs.len();
    let p = 2 * obs_dim + 3;
    let folds = cfg.folds.max(1);
    let mut xtx = vec![DMatrix::<f64>::zeros(p, p); folds];
    let mut xty = vec![DVector::<f64>::zeros(p); folds];
    let (mut g, mut phi) = (Vec::new(), Vec::new());
    while let Some(ep) = reader.next_episode()? {
        let f = fold_of(&ep.id, folds);
        scan::discounted_returns(&ep.rewards, cfg.gamma, &mut g);
        for (t, gt) in g.iter().enumerate() {
            features(&ep, t, &mut phi);
            let x = DVector::from_column_slice(&phi);
            xtx[f] += &x * x.transpose();
            xty[f] += &x * *gt;
        }
    }
    let solve = |skip: Option<usize>| -> Result<Vec<f64>> {
        let mut a = DMatrix::<f64>::zeros(p, p);
        let mut b = DVector::<f64>::zeros(p);
        for k in 0..folds {
            if Some(k) != skip {
                a += &xtx[k];
                b += &xty[k];
            }
        }
        // Standardise: u = D^-1 w with D_ii = 1 / sqrt(A_ii), solve (D A D + ridge I) u = D b.
        let d: Vec<f64> = (0..p)
            .map(|i| {
                if a[(i, i)] > 0.0 {
                    1.0 / a[(i, i)].sqrt()
                } else {
                    1.0
                }
            })
            .collect();
        let mut s = DMatrix::from_fn(p, p, |i, j| a[(i, j)] * d[i] * d[j]);
        for i in 0..p {
            s[(i, i)] += cfg.ridge;
        }
        let rhs = DVector::from_fn(p, |i, _| b[i] * d[i]);
        let chol = s.cholesky().ok_or_else(|| {
            Error::usage(
                "the value fit is singular (too few steps in the other folds); use fewer --folds",
            )
        })?;
        Ok(chol
            .solve(&rhs)
            .iter()
            .zip(&d)
            .map(|(u, di)| u * di)
            .collect())
    };
    let weights = if cfg.in_sample {
        vec![solve(None)?]
    } else {
        (0..folds).map(|k| solve(Some(k))).collect::<Result<_>>()?
    };
    Ok(Critic {
        weights,
        folds,
        in_sample: cfg.in_sample,
        obs_dim,
    })
}

impl Critic {
    pub fn features(&self) -> usize {
        2 * self.obs_dim + 3
    }

    pub fn folds(&self) -> usize {
        self.folds
    }

    /// Replaces the episode's values (and a truncated end's bootstrap value) by the fitted
    /// ones from the model that did not see this episode.
    pub fn apply(&self, ep: &mut Episode) {
        let w = if self.in_sample {
            &self.weights[0]
        } else {
            &self.weights[fold_of(&ep.id, self.folds)]
        };
        let mut phi = Vec::new();
        let v = |phi: &[f64]| phi.iter().zip(w).map(|(a, b)| a * b).sum::<f64>();
        let mut values = Vec::with_capacity(ep.len());
        for t in 0..ep.len() {
            features(ep, t, &mut phi);
            values.push(v(&phi));
        }
        if let End::Truncated { .. } = ep.end
            && !ep.is_empty()
        {
            // The last observed state, at the time after the last step.
            features(ep, ep.len() - 1, &mut phi);
            let (n, t) = (phi.len(), ep.len() as f64);
            phi[n - 2] = t;
            phi[n - 1] = t * t;
            ep.end = End::Truncated {
                bootstrap: Some(v(&phi)),
            };
        }
        ep.values = Some(values);
    }
}

#[cfg(test)]
mod tests;
