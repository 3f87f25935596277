//! Statistics of each estimator's batch gradient from the bootstrap replicates: variance trace,
//! paired squared bias against the reference with the noise floor removed, MSE, SNR, ESS, the
//! half-split cosine, batch-size planning and percentile intervals.
//!
//! With g_k(b) estimator k's gradient in replicate b (B replicates, dimension d) and
//! D_k(b) = g_k(b) - g_ref(b) the paired difference:
//! - variance V_k = sum_j V_kj, V_kj the sample variance (B - 1 denominator) of g_kj(b);
//! - bias_sq = max(0, sum_j [(g_kj - g_ref,j)^2 - V_D,j]) at the point estimates, V_D the
//!   variance of D_k (the paired noise floor); mse = bias_sq + V_k;
//! - signal = max(0, sum_j [g_ref,j^2 - V_ref,j]); snr = signal / mse; ess = N V_ref / mse;
//! - bias_z = (||g_k - g_ref||^2 - tr S) / sqrt(2 tr S^2), S the sample covariance of D_k:
//!   under no bias ||D||^2 has mean tr S and variance 2 tr S^2 (Gaussian quadratic form). It
//!   is descriptive only: the decision uses the bootstrap-null p-value of [`bias_test`],
//!   adjusted across the table by [`multiplicity`];
//! - intervals of the norms (gradient, bias): the square roots of the noise-corrected
//!   squared-norm intervals (see [`sq_norm_interval`]), so that they are intervals for the true
//!   norms, not for the norms of noisy replicates (which sit above the truth by the noise);
//! - noise_scale = N V_k / signal: the gradient noise scale B_simple = tr(Sigma) / |G|^2
//!   (McCandlish et al. 2018, eq. 2.9), Sigma the per-episode covariance, in episodes;
//!   see [`noise`].
//!   tr S^2 = ||X^T X||_F^2 / (B - 1)^2 = ||X X^T||_F^2 / (B - 1)^2 with X the centred B x d
//!   replicates; the smaller of the two Gram matrices is formed, so its cost is
//!   B d min(B, d) / 2 multiply-adds, at most B^2 d / 2: linear in d.
//!
//! Replicates are taken one estimator at a time from a [`ReplicateGradients`] source, so at
//! most two B x d matrices (the reference's, and the current estimator's, turned in place into
//! its difference from the reference) are alive, never a B x estimators x d array. Every
//! per-coordinate loop runs over contiguous rows, and each sum runs in a fixed order, so the
//! figures do not depend on the thread count.
//!
//! Undefined figures: an optional figure is `None` with a note saying why, never NaN. A
//! figure derived from an overflowed or undefined one is undefined too, never a finite
//! fallback: the f64 figures (variance, bias_sq, mse, norms, interval ends) are then NaN or
//! infinite, which the report turns into null with its own note, and the optional ones are
//! `None` with a note naming them.

pub mod bias_test;
pub mod intervals;
pub mod mse;
pub mod multiplicity;
pub mod noise;
pub mod normal;

use crate::contrib::{GradNote, Plan};
pub use multiplicity::Multiplicity;
use ndarray::{Array2, ArrayView2, Axis, linalg::general_mat_mul, s};
use rayon::prelude::*;

/// Default level of the table-wide bias decisions (family-wise with Holm, false-discovery
/// rate with Benjamini-Hochberg).
pub const BIAS_LEVEL: f64 = 0.05;

/// What the statistics need besides the data.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StatsConfig {
    /// Episodes in the log (N).
    pub episodes: usize,
    /// Two-sided confidence level of the percentile intervals, in (0, 1).
    pub confidence: f64,
    /// SNR the planning figure aims for.
    pub target_snr: f64,
    /// Also return the per-coordinate terms of the squared figures ([`PerCoord`], the signal's
    /// `per_coord`); off by default so that a normal audit keeps no d-length vectors.
    pub per_coord: bool,
    /// Level of the table-wide bias decisions, in (0, 1).
    pub bias_level: f64,
    /// Which error rate the bias decisions control across the table.
    pub multiplicity: Multiplicity,
}

/// The per-coordinate terms of one estimator's squared figures, each of length d: for
/// coordinate j, `variance[j]` is the bootstrap variance of g_kj, `bias_sq[j]` is
/// (g_kj - g_ref,j)^2 minus the bootstrap variance of the paired difference in coordinate j
/// (the noise-floor correction, so it may be negative), and `mse[j] = bias_sq[j] + variance[j]`.
/// Summed over j in index order, `variance` gives the reported variance exactly and `bias_sq`
/// the reported bias_sq exactly unless that was clamped at zero (then the sum is the negative
/// raw estimate); `mse` sums to the reported mse up to rounding under the same proviso.
/// They let figures of random projections of a larger score vector state their own precision
/// from the spread over projections.
#[derive(Debug, Clone, PartialEq)]
pub struct PerCoord {
    pub variance: Vec<f64>,
    pub bias_sq: Vec<f64>,
    pub mse: Vec<f64>,
}

/// A two-sided percentile interval.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct Interval {
    pub low: f64,
    pub high: f64,
}

/// Everything reported for one estimator.
#[derive(Debug, Clone, PartialEq)]
pub struct EstimatorStats {
    pub gradient: Vec<f64>,
    pub gradient_norm: f64,
    pub gradient_norm_interval: Interval,
    pub variance: f64,
    pub bias_sq: f64,
    /// How many null standard deviations ||g_k - g_ref||^2 lies above its no-bias mean.
    /// Bias-corrected percentile interval of bias_sq (see [`sq_norm_interval`]).
    pub bias_sq_interval: Interval,
    pub bias_z: Option<f64>,
    /// Bootstrap-null p-value of "no bias" ([`bias_test`]); None for the reference.
    pub bias_p: Option<f64>,
    /// `bias_p` adjusted across the table ([`multiplicity`]).
    pub bias_p_adjusted: Option<f64>,
    /// bias_p_adjusted <= the level: the bias is distinguishable from resampling noise.
    pub bias_detected: bool,
    pub bias_norm_interval: Interval,
    pub mse: f64,
    pub snr: Option<f64>,
    pub ess: Option<f64>,
    pub cosine_half: Option<f64>,
    pub cosine_half_interval: Option<Interval>,
    pub episodes_for_snr: Option<u64>,
    /// The bias alone keeps the SNR below the target at any batch size.
    pub bias_limited: bool,
    /// N V_k / signal: the gradient noise scale in episodes ([`noise`]); None when the signal
    /// is zero or undefined.
    pub noise_scale: Option<f64>,
    pub notes: Vec<String>,
    /// Per-coordinate terms of variance, bias_sq and mse, when [`StatsConfig::per_coord`].
    pub per_coord: Option<PerCoord>,
}

/// Statistics shared by all estimators: the reference's signal.
#[derive(Debug, Clone, PartialEq)]
pub struct Signal {
    /// max(0, ||g_ref||^2 - V_ref): the squared norm of the reference gradient, noise removed.
    pub signal: f64,
    pub signal_interval: Interval,
    pub reference_variance: f64,
    /// Per-coordinate terms g_ref,j^2 - V_ref,j of the signal before its clamp at zero (summed
    /// in index order they give the reported signal exactly unless it was clamped), when
    /// [`StatsConfig::per_coord`].
    pub per_coord: Option<Vec<f64>>,
}

/// Replicate gradients of every estimator, handed out one estimator at a time so that only
/// a few B x d matrices are alive at once.
pub trait ReplicateGradients: Sync {
    /// Estimator k's gradient in each bootstrap replicate (B x d), and in how many replicates
    /// its returns were constant (see [`GradNote::ConstantReturns`]).
    fn bootstrap(&self, k: usize) -> (Array2<f64>, usize);
    /// Estimator k's gradient in each half split (2S x d), the halves of split s in rows
    /// (2s, 2s + 1).
    fn halves(&self, k: usize) -> Array2<f64>;
}

/// Replicate gradients from stored mean rows (one contribution-layout row per replicate).
pub struct FromRows<'a> {
    pub plan: &'a Plan,
    pub replicates: ArrayView2<'a, f64>,
    pub halves: ArrayView2<'a, f64>,
}

impl FromRows<'_> {
    fn gradients(&self, k: usize, rows: ArrayView2<f64>) -> (Array2<f64>, usize) {
        let mut out = Array2::<f64>::zeros((rows.nrows(), self.plan.d));
        let constant = out
            .axis_iter_mut(Axis(0))
            .into_par_iter()
            .zip(rows.axis_iter(Axis(0)).into_par_iter())
            .map(|(mut o, row)| {
                let row = row.to_vec();
                let o = o
                    .as_slice_mut()
                    .expect("rows of a fresh array are contiguous");
                usize::from(self.plan.gradient(k, &row, o) == GradNote::ConstantReturns)
            })
            .sum();
        (out, constant)
    }
}

impl ReplicateGradients for FromRows<'_> {
    fn bootstrap(&self, k: usize) -> (Array2<f64>, usize) {
        self.gradients(k, self.replicates)
    }
    fn halves(&self, k: usize) -> Array2<f64> {
        self.gradients(k, self.halves).0
    }
}

/// Computes every estimator's statistics. `point` is the mean contribution row over all
/// episodes, `replicates` one bootstrap mean row per replicate, and `halves` the mean rows of
/// the half splits, paired as rows (2s, 2s + 1).
pub fn summarise(
    plan: &Plan,
    reference: usize,
    point: &[f64],
    replicates: ArrayView2<f64>,
    halves: ArrayView2<f64>,
    cfg: &StatsConfig,
) -> (Vec<EstimatorStats>, Signal) {
    let source = FromRows {
        plan,
        replicates,
        halves,
    };
    summarise_with(plan, reference, point, &source, cfg)
}

/// Per-coordinate mean and variance (B - 1 denominator) of the rows of `x`, and each row's
/// squared norm, each sum taken over rows in order.
struct Moments {
    mean: Vec<f64>,
    var: Vec<f64>,
    sq_norms: Vec<f64>,
}

impl Moments {
    fn of(x: ArrayView2<f64>) -> Moments {
        let (b, d) = x.dim();
        let mut mean = vec![0.0; d];
        for row in x.outer_iter() {
            mean.iter_mut().zip(row).for_each(|(m, v)| *m += v);
        }
        mean.iter_mut().for_each(|m| *m /= b as f64);
        let mut var = vec![0.0; d];
        for row in x.outer_iter() {
            for ((s, v), m) in var.iter_mut().zip(row).zip(&mean) {
                *s += (v - m) * (v - m);
            }
        }
        var.iter_mut().for_each(|s| *s /= b as f64 - 1.0);
        let sq_norms = x
            .outer_iter()
            .map(|row| row.iter().map(|v| v * v).sum())
            .collect();
        Moments {
            mean,
            var,
            sq_norms,
        }
    }
}

/// Columns per task of the Gram products in [`gram_frobenius_sq`].
const GRAM_CHUNK: usize = 64;

/// ||Y^T Y||_F^2 for Y (p x q), from the upper triangle of Y^T Y computed in column chunks
/// (in parallel; the chunk sums are added in chunk order, so the result does not depend on
/// the thread count).
fn gram_frobenius_sq(y: ArrayView2<f64>) -> f64 {
    let q = y.ncols();
    let starts: Vec<usize> = (0..q).step_by(GRAM_CHUNK).collect();
    let parts: Vec<f64> = starts
        .par_iter()
        .map(|&j0| {
            let j1 = (j0 + GRAM_CHUNK).min(q);
            let mut p = Array2::<f64>::zeros((j1, j1 - j0));
            general_mat_mul(
                1.0,
                &y.slice(s![.., ..j1]).t(),
                &y.slice(s![.., j0..j1]),
                0.0,
                &mut p,
            );
            let off: f64 = p.slice(s![..j0, ..]).iter().map(|x| x * x).sum();
            let diag: f64 = p.slice(s![j0.., ..]).iter().map(|x| x * x).sum();
            2.0 * off + diag
        })
        .collect();
    parts.iter().sum()
}

/// tr(S^2) for S the sample covariance (B - 1 denominator) of the rows of `x`, whose column
/// means are `mean`; `x` is centred in place.
fn covariance_frobenius_sq(x: &mut Array2<f64>, mean: &[f64]) -> f64 {
    let (b, d) = x.dim();
    for mut row in x.outer_iter_mut() {
        row.iter_mut().zip(mean).for_each(|(v, m)| *v -= m);
    }
    // ||X^T X||_F = ||X X^T||_F: form the smaller of the two.
    let total = if d <= b {
        gram_frobenius_sq(x.view())
    } else {
        gram_frobenius_sq(x.t())
    };
    total / ((b as f64 - 1.0) * (b as f64 - 1.0))
}

/// `x.max(0.0)` for a finite x, NaN otherwise (f64::max would turn NaN into 0).
fn nonneg(x: f64) -> f64 {
    if x.is_finite() { x.max(0.0) } else { f64::NAN }
}

/// Percentile interval of `xs`; both ends NaN when any value is not finite.
fn percentile_interval(mut xs: Vec<f64>, confidence: f64) -> Interval {
    if xs.iter().any(|x| !x.is_finite()) {
        return Interval {
            low: f64::NAN,
            high: f64::NAN,
        };
    }
    xs.sort_by(f64::total_cmp);
    let alpha = 1.0 - confidence;
    Interval {
        low: percentile(&xs, alpha / 2.0),
        high: percentile(&xs, 1.0 - alpha / 2.0),
    }
}

/// What every estimator's figures are compared with: the reference's replicates and signal.
struct Context<'a> {
    cfg: &'a StatsConfig,
    reference: usize,
    ref_reps: Array2<f64>,
    ref_point: Vec<f64>,
    v_ref: f64,
    signal: f64,
}

/// Like [`summarise`], with the replicate gradients from any source.
pub fn summarise_with(
    plan: &Plan,
    reference: usize,
    point: &[f64],
    source: &dyn ReplicateGradients,
    cfg: &StatsConfig,
) -> (Vec<EstimatorStats>, Signal) {
    let d = plan.d;
    let point_grad = |k: usize| {
        let mut p = vec![0.0; d];
        let constant = plan.gradient(k, point, &mut p) == GradNote::ConstantReturns;
        (p, constant)
    };
    let (ref_point, _) = point_grad(reference);
    let (ref_reps, ref_constant) = source.bootstrap(reference);
    let ref_moments = Moments::of(ref_reps.view());
    let v_ref: f64 = ref_moments.var.iter().sum();
    let signal_coords: Vec<f64> = ref_point
        .iter()
        .zip(&ref_moments.var)
        .map(|(g, v)| g * g - v)
        .collect();
    let signal = Signal {
        signal: nonneg(signal_coords.iter().sum()),
        signal_interval: sq_norm_interval(ref_moments.sq_norms, v_ref, cfg.confidence),
        reference_variance: v_ref,
        per_coord: cfg.per_coord.then_some(signal_coords),
    };
    let ctx = Context {
        cfg,
        reference,
        ref_reps,
        ref_point,
        v_ref,
        signal: signal.signal,
    };
    let stats = (0..plan.estimators.len())
        .map(|k| {
            // The reference's own replicates are already in ctx: no second copy.
            let (reps, constant) = if k == reference {
                (None, ref_constant)
            } else {
                let (reps, constant) = source.bootstrap(k);
                (Some(reps), constant)
            };
            let (p, point_constant) = point_grad(k);
            let pending = estimator_stats(&ctx, k, p, reps, source.halves(k));
            (pending, constant, point_constant)
        })
        .collect::<Vec<_>>();
    let raw: Vec<Option<f64>> = stats.iter().map(|(p, _, _)| p.stats.bias_p).collect();
    let adjusted = cfg.multiplicity.adjust(&raw);
    let stats = stats
        .into_iter()
        .zip(adjusted)
        .map(|((pending, constant, point_constant), adj)| {
            let mut st = decide(&ctx, pending, adj);
            constant_note(
                &mut st.notes,
                constant,
                point_constant,
                ctx.ref_reps.nrows(),
            );
            st
        })
        .collect();
    (stats, signal)
}

fn constant_note(notes: &mut Vec<String>, constant: usize, point: bool, b_count: usize) {
    if point || constant > 0 {
        notes.push(format!(
            "returns are constant in {} of {} resamples: whitening has no spread to divide \
             by, its gradient is taken as zero there",
            constant + usize::from(point),
            b_count + 1
        ));
    }
}

/// The replicate-based figures of one estimator, before the derived ones.
struct Spread {
    var_k: Vec<f64>,
    norms: Vec<f64>,
    bias_coords: Vec<f64>,
    raw_bias: f64,
    v_diff: f64,
    bias_norms: Vec<f64>,
    /// sqrt(2 tr S^2) of the paired difference (0 for the reference itself).
    spread: f64,
    /// Centred difference replicates reaching ||D||^2 ([`bias_test::exceedances`]).
    exceed: usize,
}

/// `reps` is None for the reference itself, whose paired difference is zero.
fn spread(ctx: &Context, point: &[f64], reps: Option<Array2<f64>>) -> Spread {
    let (own, diff, spread, exceed) = match reps {
        None => {
            let (b, d) = ctx.ref_reps.dim();
            let zero = Moments {
                mean: vec![0.0; d],
                var: vec![0.0; d],
                sq_norms: vec![0.0; b],
            };
            (Moments::of(ctx.ref_reps.view()), zero, 0.0, 0)
        }
        Some(mut reps) => {
            let own = Moments::of(reps.view());
            reps -= &ctx.ref_reps;
            let diff = Moments::of(reps.view());
            let d_point: Vec<f64> = point
                .iter()
                .zip(&ctx.ref_point)
                .map(|(a, r)| a - r)
                .collect();
            let exceed = bias_test::exceedances(reps.view(), &d_point);
            let spread = (2.0 * covariance_frobenius_sq(&mut reps, &diff.mean)).sqrt();
            (own, diff, spread, exceed)
        }
    };
    let bias_coords: Vec<f64> = point
        .iter()
        .zip(&ctx.ref_point)
        .zip(&diff.var)
        .map(|((a, r), v)| (a - r) * (a - r) - v)
        .collect();
    Spread {
        norms: own.sq_norms.iter().map(|x| x.sqrt()).collect(),
        raw_bias: bias_coords.iter().sum(),
        v_diff: diff.var.iter().sum(),
        bias_norms: diff.sq_norms.iter().map(|x| x.sqrt()).collect(),
        var_k: own.var,
        bias_coords,
        spread,
        exceed,
    }
}

/// Mean cosine of the half-split pairs and its interval; `Err` says why it is undefined.
fn cosine_half(halves: ArrayView2<f64>, confidence: f64) -> Result<(f64, Interval), String> {
    let mut cosines = Vec::new();
    for s in 0..halves.nrows() / 2 {
        let (a, b) = (halves.row(2 * s), halves.row(2 * s + 1));
        let dot: f64 = a.iter().zip(b).map(|(x, y)| x * y).sum();
        let na = a.iter().map(|x| x * x).sum::<f64>().sqrt();
        let nb = b.iter().map(|x| x * x).sum::<f64>().sqrt();
        let c = dot / (na * nb);
        if !(dot.is_finite() && na.is_finite() && nb.is_finite())
            || (na > 0.0 && nb > 0.0 && !c.is_finite())
        {
            return Err("cosine_half undefined: the half-batch gradients overflow f64".into());
        }
        if na > 0.0 && nb > 0.0 {
            cosines.push(c.clamp(-1.0, 1.0));
        }
    }
    if cosines.is_empty() {
        return Err("cosine_half undefined: the half-batch gradients are zero".into());
    }
    let mean = cosines.iter().sum::<f64>() / cosines.len() as f64;
    Ok((mean, percentile_interval(cosines, confidence)))
}

/// One estimator's figures before the table-wide bias decision: the decision, and what
/// follows from it (bias_limited, episodes_for_snr and their notes), is made by [`decide`].
struct Pending {
    stats: EstimatorStats,
    /// Names of undefined figures so far (the note is added once everything is decided).
    undefined: Vec<&'static str>,
    /// Where the planning notes go among the notes (after those of snr and ess).
    plan_at: usize,
    is_ref: bool,
    /// A nonzero bias with an exactly zero paired spread: no noise could explain it.
    certain: bool,
}

/// All figures of estimator k from its point gradient, replicates and half splits.
fn estimator_stats(
    ctx: &Context,
    k: usize,
    point: Vec<f64>,
    reps: Option<Array2<f64>>,
    halves: Array2<f64>,
) -> Pending {
    let cfg = ctx.cfg;
    let b_count = ctx.ref_reps.nrows();
    let sp = spread(ctx, &point, reps);
    let mut notes = Vec::new();
    let mut undefined: Vec<&'static str> = Vec::new();
    let variance: f64 = sp.var_k.iter().sum();
    let bias_sq = nonneg(sp.raw_bias);
    let mse = bias_sq + variance;
    let is_ref = k == ctx.reference;
    let bias_z = if is_ref || sp.spread == 0.0 {
        None
    } else {
        let z = sp.raw_bias / sp.spread;
        let defined = z.is_finite() && sp.spread.is_finite();
        if !defined {
            undefined.push("bias_z");
        }
        defined.then_some(z)
    };
    let diff_finite = sp.bias_norms.iter().all(|x| x.is_finite()) && sp.raw_bias.is_finite();
    let bias_p = (!is_ref && diff_finite).then(|| bias_test::p_value(sp.exceed, b_count));
    let certain = sp.spread == 0.0 && !is_ref && bias_sq.is_finite() && bias_sq > 0.0;
    let (snr, ess) = snr_and_ess(ctx, mse, &mut notes, &mut undefined);
    let plan_at = notes.len();
    let (cosine_half, cosine_half_interval) = match cosine_half(halves.view(), cfg.confidence) {
        Ok((c, iv)) => (Some(c), Some(iv)),
        Err(why) => {
            notes.push(why);
            (None, None)
        }
    };
    let gradient_norm = point.iter().map(|x| x * x).sum::<f64>().sqrt();
    let noise_scale = noise::episodes(cfg.episodes, variance, ctx.signal);
    let stats = EstimatorStats {
        gradient_norm,
        gradient_norm_interval: norm_interval(
            sp.norms.iter().map(|x| x * x).collect(),
            variance,
            cfg.confidence,
        ),
        variance,
        bias_sq,
        bias_sq_interval: sq_norm_interval(
            sp.bias_norms.iter().map(|x| x * x).collect(),
            sp.v_diff,
            cfg.confidence,
        ),
        bias_z,
        bias_p,
        bias_p_adjusted: None,
        bias_detected: false,
        bias_norm_interval: norm_interval(
            sp.bias_norms.iter().map(|x| x * x).collect(),
            sp.v_diff,
            cfg.confidence,
        ),
        mse,
        snr,
        ess,
        cosine_half,
        cosine_half_interval,
        episodes_for_snr: None,
        bias_limited: false,
        noise_scale,
        notes,
        per_coord: cfg.per_coord.then(|| PerCoord {
            mse: sp
                .bias_coords
                .iter()
                .zip(&sp.var_k)
                .map(|(b, v)| b + v)
                .collect(),
            variance: sp.var_k,
            bias_sq: sp.bias_coords,
        }),
        gradient: point,
    };
    Pending {
        stats,
        undefined,
        plan_at,
        is_ref,
        certain,
    }
}

/// The table-wide decision for one estimator, given its adjusted p-value, and what follows
/// from it: bias_limited, episodes_for_snr and their notes, then the undefined-figures note.
fn decide(ctx: &Context, pending: Pending, adjusted: Option<f64>) -> EstimatorStats {
    let Pending {
        mut stats,
        mut undefined,
        plan_at,
        is_ref,
        certain,
    } = pending;
    stats.bias_p_adjusted = adjusted;
    stats.bias_detected = !is_ref
        && (certain || adjusted.is_some_and(|p| p <= ctx.cfg.bias_level))
        && stats.bias_sq.is_finite()
        && stats.bias_sq > 0.0;
    let threshold = ctx.signal / ctx.cfg.target_snr;
    stats.bias_limited = ctx.signal > 0.0 && threshold <= stats.bias_sq && stats.bias_detected;
    let mut plan_notes = Vec::new();
    stats.episodes_for_snr = plan_episodes(
        ctx,
        [stats.variance, stats.bias_sq],
        stats.bias_limited,
        &mut plan_notes,
    )
    .unwrap_or_else(|()| {
        undefined.push("episodes_for_snr");
        None
    });
    stats.notes.splice(plan_at..plan_at, plan_notes);
    with_undefined_note(stats, undefined)
}

/// Interval for a norm ||g|| from the replicates' squared norms: the square roots of the ends
/// of [`sq_norm_interval`] (a monotone map, so the coverage carries over).
fn norm_interval(sq: Vec<f64>, v: f64, confidence: f64) -> Interval {
    let iv = sq_norm_interval(sq, v, confidence);
    Interval {
        low: iv.low.sqrt(),
        high: iv.high.sqrt(),
    }
}

/// Adds one note naming every figure that is undefined because an input overflowed f64 or is
/// itself undefined (the f64 figures among them are NaN or infinite, the others None).
fn with_undefined_note(mut st: EstimatorStats, mut names: Vec<&str>) -> EstimatorStats {
    let f64_figures = [
        ("gradient", st.gradient.iter().all(|x| x.is_finite())),
        ("gradient_norm", st.gradient_norm.is_finite()),
        (
            "gradient_norm_interval",
            finite_interval(&st.gradient_norm_interval),
        ),
        ("variance", st.variance.is_finite()),
        ("bias_sq", st.bias_sq.is_finite()),
        ("bias_sq_interval", finite_interval(&st.bias_sq_interval)),
        (
            "bias_norm_interval",
            finite_interval(&st.bias_norm_interval),
        ),
        ("mse", st.mse.is_finite()),
    ];
    let mut all: Vec<&str> = f64_figures
        .iter()
        .filter(|(_, ok)| !ok)
        .map(|(name, _)| *name)
        .collect();
    all.append(&mut names);
    if !all.is_empty() {
        st.notes.push(format!(
            "undefined (an input overflowed f64, or the figure derives from an undefined one): {}",
            all.join(", ")
        ));
    }
    st
}

fn finite_interval(iv: &Interval) -> bool {
    iv.low.is_finite() && iv.high.is_finite()
}

/// snr = signal / mse and ess = N V_ref / mse, each None when undefined.
fn snr_and_ess(
    ctx: &Context,
    mse: f64,
    notes: &mut Vec<String>,
    undefined: &mut Vec<&str>,
) -> (Option<f64>, Option<f64>) {
    if !mse.is_finite() {
        undefined.extend(["snr", "ess"]);
        return (None, None);
    }
    if mse <= 0.0 {
        notes.push(
            "snr and ess undefined: this estimator's gradient has zero error (it is constant \
             across resamples and equal to the reference)"
                .to_string(),
        );
        return (None, None);
    }
    let snr = if !ctx.signal.is_finite() || !(ctx.signal / mse).is_finite() {
        undefined.push("snr");
        None
    } else if ctx.signal > 0.0 {
        Some(ctx.signal / mse)
    } else {
        notes.push(
            "snr undefined: the reference gradient is not distinguishable from its own noise \
             (zero signal)"
                .to_string(),
        );
        None
    };
    let ess = ctx.cfg.episodes as f64 * ctx.v_ref / mse;
    let ess = if ess.is_finite() {
        Some(ess)
    } else {
        undefined.push("ess");
        None
    };
    (snr, ess)
}

/// Episodes for the target SNR: N V / (signal / target - bias_sq); None (with a note) when
/// the bias alone prevents it or the signal is zero, `Err` when an input is undefined or the
/// figure does not fit (the caller names it among the undefined figures).
fn plan_episodes(
    ctx: &Context,
    [variance, bias_sq]: [f64; 2],
    bias_limited: bool,
    notes: &mut Vec<String>,
) -> Result<Option<u64>, ()> {
    let (n, target) = (ctx.cfg.episodes as f64, ctx.cfg.target_snr);
    if !(ctx.signal.is_finite() && variance.is_finite() && bias_sq.is_finite()) {
        return Err(());
    }
    let threshold = ctx.signal / target;
    let need = if ctx.signal == 0.0 {
        notes.push("episodes_for_snr undefined: zero signal".to_string());
        return Ok(None);
    } else if bias_limited {
        notes.push(format!(
            "bias-limited: the squared bias alone ({bias_sq:.3e}) keeps snr below {target} at \
             any batch size"
        ));
        return Ok(None);
    } else if threshold <= bias_sq {
        // The point estimate says bias-limited but the bias is not detected: plan as if
        // unbiased, and say so.
        notes.push(format!(
            "episodes_for_snr assumes no bias: the estimated bias^2 ({bias_sq:.3e}) would make \
             snr {target} unreachable but is not distinguishable from noise"
        ));
        n * variance / threshold
    } else {
        n * variance / (threshold - bias_sq)
    };
    // u64::MAX as f64 is 2^64; a need at or above it does not fit.
    if need.is_finite() && need < u64::MAX as f64 {
        Ok(Some((need.ceil() as u64).max(1)))
    } else {
        Err(())
    }
}

/// Interval for a noise-corrected squared norm ||g||^2 - V from the replicates' ||g*||^2.
/// The bootstrap mean of ||g*||^2 exceeds ||g||^2 by the variance trace V, so ||g*||^2 - 2V is
/// centred on the point estimate ||g||^2 - V; its percentiles (clamped at 0) are the interval.
/// Both ends are NaN when V or any ||g*||^2 is not finite.
pub fn sq_norm_interval(sq: Vec<f64>, v: f64, confidence: f64) -> Interval {
    let iv = percentile_interval(sq, confidence);
    Interval {
        low: nonneg(iv.low - 2.0 * v),
        high: nonneg(iv.high - 2.0 * v),
    }
}
/// Linear-interpolation percentile of sorted data (the "type 7" rule of Hyndman and Fan 1996).
pub fn percentile(sorted: &[f64], p: f64) -> f64 {
    if sorted.is_empty() {
        return 0.0;
    }
    let h = (sorted.len() - 1) as f64 * p.clamp(0.0, 1.0);
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(sorted.len() - 1);
    sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
}

#[cfg(test)]
mod tests {
    use super::*;

    // Hyndman and Fan (1996) type 7 is R's default quantile(): quantile(1:5, 0.1) = 1.4.
    #[test]
    fn percentile_type_7() {
        let x = [1.0, 2.0, 3.0, 4.0, 5.0];
        assert!((percentile(&x, 0.1) - 1.4).abs() < 1e-12);
        assert_eq!(percentile(&x, 0.5), 3.0);
        assert_eq!(percentile(&x, 1.0), 5.0);
    }

    use crate::contrib::Plan;
    use crate::estimator::Estimator;
    use ndarray::Array2;

    /// Two per-episode estimators (rtg = reference, total) in d = 3, with replicate rows from
    /// a small deterministic generator, and a point row near their mean.
    fn toy(b_count: usize, spread: f64) -> (Plan, Vec<f64>, Array2<f64>, Array2<f64>) {
        let plan = Plan::new(vec![Estimator::Rtg, Estimator::Total], 0.99, 3);
        let mut state = 12345u64;
        let mut next = move || {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (state >> 11) as f64 / (1u64 << 53) as f64 - 0.5
        };
        let base = [0.4, -0.2, 0.1, 0.5, -0.1, 0.3];
        let reps = Array2::from_shape_fn((b_count, 6), |(_, c)| base[c] + spread * next());
        let halves = Array2::from_shape_fn((8, 6), |(_, c)| base[c] + spread * next());
        (plan, base.to_vec(), reps, halves)
    }

    fn config(per_coord: bool) -> StatsConfig {
        StatsConfig {
            episodes: 50,
            confidence: 0.9,
            target_snr: 1.0,
            per_coord,
            bias_level: BIAS_LEVEL,
            multiplicity: Multiplicity::Holm,
        }
    }

    // The per-coordinate terms against their definitions: the sample variance with the B - 1
    // denominator of column j, and (g_kj - g_ref,j)^2 minus the paired difference's variance.
    #[test]
    fn per_coordinate_terms_sum_to_the_reported_figures() {
        let (plan, point, reps, halves) = toy(40, 0.2);
        let (stats, signal) =
            summarise(&plan, 0, &point, reps.view(), halves.view(), &config(true));
        let sample_var = |col: &dyn Fn(usize) -> f64| {
            let m = (0..40).map(col).sum::<f64>() / 40.0;
            (0..40).map(|b| (col(b) - m).powi(2)).sum::<f64>() / 39.0
        };
        let total = &stats[1];
        let pc = total.per_coord.as_ref().expect("requested");
        for j in 0..3 {
            let v = sample_var(&|b| reps[[b, 3 + j]]);
            assert!((pc.variance[j] - v).abs() < 1e-15, "variance[{j}]");
            let vd = sample_var(&|b| reps[[b, 3 + j]] - reps[[b, j]]);
            let want = (point[3 + j] - point[j]).powi(2) - vd;
            assert!((pc.bias_sq[j] - want).abs() < 1e-15, "bias_sq[{j}]");
            assert!((pc.mse[j] - want - v).abs() < 1e-15, "mse[{j}]");
        }
        assert_eq!(pc.variance.iter().sum::<f64>(), total.variance);
        assert!(total.bias_sq > 0.0, "this toy's bias is not clamped");
        assert_eq!(pc.bias_sq.iter().sum::<f64>(), total.bias_sq);
        assert!((pc.mse.iter().sum::<f64>() - total.mse).abs() < 1e-14);
        let sc = signal.per_coord.as_ref().expect("requested");
        let v_ref: f64 = (0..3).map(|j| sample_var(&|b| reps[[b, j]])).sum();
        assert!((signal.reference_variance - v_ref).abs() < 1e-15);
        assert!(signal.signal > 0.0);
        assert_eq!(sc.iter().sum::<f64>(), signal.signal);
        for (j, c) in sc.iter().enumerate() {
            let vr = sample_var(&|b| reps[[b, j]]);
            assert!((c - (point[j] * point[j] - vr)).abs() < 1e-15);
        }
        let (plain, plain_signal) =
            summarise(&plan, 0, &point, reps.view(), halves.view(), &config(false));
        assert!(plain.iter().all(|s| s.per_coord.is_none()));
        assert!(plain_signal.per_coord.is_none());
        assert_eq!(plain[1].mse, total.mse);
    }

    // Values of +-1e308 overflow the squares: (1e308)^2 = inf, and inf - inf = NaN. Every
    // figure derived from those must come out undefined, not as a finite fallback such as
    // f64::max(NaN, 0.0) == 0.0 (a bias_sq of 0) or NaN.ceil() as u64 == 0 (1 episode).
    #[test]
    fn overflowed_inputs_give_undefined_figures_not_zero() {
        let (plan, mut point, mut reps, halves) = toy(40, 0.2);
        for b in 0..40 {
            reps[[b, 4]] = if b % 2 == 0 { 1e308 } else { -1e308 };
        }
        point[4] = 1e308;
        let (stats, signal) =
            summarise(&plan, 0, &point, reps.view(), halves.view(), &config(true));
        assert!(
            signal.signal.is_finite() && signal.signal > 0.0,
            "rtg is untouched"
        );
        assert!(stats[0].snr.is_some() && stats[0].episodes_for_snr.is_some());
        let td = &stats[1];
        assert!(!td.variance.is_finite());
        assert!(
            td.bias_sq.is_nan(),
            "bias_sq {} must not be a finite fallback",
            td.bias_sq
        );
        assert!(!td.mse.is_finite());
        assert_eq!(
            (td.snr, td.ess, td.bias_z, td.episodes_for_snr),
            (None, None, None, None)
        );
        assert!(!td.bias_detected && !td.bias_limited);
        assert!(td.gradient_norm_interval.low.is_nan() && td.bias_sq_interval.high.is_nan());
        let note = td
            .notes
            .iter()
            .find(|n| n.starts_with("undefined"))
            .expect("a note names the undefined figures");
        for name in [
            "variance",
            "bias_sq",
            "mse",
            "snr",
            "ess",
            "episodes_for_snr",
        ] {
            assert!(note.contains(name), "{name} missing from: {note}");
        }

        // An overflowed reference leaves the signal undefined, and with it every snr and plan.
        for b in 0..40 {
            reps[[b, 1]] = if b % 2 == 0 { 1e308 } else { -1e308 };
        }
        let (stats, signal) =
            summarise(&plan, 0, &point, reps.view(), halves.view(), &config(false));
        assert!(signal.signal.is_nan(), "signal {}", signal.signal);
        assert!(signal.signal_interval.low.is_nan());
        for st in &stats {
            assert_eq!((st.snr, st.episodes_for_snr), (None, None));
            assert!(!st.bias_limited);
        }
        assert!(
            stats[0]
                .notes
                .iter()
                .any(|n| n.contains("episodes_for_snr"))
        );
    }

    fn wavy(b_count: usize, d: usize, phase: f64) -> Array2<f64> {
        Array2::from_shape_fn((b_count, d), |(b, j)| {
            ((b * 7 + j * 13) as f64 * 0.37 + phase).sin() * (1.0 + j as f64 * 0.01)
        })
    }

    // tr(S^2) = sum_ij S_ij^2 with S_ij = sum_b (x_bi - m_i)(x_bj - m_j) / (B - 1): the
    // definition, summed directly, against both Gram forms (d < B and d > B), each wider than
    // one column chunk.
    #[test]
    fn covariance_frobenius_matches_its_definition() {
        for (b_count, d) in [(300, 70), (90, 150)] {
            let x = wavy(b_count, d, 0.3);
            let mean: Vec<f64> = (0..d).map(|j| x.column(j).sum() / b_count as f64).collect();
            let mut want = 0.0;
            for i in 0..d {
                for j in 0..d {
                    let c: f64 = (0..b_count)
                        .map(|b| (x[[b, i]] - mean[i]) * (x[[b, j]] - mean[j]))
                        .sum::<f64>()
                        / (b_count as f64 - 1.0);
                    want += c * c;
                }
            }
            let got = covariance_frobenius_sq(&mut x.clone(), &mean);
            assert!(
                (got / want - 1.0).abs() < 1e-12,
                "B {b_count} d {d}: {got} vs {want}"
            );
        }
    }

    // Every figure is bit-identical with 1, 2 and 3 threads, for scores wider than one Gram
    // chunk, with d both below and above B.
    #[test]
    fn wide_statistics_do_not_depend_on_the_thread_count() {
        for (b_count, d) in [(300, 70), (90, 150)] {
            let plan = Plan::new(
                vec![Estimator::Rtg, Estimator::Total, Estimator::MeanBaseline],
                0.99,
                d,
            );
            let width = plan.width();
            let reps = wavy(b_count, width, 0.1);
            let halves = wavy(20, width, 0.7);
            let mut point = wavy(1, width, 0.1).row(0).to_vec();
            point[width - 1] = 1.0; // episode length T of the auxiliary block
            let run = |threads| {
                rayon::ThreadPoolBuilder::new()
                    .num_threads(threads)
                    .build()
                    .unwrap()
                    .install(|| {
                        summarise(&plan, 0, &point, reps.view(), halves.view(), &config(true))
                    })
            };
            let one = run(1);
            assert!(one.0[1].bias_z.is_some());
            assert_eq!(one, run(2));
            assert_eq!(one, run(3));
        }
    }
}
