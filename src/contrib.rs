//! Per-episode contributions: each episode is reduced to one row of sufficient statistics, from
//! which every estimator's batch gradient under any episode weighting is an exact function of
//! the weighted mean row. The episode itself is dropped afterwards.
//!
//! Row layout, for L per-episode (linear) estimators and score dimension d:
//! `[g_1 (d) .. g_L (d) | S (d) | H (d) | A | Q | T]` where g_k = sum_t Psi_kt s_t, and the
//! auxiliary block (present only when a batch-dependent estimator is planned) holds
//! S = sum_t G_t s_t, H = sum_t s_t, A = sum_t G_t, Q = sum_t G_t^2 and T = episode length.
//! With weights w: b(w) = sum w A / sum w T, and the mean-baseline gradient is
//! (sum w S - b sum w H) / sum w; whitening divides it by sd(w) = sqrt(sum w Q / sum w T - b^2).
//!
//! The minimum-variance baselines (`minvar_total`, `minvar_rtg`) have their own blocks of
//! sufficient sums after the auxiliary one; their layout and math are in [`minvar`].
//!
//! Optionally ([`Plan::with_moments`]) two scalars per per-episode estimator follow:
//! q = ||g_k||^2 and r = ||g_k - g_ref||^2. From their weighted means the ideal-bootstrap
//! variance of any replicate is exact: (mean_w q - ||mean_w g_k||^2) / N, and likewise for the
//! paired difference, so a replicate's own MSE estimate needs no second bootstrap level.

use crate::episode::Episode;
use crate::estimator::{Estimator, scan};
use ndarray::ArrayView2;

pub mod minvar;

/// Why a gradient came out as it did, when that needs saying.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum GradNote {
    Ok,
    /// Whitening with zero spread of returns: the gradient is taken as zero.
    ConstantReturns,
}

/// The contribution layout for a fixed list of estimators, score dimension and gamma.
#[derive(Debug, Clone)]
pub struct Plan {
    pub estimators: Vec<Estimator>,
    /// Discount of each estimator (the sweep over gamma gives them different ones).
    pub gammas: Vec<f64>,
    /// Discount of the auxiliary block (batch-dependent estimators).
    pub gamma: f64,
    pub d: usize,
    /// Start of the moment columns and the reference they are paired with.
    moments: Option<(usize, usize)>,
    /// Column offset of each estimator's per-episode gradient, or None for batch-dependent.
    offsets: Vec<Option<usize>>,
    /// (estimator index, column offset) of the per-episode estimators, in order.
    linear: Vec<(usize, usize)>,
    /// Start of the auxiliary block, when present.
    aux: Option<usize>,
    /// Starts of the minimum-variance baselines' blocks, when planned.
    minvar_total: Option<usize>,
    minvar_rtg: Option<usize>,
    width: usize,
}

impl Plan {
    pub fn new(estimators: Vec<Estimator>, gamma: f64, d: usize) -> Plan {
        let gammas = vec![gamma; estimators.len()];
        Plan::with_gammas(estimators, gammas, gamma, d)
    }

    /// A plan whose estimators have their own discounts; `gamma` is that of the batch-dependent
    /// ones.
    pub fn with_gammas(estimators: Vec<Estimator>, gammas: Vec<f64>, gamma: f64, d: usize) -> Plan {
        assert_eq!(estimators.len(), gammas.len());
        let mut next = 0;
        let offsets: Vec<Option<usize>> = estimators
            .iter()
            .map(|e| {
                (!e.batch_dependent()).then(|| {
                    next += d;
                    next - d
                })
            })
            .collect();
        let linear = offsets
            .iter()
            .enumerate()
            .filter_map(|(k, off)| off.map(|o| (k, o)))
            .collect();
        let aux = estimators
            .iter()
            .any(|e| matches!(e, Estimator::MeanBaseline | Estimator::Whitened))
            .then_some(next);
        let mut width = next + if aux.is_some() { 2 * d + 3 } else { 0 };
        let mut block = |e: Estimator, size: usize| {
            estimators.contains(&e).then(|| {
                width += size;
                width - size
            })
        };
        let minvar_total = block(Estimator::MinvarTotal, minvar::total_width(d));
        let minvar_rtg = block(Estimator::MinvarRtg, minvar::rtg_width(d));
        Plan {
            estimators,
            gammas,
            gamma,
            d,
            moments: None,
            offsets,
            linear,
            aux,
            minvar_total,
            minvar_rtg,
            width,
        }
    }

    /// Adds the moment columns (q, r per per-episode estimator, paired with `reference`).
    pub fn with_moments(mut self, reference: usize) -> Plan {
        assert!(
            self.offsets[reference].is_some(),
            "the reference is a per-episode estimator"
        );
        self.moments = Some((self.width, reference));
        self.width += 2 * self.estimators.len();
        self
    }

    /// The first moment column (q of estimator 0; q_k and r_k sit at start + 2k, start + 2k + 1),
    /// when planned.
    pub fn moment_start(&self) -> Option<usize> {
        self.moments.map(|(start, _)| start)
    }

    /// Weighted means of q = ||g_k||^2 and r = ||g_k - g_ref||^2 for estimator k, when planned
    /// and k is a per-episode estimator.
    pub fn moments(&self, k: usize, mean: &[f64]) -> Option<(f64, f64)> {
        let (start, _) = self.moments?;
        self.offsets[k]?;
        Some((mean[start + 2 * k], mean[start + 2 * k + 1]))
    }

    /// The columns of a mean row that [`Plan::gradient`] reads for estimator k: its own block
    /// for a per-episode estimator, the auxiliary block for a batch-dependent one.
    pub fn columns(&self, k: usize) -> std::ops::Range<usize> {
        let minvar = |start: Option<usize>, size: usize| {
            let start = start.expect("a planned baseline has its block");
            start..start + size
        };
        match (self.offsets[k], self.estimators[k]) {
            (Some(off), _) => off..off + self.d,
            (None, Estimator::MinvarTotal) => {
                minvar(self.minvar_total, minvar::total_width(self.d))
            }
            (None, Estimator::MinvarRtg) => minvar(self.minvar_rtg, minvar::rtg_width(self.d)),
            (None, _) => {
                let aux = self
                    .aux
                    .expect("batch-dependent estimators have the auxiliary block");
                aux..aux + 2 * self.d + 3
            }
        }
    }

    /// Length of one contribution row.
    pub fn width(&self) -> usize {
        self.width
    }

    /// Writes the episode's contribution row into `row` (length [`Plan::width`]).
    pub fn contribute(&self, ep: &Episode, work: &mut Work, row: &mut [f64]) {
        debug_assert_eq!(row.len(), self.width);
        debug_assert_eq!(ep.score_dim, self.d);
        row.fill(0.0);
        let d = self.d;
        let t_len = ep.len();
        // Psi of every per-episode estimator as the columns of a T x L matrix, then all
        // gradients at once: G = Psi^T S (L x d), one matrix product instead of L loops.
        let linear = &self.linear;
        work.psis.clear();
        work.psis.resize(t_len * linear.len(), 0.0);
        // Returns and TD residuals are shared by every estimator at the same gamma: computed
        // once per gamma, not once per estimator.
        let mut g_gamma = None;
        for (col, &(k, _)) in linear.iter().enumerate() {
            let gamma = self.gammas[k];
            if g_gamma != Some(gamma) {
                scan::discounted_returns(&ep.rewards, gamma, &mut work.g);
                match &ep.values {
                    Some(v) => {
                        scan::td_residuals(&ep.rewards, v, ep.tail_value(), gamma, &mut work.deltas)
                    }
                    None => work.deltas.clear(),
                }
                g_gamma = Some(gamma);
            }
            self.estimators[k].psi(ep, gamma, &work.g, &work.deltas, &mut work.psi);
            for (t, p) in work.psi.iter().enumerate() {
                work.psis[t * linear.len() + col] = *p;
            }
        }
        if !linear.is_empty() && t_len > 0 {
            let psi = ArrayView2::from_shape((t_len, linear.len()), &work.psis).expect("T x L");
            let scores = ArrayView2::from_shape((t_len, d), &ep.scores).expect("T x d");
            let grads = psi.t().dot(&scores);
            for (col, &(_, off)) in linear.iter().enumerate() {
                for (o, x) in row[off..off + d].iter_mut().zip(grads.row(col)) {
                    *o = *x;
                }
            }
        }
        if let Some((start, reference)) = self.moments {
            let r_off = self.offsets[reference].expect("checked in with_moments");
            for (k, off) in self.offsets.iter().enumerate() {
                let Some(off) = *off else { continue };
                let (mut q, mut r) = (0.0, 0.0);
                for j in 0..d {
                    let x = row[off + j];
                    q += x * x;
                    r += (x - row[r_off + j]).powi(2);
                }
                row[start + 2 * k] = q;
                row[start + 2 * k + 1] = r;
            }
        }
        if let Some(aux) = self.aux {
            if g_gamma != Some(self.gamma) {
                scan::discounted_returns(&ep.rewards, self.gamma, &mut work.g);
            }
            accumulate(&work.g, &ep.scores, d, &mut row[aux..aux + d]);
            work.psi.clear();
            work.psi.resize(ep.len(), 1.0);
            accumulate(&work.psi, &ep.scores, d, &mut row[aux + d..aux + 2 * d]);
            row[aux + 2 * d] = work.g.iter().sum();
            row[aux + 2 * d + 1] = work.g.iter().map(|g| g * g).sum();
            row[aux + 2 * d + 2] = ep.len() as f64;
        }
        if let Some(start) = self.minvar_total {
            let out = &mut row[start..start + minvar::total_width(d)];
            minvar::contribute_total(&ep.rewards, &ep.scores, d, out);
        }
        if let Some(start) = self.minvar_rtg {
            let out = &mut row[start..start + minvar::rtg_width(d)];
            minvar::contribute_rtg(&ep.rewards, &ep.scores, d, out, &mut work.psi);
        }
    }

    /// Estimator k's batch gradient from a weighted mean row (sum_i w_i row_i / sum_i w_i).
    pub fn gradient(&self, k: usize, mean: &[f64], out: &mut [f64]) -> GradNote {
        self.gradient_from_columns(k, &mean[self.columns(k)], out)
    }

    /// [`Plan::gradient`] from only the columns [`Plan::columns`] of the mean row.
    pub fn gradient_from_columns(&self, k: usize, cols: &[f64], out: &mut [f64]) -> GradNote {
        let d = self.d;
        if self.offsets[k].is_some() {
            out.copy_from_slice(cols);
            return GradNote::Ok;
        }
        match self.estimators[k] {
            Estimator::MinvarTotal => {
                minvar::gradient_total(cols, d, out);
                return GradNote::Ok;
            }
            Estimator::MinvarRtg => {
                minvar::gradient_rtg(cols, d, out);
                return GradNote::Ok;
            }
            _ => {}
        }
        let (s, h) = (&cols[..d], &cols[d..2 * d]);
        let (a, q, t) = (cols[2 * d], cols[2 * d + 1], cols[2 * d + 2]);
        let b = a / t;
        for j in 0..d {
            out[j] = s[j] - b * h[j];
        }
        if self.estimators[k] == Estimator::Whitened {
            if !(q.is_finite() && b.is_finite()) {
                // Overflowed sums: the spread of the returns is unknown, not zero, so the
                // gradient is undefined (NaN here, None in the report), not taken as zero.
                out.fill(f64::NAN);
                return GradNote::Ok;
            }
            let var = q / t - b * b;
            // Relative threshold: with constant returns var is rounding noise around 0, and
            // dividing by its square root would blow that noise up into a huge gradient.
            let floor = 1e-24 * (q / t).max(f64::MIN_POSITIVE);
            if var.is_nan() || var <= floor {
                out.fill(0.0);
                return GradNote::ConstantReturns;
            }
            let sd = var.sqrt();
            out.iter_mut().for_each(|x| *x /= sd);
        }
        GradNote::Ok
    }
}

/// out += sum_t psi_t s_t, with scores row-major T x d.
fn accumulate(psi: &[f64], scores: &[f64], d: usize, out: &mut [f64]) {
    for (p, s) in psi.iter().zip(scores.chunks_exact(d)) {
        for (o, x) in out.iter_mut().zip(s) {
            *o += p * x;
        }
    }
}

/// Scratch buffers reused across episodes.
#[derive(Debug, Default)]
pub struct Work {
    g: Vec<f64>,
    psi: Vec<f64>,
    psis: Vec<f64>,
    deltas: Vec<f64>,
}
