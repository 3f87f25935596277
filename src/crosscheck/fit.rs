//! Fitted variants: advantages normalised over the batch or per minibatch (an affine image of
//! the reference), and the claimed computation at another gamma (and lambda).
//!
//! Normalisation: y_t = (A_t - mean) / sd is y = a A + b with a = 1/sd > 0, b = -mean/sd; the
//! batch variant fits (a, b) by least squares over every step, the minibatch variant cuts the
//! rows (in file order) into runs where one affine map holds, greedily: a run grows while the
//! next row lies within tolerance of the run's least-squares line (checked once the run has
//! two rows). Runs must look like minibatches to count: at least [`MIN_RUN`] rows each, all of
//! one length but the last, at least two of them.
//!
//! Gamma and lambda: the sum over the first steps (whole episodes, at least [`FIT_STEPS`]) of
//! ((y_t - A_t(gamma, lambda)) / tol_t)^2 is minimised on a grid: gamma in [0.5, 1] by 0.01
//! and lambda in [0, 1] by 0.1, then [`LEVELS`] refinements, each a grid of 11 x 11 points
//! spanning one step either side of the best point with a fifth of the step. The final
//! resolution is 0.01 / 5^9 = 5.1e-9 in gamma and 0.1 / 5^9 = 5.1e-8 in lambda. For n-step and
//! return claims only gamma is fitted; an n-step claim's window is also fitted on its own
//! (every n from 1 to the longest episode, at most [`MAX_WINDOW`]).

use super::variants::Candidate;
use super::{Batch, CheckConfig, Claim, Claimed, Column, Kind, reference};
use std::collections::BTreeMap;

/// Shortest run that counts as a minibatch.
pub const MIN_RUN: usize = 4;
/// Steps (whole episodes) the gamma/lambda objective is summed over.
pub const FIT_STEPS: usize = 2000;
/// Refinement levels of the gamma/lambda grid.
pub const LEVELS: usize = 9;
/// The longest n-step window tried.
pub const MAX_WINDOW: usize = 4096;
/// Moves of a refinement grid whose best point lies on its edge, at most.
pub const MAX_MOVES: usize = 200;

/// Running least-squares fit of y on x (Welford updates, stable for large offsets).
#[derive(Debug, Clone, Copy, Default)]
struct Affine {
    n: f64,
    mx: f64,
    my: f64,
    sxx: f64,
    sxy: f64,
}

impl Affine {
    fn push(&mut self, x: f64, y: f64) {
        self.n += 1.0;
        let dx = x - self.mx;
        self.mx += dx / self.n;
        let dy = y - self.my;
        self.my += dy / self.n;
        self.sxx += dx * (x - self.mx);
        self.sxy += dx * (y - self.my);
    }

    /// (a, b) of y = a x + b, when x varies.
    fn fit(&self) -> Option<(f64, f64)> {
        (self.n >= 2.0 && self.sxx > 0.0).then(|| {
            let a = self.sxy / self.sxx;
            (a, self.my - a * self.mx)
        })
    }
}

/// The tolerance of an affine image: the reference's scaled by the slope, plus the rounding of
/// the normalisation itself (float32 mean and sd: a few units of the shift and the value).
fn affine_tol(col: &Column, i: usize, a: f64, b: f64) -> f64 {
    let u = col.rule.unit().unwrap_or(0.0);
    a.abs().max(1.0) * col.tol[i] + 4.0 * u * (b.abs() + (a * col.reference[i]).abs())
}

/// Normalisation over the whole batch.
pub fn normalised_batch(col: &Column) -> Candidate {
    let mut acc = Affine::default();
    for (x, y) in col.reference.iter().zip(&col.logged) {
        acc.push(*x, *y);
    }
    let mut parameters = BTreeMap::new();
    let (column, tol) = match acc.fit() {
        Some((a, b)) if a > 0.0 => {
            parameters.insert("scale", a);
            parameters.insert("shift", b);
            parameters.insert("implied_mean", -b / a);
            parameters.insert("implied_sd", 1.0 / a);
            affine_column(col, (0..col.logged.len()).map(|i| (i, a, b)))
        }
        _ => (col.reference.clone(), col.tol.clone()),
    };
    Candidate {
        name: "normalised_batch",
        description: "advantages normalised over the whole batch: a A_t + b (least squares)".into(),
        column,
        tol: Some(tol),
        parameters,
    }
}

/// The values a A_t + b of each step's map and their tolerances (steps without a map keep
/// the reference and its tolerance).
fn affine_column(
    col: &Column,
    maps: impl Iterator<Item = (usize, f64, f64)>,
) -> (Vec<f64>, Vec<f64>) {
    let mut out = col.reference.clone();
    let mut tol = col.tol.clone();
    for (i, a, b) in maps {
        out[i] = a * col.reference[i] + b;
        tol[i] = affine_tol(col, i, a, b);
    }
    (out, tol)
}

/// Normalisation per minibatch: consecutive runs of `order` (flat indices in file order).
pub fn normalised_runs(col: &Column, order: &[usize]) -> Candidate {
    let mut runs: Vec<(usize, usize)> = Vec::new();
    let (mut start, mut acc) = (0, Affine::default());
    for (k, &i) in order.iter().enumerate() {
        if let Some((a, b)) = acc.fit() {
            let y = a * col.reference[i] + b;
            if (col.logged[i] - y).abs() > affine_tol(col, i, a, b) {
                runs.push((start, k));
                (start, acc) = (k, Affine::default());
            }
        }
        acc.push(col.reference[i], col.logged[i]);
    }
    runs.push((start, order.len()));
    let lens: Vec<usize> = runs.iter().map(|(s, e)| e - s).collect();
    let minibatch_like = runs.len() >= 2
        && lens.iter().all(|&l| l >= MIN_RUN)
        && lens[..lens.len() - 1].iter().all(|&l| l == lens[0]);
    let mut parameters = BTreeMap::new();
    let (column, tol) = if minibatch_like {
        let mut maps = Vec::new();
        for &(s, e) in &runs {
            let mut fit = Affine::default();
            for &i in &order[s..e] {
                fit.push(col.reference[i], col.logged[i]);
            }
            if let Some((a, b)) = fit.fit() {
                maps.extend(order[s..e].iter().map(|&i| (i, a, b)));
            }
        }
        parameters.insert("minibatches", runs.len() as f64);
        parameters.insert("minibatch_rows", lens[0] as f64);
        affine_column(col, maps.into_iter())
    } else {
        (col.reference.clone(), col.tol.clone())
    };
    Candidate {
        name: "normalised_minibatch",
        description: "advantages normalised per minibatch: a_k A_t + b_k on consecutive runs of \
                      rows of one length in file order"
            .into(),
        column,
        tol: Some(tol),
        parameters,
    }
}

/// The objective on the first episodes: sum of squared tolerance-scaled differences.
fn objective(batch: &Batch, col: &Column, c: &Claimed, episodes: usize) -> f64 {
    let mut sum = 0.0;
    let mut work = Vec::new();
    for e in 0..episodes {
        let ep = &batch.episodes[e];
        let v = &batch.values[e];
        reference::advantages(c, &ep.rewards, v, ep.tail_value(), &mut work);
        let o = batch.offsets[e];
        for (t, a) in work.iter().enumerate() {
            let x = if col.kind == Kind::Return {
                a + v[t]
            } else {
                *a
            };
            sum += ((col.logged[o + t] - x) / col.tol[o + t]).powi(2);
        }
    }
    if sum.is_finite() { sum } else { f64::MAX }
}

/// `points` points from center - half to center + half, clamped to [min, max].
fn axis(center: f64, half: f64, points: usize, min: f64, max: f64) -> Vec<f64> {
    let step = 2.0 * half / (points - 1) as f64;
    (0..points)
        .map(|k| (center - half + k as f64 * step).clamp(min, max))
        .collect()
}

/// The gamma (and, for GAE, lambda) that fit the column best, with the fitted parameters.
pub fn gamma_lambda(
    batch: &Batch,
    cfg: &CheckConfig,
    col: &Column,
) -> (Claimed, BTreeMap<&'static str, f64>) {
    let mut episodes = 0;
    let mut steps = 0;
    while episodes < batch.episodes.len() && steps < FIT_STEPS {
        steps += batch.episodes[episodes].len();
        episodes += 1;
    }
    let gae = matches!(cfg.claim.claim, Claim::Gae(_));
    let lambda0 = cfg.claim.lambda().unwrap_or(1.0);
    let eval =
        |g: f64, l: f64| objective(batch, col, &cfg.claim.with(g, gae.then_some(l)), episodes);
    // The coarse grid.
    let mut best = (cfg.claim.gamma, lambda0, f64::INFINITY);
    let lambdas = if gae {
        axis(0.5, 0.5, 11, 0.0, 1.0)
    } else {
        vec![lambda0]
    };
    for g in axis(0.75, 0.25, 51, 0.0, 1.0) {
        for &l in &lambdas {
            let f = eval(g, l);
            if f < best.2 {
                best = (g, l, f);
            }
        }
    }
    // Refinements: an 11 x 11 grid one step either side of the best point with a fifth of the
    // step; when the best point lies on the grid's edge (the minimum is further along a
    // valley), the grid moves there at the same step instead of shrinking.
    let (mut gstep, mut lstep) = (0.01, 0.1);
    let (mut level, mut moves) = (0, 0);
    while level < LEVELS {
        let gammas = axis(best.0, gstep, 11, 0.0, 1.0);
        let lambdas = if gae {
            axis(best.1, lstep, 11, 0.0, 1.0)
        } else {
            vec![lambda0]
        };
        let mut edge = false;
        for (i, &g) in gammas.iter().enumerate() {
            for (j, &l) in lambdas.iter().enumerate() {
                let f = eval(g, l);
                if f < best.2 {
                    best = (g, l, f);
                    let on = |k: usize, x: f64| (k == 0 || k == 10) && x > 0.0 && x < 1.0;
                    edge = on(i, g) || (gae && on(j, l));
                }
            }
        }
        if edge && moves < MAX_MOVES {
            moves += 1;
            continue;
        }
        gstep /= 5.0;
        lstep /= 5.0;
        level += 1;
    }
    let fitted = cfg.claim.with(best.0, gae.then_some(best.1));
    let mut params = BTreeMap::new();
    params.insert("gamma", best.0);
    if gae {
        params.insert("lambda", best.1);
    }
    (fitted, params)
}

/// For an n-step claim, the window n (other than the claimed one) that fits the column best.
pub fn window(batch: &Batch, cfg: &CheckConfig, col: &Column) -> Option<(Claimed, usize)> {
    let Claim::NStep(claimed) = cfg.claim.claim else {
        return None;
    };
    let longest = batch.episodes.iter().map(|e| e.len()).max().unwrap_or(1);
    let (mut episodes, mut steps) = (0, 0);
    while episodes < batch.episodes.len() && steps < FIT_STEPS {
        steps += batch.episodes[episodes].len();
        episodes += 1;
    }
    let with = |n: usize| Claimed {
        claim: Claim::NStep(n),
        gamma: cfg.claim.gamma,
    };
    (1..=longest.min(MAX_WINDOW))
        .filter(|&n| n != claimed)
        .map(|n| (n, objective(batch, col, &with(n), episodes)))
        .min_by(|a, b| a.1.total_cmp(&b.1).then(a.0.cmp(&b.0)))
        .map(|(n, _)| (with(n), n))
}
