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
use exact::ExactSum;
use nalgebra::{DMatrix, DVector};
use serde::Serialize;

pub mod exact;

/// How to fit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FitConfig {
    pub folds: usize,
    /// Ridge penalty as a fraction of the mean diagonal of X^T X.
    pub ridge: f64,
    pub gamma: f64,
    /// Fit on all episodes and apply to the same ones (biased; for comparison only).
    pub in_sample: bool,
    /// What the per-fold sums and the solves may hold.
    pub budget: crate::limits::Budget,
}

impl Default for FitConfig {
    fn default() -> Self {
        FitConfig {
            folds: 5,
            ridge: 1e-3,
            gamma: 0.99,
            in_sample: false,
            budget: crate::limits::Budget::default(),
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

/// Accumulates 1 - Var(G - V) / Var(G) over steps. The sums are exact (see [`exact`]), so
/// the figure does not depend on the order in which episodes end.
#[derive(Debug, Clone, Default)]
pub struct ExplainedVariance {
    n: u64,
    g: ExactSum,
    g2: ExactSum,
    e: ExactSum,
    e2: ExactSum,
}

impl ExplainedVariance {
    pub fn push(&mut self, g: f64, v: f64) {
        let e = g - v;
        self.n += 1;
        self.g.add(g);
        self.g2.add(g * g);
        self.e.add(e);
        self.e2.add(e * e);
    }

    /// Adds another accumulator's sums.
    pub fn merge(&mut self, other: &ExplainedVariance) {
        self.n += other.n;
        self.g.merge(&other.g);
        self.g2.merge(&other.g2);
        self.e.merge(&other.e);
        self.e2.merge(&other.e2);
    }

    /// The accumulator's state (episode-step count and the four exact sums), for shard files.
    pub fn to_parts(&self) -> (u64, [Vec<f64>; 4]) {
        let sums = [&self.g, &self.g2, &self.e, &self.e2].map(|s| s.to_parts());
        (self.n, sums)
    }

    /// The accumulator [`ExplainedVariance::to_parts`] described, or None if a sum is malformed.
    pub fn from_parts(n: u64, sums: &[Vec<f64>; 4]) -> Option<ExplainedVariance> {
        Some(ExplainedVariance {
            n,
            g: ExactSum::from_parts(&sums[0])?,
            g2: ExactSum::from_parts(&sums[1])?,
            e: ExactSum::from_parts(&sums[2])?,
            e2: ExactSum::from_parts(&sums[3])?,
        })
    }

    pub fn value(&self) -> Option<f64> {
        if self.n < 2 {
            return None;
        }
        let n = self.n as f64;
        let var_g = self.g2.value() / n - (self.g.value() / n).powi(2);
        let var_e = self.e2.value() / n - (self.e.value() / n).powi(2);
        // Sums that overflowed f64 leave no defined figure (not -inf, not NaN).
        (var_g > 0.0)
            .then(|| 1.0 - var_e / var_g)
            .filter(|x| x.is_finite())
    }

    /// Adds an episode's steps with its recorded (or fitted) values: plain sums over its steps
    /// (which come in a fixed order), then one exact addition of each.
    pub fn push_episode(&mut self, ep: &Episode, gamma: f64, buf: &mut Vec<f64>) {
        if let Some(values) = &ep.values {
            scan::discounted_returns(&ep.rewards, gamma, buf);
            let mut s = [0.0; 4];
            for (g, v) in buf.iter().zip(values) {
                let e = g - v;
                s[0] += g;
                s[1] += g * g;
                s[2] += e;
                s[3] += e * e;
            }
            self.n += buf.len().min(values.len()) as u64;
            for (acc, x) in [&mut self.g, &mut self.g2, &mut self.e, &mut self.e2]
                .into_iter()
                .zip(s)
            {
                acc.add(x);
            }
        }
    }
}

/// Fold of an episode: FNV-1a of its id's raw bytes, so assignment ignores row order and
/// thread count.
fn fold_of(id: &[u8], folds: usize) -> usize {
    let mut h: u64 = 0xcbf29ce484222325;
    for &b in id {
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

/// Per-fold sums of X^T X (upper triangle, row-major) and X^T y, kept exactly so that the fit
/// does not depend on the order in which episodes end.
#[derive(Debug, Clone, Default)]
struct FoldSums {
    xtx: Vec<ExactSum>,
    xty: Vec<ExactSum>,
}

impl FoldSums {
    fn new(p: usize) -> FoldSums {
        FoldSums {
            xtx: vec![ExactSum::default(); p * (p + 1) / 2],
            xty: vec![ExactSum::default(); p],
        }
    }

    fn for_each(&mut self, other: &FoldSums, f: fn(&mut ExactSum, &ExactSum)) {
        for (a, b) in self.xtx.iter_mut().zip(&other.xtx) {
            f(a, b);
        }
        for (a, b) in self.xty.iter_mut().zip(&other.xty) {
            f(a, b);
        }
    }
}

/// Refuses fold counts and feature counts whose sums and solves exceed the budget, before
/// allocating them (a count like 2^64 - 1 would otherwise overflow a capacity).
fn check_size(folds: usize, p: usize, budget: crate::limits::Budget) -> Result<()> {
    use crate::limits::bytes;
    let entries = bytes(p as u128, p as u128 + 1) / 2 + p as u128;
    // The fold sums, their total, one complement, the fitted weights and three p x p matrices.
    let per_fold = bytes(entries, exact::TYPICAL_BYTES).saturating_add(8 * p as u128);
    let need =
        bytes(folds as u128 + 2, per_fold).saturating_add(bytes(24, bytes(p as u128, p as u128)));
    budget.check(
        need,
        || format!("--fit-value with {folds} folds and {p} features (2 x obs columns + 3)"),
        "use fewer --folds (5 is usual) or fewer obs columns, or raise --max-memory",
    )
}

/// First pass: fits the fold models on a log, keeping only per-fold sums.
pub fn fit(mut reader: LogReader, cfg: &FitConfig) -> Result<Critic> {
    if cfg.folds < 2 && !cfg.in_sample {
        return Err(Error::usage("--folds must be at least 2 for cross-fitting"));
    }
    let obs_dim = reader.schema().obs.len();
    let p = 2 * obs_dim + 3;
    let folds = cfg.folds.max(1);
    check_size(folds, p, cfg.budget)?;
    let mut sums = vec![FoldSums::new(p); folds];
    let (mut g, mut phi) = (Vec::new(), Vec::new());
    let (mut xtx, mut xty) = (vec![0.0; p * (p + 1) / 2], vec![0.0; p]);
    while let Some(ep) = reader.next_episode()? {
        scan::discounted_returns(&ep.rewards, cfg.gamma, &mut g);
        // The episode's own sums in step order, then one exact addition per entry.
        xtx.fill(0.0);
        xty.fill(0.0);
        for (t, gt) in g.iter().enumerate() {
            features(&ep, t, &mut phi);
            let mut k = 0;
            for i in 0..p {
                for j in i..p {
                    xtx[k] += phi[i] * phi[j];
                    k += 1;
                }
                xty[i] += phi[i] * gt;
            }
        }
        let f = &mut sums[fold_of(&ep.key, folds)];
        for (acc, x) in f.xtx.iter_mut().zip(&xtx) {
            acc.add(*x);
        }
        for (acc, x) in f.xty.iter_mut().zip(&xty) {
            acc.add(*x);
        }
    }
    let mut total = FoldSums::new(p);
    for f in &sums {
        total.for_each(f, ExactSum::merge);
    }
    let weights = if cfg.in_sample {
        vec![solve(&total, p, cfg.ridge)?]
    } else {
        (0..folds)
            .map(|k| {
                // The other folds' sums: the total less fold k, exactly.
                let mut rest = total.clone();
                rest.for_each(&sums[k], ExactSum::subtract);
                solve(&rest, p, cfg.ridge)
            })
            .collect::<Result<_>>()?
    };
    Ok(Critic {
        weights,
        folds,
        in_sample: cfg.in_sample,
        obs_dim,
    })
}

/// Ridge weights from summed normal equations.
fn solve(sums: &FoldSums, p: usize, ridge: f64) -> Result<Vec<f64>> {
    let mut a = DMatrix::<f64>::zeros(p, p);
    let mut k = 0;
    for i in 0..p {
        for j in i..p {
            let x = sums.xtx[k].value();
            a[(i, j)] = x;
            a[(j, i)] = x;
            k += 1;
        }
    }
    let b = DVector::from_fn(p, |i, _| sums.xty[i].value());
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
        s[(i, i)] += ridge;
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
            &self.weights[fold_of(&ep.key, self.folds)]
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
