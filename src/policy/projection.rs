//! Random projections of a large policy's score vector, computed inside the tool. The audit's
//! per-episode summaries are (estimators x d) wide, so a network with thousands to millions of
//! parameters cannot be audited on its full score vector; instead every step's score s_t is
//! replaced by K projections p_tj = z_j . s_t with E[z z^T] = I, and the figures are rescaled as
//! for logged sketches (see `sketch.rs`).
//!
//! The d x K matrix is never built. The projection vector z_j is drawn group by group (one group
//! per parameter tensor, in the network's order):
//!
//! * a dense weight W of shape [out, in] gets z_j restricted to W = vec(u_j v_j^T), u_j ~ N(0,
//!   I_out), v_j ~ N(0, I_in) independent. The step-t gradient of W is delta_t x_t^T, so
//!   z_j . vec(delta_t x_t^T) = (u_j . delta_t)(v_j . x_t): O(K (in + out)) per layer and step
//!   instead of O(K in out). E[z z^T] = I still holds on the block:
//!   E[u_o v_i u_o' v_i'] = E[u_o u_o'] E[v_i v_i'] = 1[o = o'] 1[i = i'].
//! * any other tensor (biases, log standard deviations) gets plain iid N(0, 1) entries.
//!
//! Blocks are independent with mean zero, so the cross-block terms of E[z z^T] vanish. The
//! rank-one blocks are not Gaussian (their entries are products of Gaussians, with fourth moment
//! 9 instead of 3), so the spread of Hutchinson's estimate exceeds the Gaussian sqrt(2/K); the
//! report therefore measures its precision from the spread over the K projections (see
//! `sketch.rs`) instead of quoting the Gaussian bound alone.
//!
//! Group g's draws come from the RNG keyed by (seed, projection stream, g): the projection
//! depends on --seed and the network's layout only, never on the thread count or the log.

use crate::resample::{Stream, rng};
use ndarray::{Array2, ArrayView2, Axis};
use rand_distr::{Distribution, StandardNormal};

pub use super::network::{GroupGrad, ThetaGroup};

/// Policies with more parameters than this are projected unless `--project` says otherwise.
/// The exact statistics cost about B d min(B, d) per estimator (the bias noise floor needs
/// tr(S^2)) and the summaries N x L d memory; at d = 256 an audit of 17 estimators over 5,000
/// episodes holds about 170 MB of summaries and runs in seconds, at d = 5,000 it takes minutes
/// and gigabytes, while K = 64 projections cost what 64 logged score columns cost.
pub const PROJECT_ABOVE: usize = 256;

/// Projections used when the threshold is crossed: the worst-case relative error of the
/// squared figures is sqrt(2/64) = 18% for Gaussian z, and the measured error is reported.
pub const DEFAULT_K: usize = 64;

/// What `--project` asked for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum ProjectMode {
    /// Project with [`DEFAULT_K`] when d exceeds [`PROJECT_ABOVE`], else exact.
    #[default]
    Auto,
    /// Never project.
    Exact,
    /// Always project onto this many directions.
    K(usize),
}

impl ProjectMode {
    /// `auto`, `exact` (or `off`), or a number of projections K >= 2.
    pub fn parse(s: &str) -> Result<ProjectMode, String> {
        match s.trim() {
            "auto" => Ok(ProjectMode::Auto),
            "exact" | "off" => Ok(ProjectMode::Exact),
            n => match n.parse::<usize>() {
                Ok(k) if k >= 2 => Ok(ProjectMode::K(k)),
                Ok(k) => Err(format!(
                    "'{k}': give at least 2 projections (their spread measures the precision)"
                )),
                Err(_) => Err(format!(
                    "'{n}' is neither auto, exact nor a number of projections"
                )),
            },
        }
    }

    /// The number of projections for a d-parameter policy, or None for exact scores.
    pub fn k_for(self, d: usize) -> Option<usize> {
        match self {
            ProjectMode::Auto => (d > PROJECT_ABOVE).then_some(DEFAULT_K),
            ProjectMode::Exact => None,
            ProjectMode::K(k) => Some(k),
        }
    }
}

/// The projection vectors restricted to one parameter tensor.
#[derive(Debug, Clone, PartialEq)]
enum Block {
    /// A [out, in] tensor: z_j = vec(u_j v_j^T); u is K x out, v is K x in.
    Outer { u: Array2<f64>, v: Array2<f64> },
    /// Any other tensor of n entries: z is K x n.
    Plain { z: Array2<f64> },
}

/// K projection directions over a network's parameter groups.
#[derive(Debug, Clone, PartialEq)]
pub struct Projection {
    k: usize,
    dim: usize,
    blocks: Vec<Block>,
}

fn gaussian(rows: usize, cols: usize, r: &mut rand_chacha::ChaCha8Rng) -> Array2<f64> {
    Array2::from_shape_simple_fn((rows, cols), || StandardNormal.sample(r))
}

impl Projection {
    /// Draws K directions for the given groups (two-dimensional groups get rank-one blocks).
    pub fn new(groups: &[ThetaGroup], k: usize, seed: u64) -> Projection {
        let blocks = groups
            .iter()
            .enumerate()
            .map(|(g, group)| {
                let mut r = rng(seed, Stream::Projection, g as u64);
                match group.shape[..] {
                    [out, inp] => Block::Outer {
                        u: gaussian(k, out, &mut r),
                        v: gaussian(k, inp, &mut r),
                    },
                    _ => Block::Plain {
                        z: gaussian(k, group.size, &mut r),
                    },
                }
            })
            .collect();
        Projection {
            k,
            dim: groups.iter().map(|g| g.size).sum(),
            blocks,
        }
    }

    pub fn k(&self) -> usize {
        self.k
    }

    /// The full dimension d that is projected.
    pub fn dim(&self) -> usize {
        self.dim
    }

    /// The T x K projections of an episode's scores, given group by group.
    pub fn project(&self, grads: &[GroupGrad]) -> Array2<f64> {
        assert_eq!(grads.len(), self.blocks.len(), "one gradient per group");
        let steps = match &grads[0] {
            GroupGrad::Outer { delta, .. } => delta.nrows(),
            GroupGrad::Full(s) => s.nrows(),
        };
        let mut out = Array2::<f64>::zeros((steps, self.k));
        for (block, grad) in self.blocks.iter().zip(grads) {
            match (block, grad) {
                (Block::Outer { u, v }, GroupGrad::Outer { delta, input }) => {
                    // (u_j . delta_t)(v_j . x_t) for every t and j: two T x K products.
                    let a = delta.dot(&u.t());
                    let b = input.dot(&v.t());
                    ndarray::Zip::from(&mut out)
                        .and(&a)
                        .and(&b)
                        .for_each(|o, x, y| *o += x * y);
                }
                (Block::Outer { u, v }, GroupGrad::Full(s)) => {
                    out += &outer_of_full(s.view(), u.view(), v.view());
                }
                (Block::Plain { z }, GroupGrad::Full(s)) => {
                    ndarray::linalg::general_mat_mul(1.0, s, &z.t(), 1.0, &mut out);
                }
                (Block::Plain { .. }, GroupGrad::Outer { .. }) => {
                    unreachable!("a factored gradient belongs to a two-dimensional group")
                }
            }
        }
        out
    }

    /// The K x d matrix of the directions, materialised (for tests on small networks).
    pub fn matrix(&self) -> Array2<f64> {
        let blocks: Vec<Array2<f64>> = self
            .blocks
            .iter()
            .map(|b| match b {
                Block::Outer { u, v } => {
                    let (out, inp) = (u.ncols(), v.ncols());
                    Array2::from_shape_fn((self.k, out * inp), |(j, c)| {
                        u[[j, c / inp]] * v[[j, c % inp]]
                    })
                }
                Block::Plain { z } => z.clone(),
            })
            .collect();
        let views: Vec<_> = blocks.iter().map(|b| b.view()).collect();
        ndarray::concatenate(Axis(1), &views).expect("blocks share K rows")
    }
}

/// u_j^T S_t v_j for a [out, in] group whose gradient came as the full T x (out in) matrix
/// (row-major o * in + i): (S_t v^T) is out x K, then sum over o against u.
fn outer_of_full(s: ArrayView2<f64>, u: ArrayView2<f64>, v: ArrayView2<f64>) -> Array2<f64> {
    let (steps, k) = (s.nrows(), u.nrows());
    let (out, inp) = (u.ncols(), v.ncols());
    let s = s
        .as_standard_layout()
        .into_owned()
        .into_shape_with_order((steps * out, inp))
        .expect("T x (out in) gradient");
    let m = s.dot(&v.t());
    Array2::from_shape_fn((steps, k), |(t, j)| {
        (0..out).map(|o| u[[j, o]] * m[[t * out + o, j]]).sum()
    })
}

#[cfg(test)]
mod network_check;

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;

    fn groups() -> Vec<ThetaGroup> {
        [("w0", vec![3, 2]), ("b0", vec![3]), ("w1", vec![2, 3])]
            .into_iter()
            .map(|(name, shape)| ThetaGroup {
                name: name.to_string(),
                size: shape.iter().product(),
                shape,
            })
            .collect()
    }

    // E[z z^T] = I by construction (module header). Over M independent draws the average of
    // z_a z_b (a != b) has standard deviation at most sqrt(3/M) (E[u^4 v_i^2 v_i'^2] = 3 when a
    // and b share a factor u_o; 1 otherwise), and the diagonal sqrt(8/M) (z^2 = u^2 v^2 has
    // E[z^4] = 9, variance 8). With M = 20,000 rows (K = 500 x 40 seeds) that is 0.012 and
    // 0.02; we allow 5 such deviations (0.061 and 0.1).
    #[test]
    fn average_of_z_z_transpose_approaches_the_identity() {
        let g = groups();
        let d: usize = g.iter().map(|x| x.size).sum();
        let mut sum = Array2::<f64>::zeros((d, d));
        let mut m = 0usize;
        for seed in 0..40 {
            let z = Projection::new(&g, 500, seed).matrix();
            sum += &z.t().dot(&z);
            m += z.nrows();
        }
        let avg = sum / m as f64;
        let sd = 1.0 / (m as f64).sqrt();
        let (mut diag, mut off) = (0.0f64, 0.0f64);
        for a in 0..d {
            for b in 0..d {
                let dev = (avg[[a, b]] - if a == b { 1.0 } else { 0.0 }).abs();
                if a == b {
                    diag = diag.max(dev);
                } else {
                    off = off.max(dev);
                }
            }
        }
        eprintln!(
            "d = {d}, M = {m} draws: largest |avg - 1| on the diagonal {diag:.4} (tolerance {:.4}), \
             largest |avg| off it {off:.4} (tolerance {:.4})",
            5.0 * sd * 8.0f64.sqrt(),
            5.0 * sd * 3.0f64.sqrt()
        );
        for a in 0..d {
            for b in 0..d {
                let want = if a == b { 1.0 } else { 0.0 };
                let tol = 5.0 * sd * if a == b { 8.0f64.sqrt() } else { 3.0f64.sqrt() };
                assert!(
                    (avg[[a, b]] - want).abs() < tol,
                    "E[z z^T][{a},{b}] = {} (tolerance {tol})",
                    avg[[a, b]]
                );
            }
        }
    }

    fn random(rows: usize, cols: usize, seed: u64) -> Array2<f64> {
        let mut r = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        gaussian(rows, cols, &mut r)
    }

    // The factored product equals the materialised K x d matrix times the full score vector
    // (the identity z . vec(delta x^T) = (u . delta)(v . x) of the module header).
    #[test]
    fn factored_projection_equals_the_matrix_product() {
        let g = groups();
        let p = Projection::new(&g, 7, 3);
        let t = 5;
        let (d0, x0, b0) = (random(t, 3, 1), random(t, 2, 2), random(t, 3, 3));
        let (d1, x1) = (random(t, 2, 4), random(t, 3, 5));
        let full = |delta: &Array2<f64>, x: &Array2<f64>| {
            let (o, i) = (delta.ncols(), x.ncols());
            Array2::from_shape_fn((t, o * i), |(s, c)| delta[[s, c / i]] * x[[s, c % i]])
        };
        let factored = vec![
            GroupGrad::Outer {
                delta: d0.clone(),
                input: x0.clone(),
            },
            GroupGrad::Full(b0.clone()),
            GroupGrad::Outer {
                delta: d1.clone(),
                input: x1.clone(),
            },
        ];
        let scores = ndarray::concatenate(
            Axis(1),
            &[full(&d0, &x0).view(), b0.view(), full(&d1, &x1).view()],
        )
        .unwrap();
        let want = scores.dot(&p.matrix().t());
        let got = p.project(&factored);
        // The same with every gradient given in full (the Outer-block/Full-gradient path).
        let all_full = vec![
            GroupGrad::Full(full(&d0, &x0)),
            GroupGrad::Full(b0),
            GroupGrad::Full(full(&d1, &x1)),
        ];
        let got_full = p.project(&all_full);
        for ((a, b), c) in got.iter().zip(&want).zip(&got_full) {
            assert!((a - b).abs() < 1e-12 * b.abs().max(1.0), "{a} vs {b}");
            assert!((c - b).abs() < 1e-12 * b.abs().max(1.0), "{c} vs {b}");
        }
        assert_eq!(p.dim(), 15);
    }

    #[test]
    fn directions_depend_on_the_seed_only() {
        let g = groups();
        assert_eq!(Projection::new(&g, 4, 9), Projection::new(&g, 4, 9));
        assert_ne!(Projection::new(&g, 4, 9), Projection::new(&g, 4, 10));
    }

    #[test]
    fn modes_parse_and_choose() {
        assert_eq!(ProjectMode::parse("auto"), Ok(ProjectMode::Auto));
        assert_eq!(ProjectMode::parse("exact"), Ok(ProjectMode::Exact));
        assert_eq!(ProjectMode::parse("16"), Ok(ProjectMode::K(16)));
        assert!(ProjectMode::parse("1").is_err());
        assert!(ProjectMode::parse("lots").is_err());
        assert_eq!(ProjectMode::Auto.k_for(PROJECT_ABOVE), None);
        assert_eq!(ProjectMode::Auto.k_for(PROJECT_ABOVE + 1), Some(DEFAULT_K));
        assert_eq!(ProjectMode::Exact.k_for(1_000_000), None);
        assert_eq!(ProjectMode::K(8).k_for(10), Some(8));
    }
}
