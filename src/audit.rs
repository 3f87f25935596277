//! The audit pipeline: one pass over the log turning each episode into its contribution row,
//! then the bootstrap and half splits over those rows, then the statistics, into the report
//! model. No step-level data outlives its episode.

use crate::contrib::{Plan, Work};
use crate::episode::End;
use crate::error::{Error, Result};
use crate::estimator::{Estimator, Need};
use crate::log::{LogReader, Role, Schema};
use crate::report::{
    AuditReport, EstimatorRow, InputSummary, ReferenceFigures, Settings, Skipped, Verdict,
};
use crate::resample;
use crate::stats::{self, StatsConfig};
use ndarray::Array2;
use std::cmp::Ordering;

/// How to audit. Defaults are the documented ones.
#[derive(Debug, Clone, PartialEq)]
pub struct AuditConfig {
    /// Discount factor of the discounted estimators.
    pub gamma: f64,
    /// Estimators to compare; `None` means every estimator the log's columns allow.
    pub estimators: Option<Vec<Estimator>>,
    /// The unbiased reference that bias is measured against.
    pub reference: Estimator,
    /// Bootstrap replicates B.
    pub resamples: usize,
    pub seed: u64,
    pub confidence: f64,
    pub target_snr: f64,
    /// Random half splits for cosine_half.
    pub splits: usize,
    /// What the contribution matrix and the resampled rows may hold.
    pub budget: crate::limits::Budget,
    /// A policy file to compute the score vectors from the obs and act columns.
    pub policy: Option<String>,
    /// Which scores to use when the log has score columns and a policy is given.
    pub scores_from: Option<ScoresFrom>,
    /// The score columns are this many random-projection sketches of the full score vector.
    pub sketch: Option<usize>,
    /// A cross-fitted critic replacing the log's value column (see critic.rs).
    pub critic: Option<crate::critic::Critic>,
    /// Whether to project a policy network's scores (policy/projection.rs).
    pub project: crate::policy::projection::ProjectMode,
    /// A value network description computing V(s_t) (critic/net.rs).
    pub value_net: Option<String>,
    /// Level of the table-wide bias decisions (stats/multiplicity.rs).
    pub bias_level: f64,
    /// Which error rate the bias decisions control across the table.
    pub multiplicity: stats::Multiplicity,
    /// How episodes are resampled (the multinomial bootstrap, or the streamed Poisson one).
    pub resampling: Resampling,
    /// Whether each per-episode row gets its mse interval (stats/mse.rs): the
    /// gate asks for it when a rule reads mse, snr or ess. Multinomial resampling only.
    pub mse_intervals: bool,
}

/// The bootstrap scheme of an audit.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Resampling {
    /// n draws with replacement from the n episodes (the contribution matrix is held).
    Multinomial,
    /// Independent Poisson(1) weights keyed by episode id, summed as episodes finish
    /// (resample/poisson.rs): memory independent of the episode count, shards merge exactly.
    Poisson,
}

impl Resampling {
    pub fn name(self) -> &'static str {
        match self {
            Resampling::Multinomial => "multinomial",
            Resampling::Poisson => "poisson",
        }
    }
}

/// Where score vectors come from when both are available.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ScoresFrom {
    Policy,
    Columns,
}

impl Default for AuditConfig {
    fn default() -> Self {
        AuditConfig {
            gamma: 0.99,
            estimators: None,
            reference: Estimator::Rtg,
            resamples: 2000,
            seed: DEFAULT_SEED,
            confidence: 0.95,
            target_snr: 1.0,
            splits: 200,
            budget: crate::limits::Budget::default(),
            policy: None,
            scores_from: None,
            sketch: None,
            critic: None,
            project: crate::policy::projection::ProjectMode::Auto,
            value_net: None,
            bias_level: stats::BIAS_LEVEL,
            multiplicity: stats::Multiplicity::Holm,
            resampling: Resampling::Multinomial,
            mse_intervals: false,
        }
    }
}

/// The seed used when none is given; printed in every report so a run can be repeated.
pub const DEFAULT_SEED: u64 = 20_240_917;

/// Below this many episodes the bootstrap intervals are flagged as unreliable (common practice,
/// no single source: percentile intervals need a moderate sample to be near nominal coverage).
pub const FEW_EPISODES: usize = 20;

impl AuditConfig {
    /// Whether values come from elsewhere than the log's value column (a fitted critic or a
    /// value network), so that value-based estimators are available.
    pub fn fitted_values(&self) -> bool {
        self.critic.is_some() || self.value_net.is_some()
    }

    /// Checks values that the option parser cannot.
    pub fn validate(&self) -> Result<()> {
        if self.critic.is_some() && self.value_net.is_some() {
            return Err(Error::usage(
                "--fit-value and --value-net both give V(s_t); choose one",
            ));
        }
        if !(0.0..=1.0).contains(&self.gamma) {
            return Err(Error::usage(format!(
                "--gamma {} must lie in [0, 1]",
                self.gamma
            )));
        }
        if self.resamples < 2 {
            return Err(Error::usage("--resamples must be at least 2"));
        }
        // A first bound before the log is opened: every resampled row holds at least one
        // number (the exact check, with the row width, follows once the header is read).
        let rows = self.resamples as u128 + 2 * self.splits as u128;
        self.budget.check(
            crate::limits::bytes(rows, 8),
            || {
                format!(
                    "--resamples {} and --splits {} ({rows} resampled rows)",
                    self.resamples, self.splits
                )
            },
            "use fewer --resamples or --splits, or raise --max-memory",
        )?;
        if self.splits == 0 {
            return Err(Error::usage(
                "--splits 0: cosine_half needs at least one random half split",
            ));
        }
        if !(self.confidence > 0.0 && self.confidence < 1.0) {
            return Err(Error::usage(
                "--confidence must lie strictly between 0 and 1",
            ));
        }
        if !(self.bias_level > 0.0 && self.bias_level < 1.0) {
            return Err(Error::usage(
                "--bias-level must lie strictly between 0 and 1",
            ));
        }
        if !(self.target_snr > 0.0 && self.target_snr.is_finite()) {
            return Err(Error::usage("--target-snr must be a positive number"));
        }
        if self.reference.batch_dependent() {
            return Err(Error::usage(format!(
                "--reference {}: the reference must be a per-episode estimator",
                self.reference
            )));
        }
        Ok(())
    }
}

/// Which requested estimators the log's columns allow, and why the others are skipped.
pub fn select(
    schema: &Schema,
    requested: Option<&[Estimator]>,
    reference: Estimator,
    fitted_values: bool,
) -> Result<(Vec<Estimator>, Vec<Skipped>)> {
    let has = |need: &Need| match need {
        Need::Value => schema.has(Role::Value) || fitted_values,
        Need::Q => schema.has(Role::Q),
    };
    let explicit = requested.is_some();
    let mut wanted: Vec<Estimator> = requested.map_or_else(Estimator::default_set, <[_]>::to_vec);
    if !wanted.contains(&reference) {
        wanted.insert(0, reference);
    }
    let mut chosen = Vec::new();
    let mut skipped = Vec::new();
    for e in wanted {
        let missing: Vec<&str> = e
            .needs()
            .iter()
            .filter(|n| !has(n))
            .map(|n| n.column())
            .collect();
        if missing.is_empty() {
            chosen.push(e);
        } else if e == reference {
            return Err(Error::usage(format!(
                "the reference estimator {e} needs the column(s) {} which the log lacks",
                missing.join(", ")
            )));
        } else {
            let how = if explicit { "requested but " } else { "" };
            skipped.push(Skipped {
                name: e.to_string(),
                reason: format!(
                    "{how}needs the {} column(s), absent from the log",
                    missing.join(", ")
                ),
            });
        }
    }
    Ok((chosen, skipped))
}

/// Orders episode ids canonically: integer ids first, by value, then all others; ties (the
/// integers `1` and `01`) and all other ids by their raw bytes. A total order on the raw
/// bytes, so any row order of the same episodes sorts them the same way. (Comparing
/// "numerically when both are integers, else as text" is not a total order for mixed ids:
/// 9 < 10 < "1a" < 9. A sort needs a total order, and would panic without one.)
#[cfg(test)]
fn id_order(a: &[u8], b: &[u8]) -> Ordering {
    id_order_parsed((parse_id(a), a), (parse_id(b), b))
}

/// The integer value of an id, when it is one.
fn parse_id(id: &[u8]) -> Option<i64> {
    std::str::from_utf8(id).ok()?.parse().ok()
}

fn id_order_parsed(a: (Option<i64>, &[u8]), b: (Option<i64>, &[u8])) -> Ordering {
    match (a.0, b.0) {
        (Some(x), Some(y)) => x.cmp(&y).then_with(|| a.1.cmp(b.1)),
        (Some(_), None) => Ordering::Less,
        (None, Some(_)) => Ordering::Greater,
        (None, None) => a.1.cmp(b.1),
    }
}

/// The raw ids of the collected episodes, packed in one buffer (no allocation per episode),
/// with their integer values parsed once for sorting.
#[derive(Default)]
struct Ids {
    bytes: Vec<u8>,
    ends: Vec<usize>,
    numbers: Vec<Option<i64>>,
}

impl Ids {
    /// Bytes held per episode during sorting: its index and a visited flag.
    const SORT_BYTES: u64 = 8 + 1;

    fn push(&mut self, key: &[u8]) {
        self.bytes.extend_from_slice(key);
        self.ends.push(self.bytes.len());
        self.numbers.push(parse_id(key));
    }

    fn len(&self) -> usize {
        self.ends.len()
    }

    /// Bytes the three buffers hold (their capacity).
    fn heap_bytes(&self) -> u64 {
        (self.bytes.capacity() + 8 * self.ends.capacity() + 16 * self.numbers.capacity()) as u64
    }

    /// [`Ids::push`], first charging the buffers' growth to `charge` (which also holds
    /// `base` bytes of other buffers).
    fn push_charged(
        &mut self,
        key: &[u8],
        charge: &mut crate::limits::Charge,
        base: u64,
        what: &dyn Fn() -> String,
        fix: &str,
    ) -> Result<()> {
        let rest = base + self.heap_bytes() - self.bytes.capacity() as u64;
        charge.reserve(&mut self.bytes, key.len(), rest, what, fix)?;
        let rest = base + self.heap_bytes() - 8 * self.ends.capacity() as u64;
        charge.reserve(&mut self.ends, 1, rest, what, fix)?;
        let rest = base + self.heap_bytes() - 16 * self.numbers.capacity() as u64;
        charge.reserve(&mut self.numbers, 1, rest, what, fix)?;
        self.push(key);
        Ok(())
    }

    fn get(&self, i: usize) -> &[u8] {
        let start = if i == 0 { 0 } else { self.ends[i - 1] };
        &self.bytes[start..self.ends[i]]
    }

    /// Indices in canonical order (see [`id_order`]).
    fn order(&self) -> Vec<usize> {
        let mut order: Vec<usize> = (0..self.len()).collect();
        order.sort_unstable_by(|&a, &b| {
            id_order_parsed(
                (self.numbers[a], self.get(a)),
                (self.numbers[b], self.get(b)),
            )
        });
        order
    }
}

mod scoring;
pub use scoring::{Scorer, Scores, scores};
mod cosine;
mod significance;

/// The result of the single pass: one contribution row per episode, in canonical order.
pub struct Collected {
    pub contrib: Array2<f64>,
    pub input: InputSummary,
    pub warnings: crate::warnings::Warnings,
    /// What the rows and the resampling to come hold on the budget's ledger, until dropped.
    _held: [crate::limits::Charge; 2],
}

/// Bytes of one resampled row (a replicate or a half split): the mean row, and its
/// per-estimator gradients and norms in the statistics.
fn resampled_row_bytes(plan: &Plan) -> u128 {
    let per_estimator = (plan.estimators.len() as u128 + 1) * plan.d as u128;
    8 * (plan.width() as u128 + per_estimator + 8)
}

/// Refuses --resamples and --splits whose rows exceed the budget, before reading or
/// allocating anything; returns the bytes they will hold.
fn check_resampled(plan: &Plan, cfg: &AuditConfig) -> Result<u128> {
    let rows = cfg.resamples as u128 + 2 * cfg.splits as u128;
    let need = crate::limits::bytes(rows, resampled_row_bytes(plan));
    cfg.budget.check(
        need,
        || {
            format!(
                "--resamples {} and --splits {} ({rows} resampled rows of {} summary columns)",
                cfg.resamples,
                cfg.splits,
                plan.width()
            )
        },
        "use fewer --resamples or --splits, audit fewer estimators, or raise --max-memory",
    )?;
    Ok(need)
}

/// What the single pass leaves besides the contribution rows: the input summary (complete but
/// for the critic's explained variance), the warnings, and the critics' exact sums.
pub struct Pass {
    pub input: InputSummary,
    pub warnings: crate::warnings::Warnings,
    /// Explained variance of the recorded values, then of the fitted ones.
    pub recorded: crate::critic::ExplainedVariance,
    pub fitted: crate::critic::ExplainedVariance,
}

/// The single pass over the log: scores each episode, applies the fitted critic or value
/// network, counts it, and hands its id and contribution row to `sink` (the episode is dropped
/// afterwards). `sink` sees the episodes in the order they end.
pub fn pass<F>(
    mut reader: LogReader,
    plan: &Plan,
    cfg: &AuditConfig,
    scores: &Scores,
    mut sink: F,
) -> Result<Pass>
where
    F: FnMut(&[u8], &[f64], &InputSummary) -> Result<()>,
{
    let mut row = vec![0.0; plan.width()];
    let mut work = Work::default();
    let mut input = InputSummary {
        file: reader.file().to_string(),
        ..InputSummary::default()
    };
    // Exact sums (critic/exact.rs): the figures do not depend on the order episodes end in.
    let (mut recorded, mut fitted) = (
        crate::critic::ExplainedVariance::default(),
        crate::critic::ExplainedVariance::default(),
    );
    let mut buf = Vec::new();
    let value_net = cfg
        .value_net
        .as_deref()
        .map(|path| crate::critic::net::ValueCritic::load(path, reader.schema()))
        .transpose()?;
    let mut clip = scores.clip.clone();
    let mut scorer = Scorer::new(scores).with_budget(&cfg.budget);
    while let Some(mut ep) = scorer.next(&mut reader)? {
        if let Some(c) = &mut clip {
            c.push(&ep);
        }
        recorded.push_episode(&ep, plan.gamma, &mut buf);
        if let Some(critic) = &cfg.critic {
            critic.apply(&mut ep);
            fitted.push_episode(&ep, plan.gamma, &mut buf);
        }
        if let Some(v) = &value_net {
            v.apply(&mut ep);
            fitted.push_episode(&ep, plan.gamma, &mut buf);
        }
        input.episodes += 1;
        input.steps += ep.len() as u64;
        match ep.end {
            End::Terminated => input.terminated += 1,
            End::Truncated { .. } => input.truncated += 1,
        }
        plan.contribute(&ep, &mut work, &mut row);
        sink(&ep.key, &row, &input)?;
    }
    finish_input(
        &mut input,
        &reader,
        plan,
        cfg,
        scores,
        [&recorded, &fitted],
        value_net.as_ref(),
    );
    if let Some(v) = input.value_net.as_mut() {
        v.explained_variance = fitted.value();
    }
    let mut warnings = reader.warnings().clone();
    if cfg.fitted_values() {
        // The fitted critic or the value network gave every truncated end a bootstrap value.
        warnings.remove("truncated_without_bootstrap");
    } else {
        let hint = crate::critic::net::no_bootstrap_hint(reader.schema(), "pass");
        warnings.amend(crate::critic::net::NO_BOOTSTRAP, &hint);
    }
    if let Some(c) = &clip {
        c.warn(&mut warnings);
    }
    Ok(Pass {
        input,
        warnings,
        recorded,
        fitted,
    })
}

/// Reads every episode, reducing each to its contribution row under `plan`. Fails with fewer
/// than 2 episodes, and as soon as the rows (with the resampled rows to come) would exceed the
/// memory budget.
pub fn collect(
    reader: LogReader,
    plan: &Plan,
    cfg: &AuditConfig,
    scores: &Scores,
) -> Result<Collected> {
    let width = plan.width();
    let fixed = check_resampled(plan, cfg)?;
    // On the budget's one ledger (with the reader's blocks, open episodes and finished ids):
    // the resampled rows and each episode's share of the resampling scratch, and the
    // summaries (contribution rows and ids, at their buffers' capacity).
    let mut resampling = cfg.budget.charge(crate::limits::Holder::Resampling);
    let mut summaries = cfg.budget.charge(crate::limits::Holder::Summaries);
    let scratch = crate::resample::scratch_bytes(1) as u64;
    let fixed = u64::try_from(fixed).unwrap_or(u64::MAX);
    let fix = "audit fewer estimators, use fewer --resamples, or raise --max-memory";
    let mut ids = Ids::default();
    let mut flat: Vec<f64> = Vec::new();
    let pass = pass(reader, plan, cfg, scores, |key, row, input| {
        let n = ids.len() as u64 + 1;
        let what = || {
            format!(
                "{}: {n} episodes x {width} summary columns (plus {} resampled rows)",
                input.file,
                cfg.resamples as u128 + 2 * cfg.splits as u128
            )
        };
        resampling.set(fixed.saturating_add(n.saturating_mul(scratch)), what, fix)?;
        summaries.reserve(&mut flat, width, ids.heap_bytes(), what, fix)?;
        ids.push_charged(key, &mut summaries, 8 * flat.capacity() as u64, &what, fix)?;
        flat.extend_from_slice(row);
        Ok(())
    })?;
    let n = ids.len();
    check_episodes(n, &pass.input.file)?;
    // Canonical order, so the same episodes in another row order give identical numbers;
    // the sort holds an index and a visited flag per episode.
    summaries.set(
        summaries.bytes() + Ids::SORT_BYTES * n as u64,
        || format!("{}: sorting {n} episodes by id", pass.input.file),
        fix,
    )?;
    let order = ids.order();
    drop(ids);
    permute_rows(&mut flat, width, &order);
    drop(order);
    summaries.force(8 * flat.capacity() as u64);
    let contrib = Array2::from_shape_vec((n, width), flat).expect("n x width values");
    Ok(Collected {
        contrib,
        input: pass.input,
        warnings: pass.warnings,
        _held: [resampling, summaries],
    })
}

/// An analysis needs at least 2 episodes to estimate a variance.
pub fn check_episodes(n: usize, file: &str) -> Result<()> {
    if n < 2 {
        return Err(Error::usage(format!(
            "{file}: the log holds {n} episode(s); an analysis needs at least 2 to estimate a variance"
        )));
    }
    Ok(())
}

/// Completes the input summary once the log is read: file, counts, where scores came from, and
/// the critics' explained variance (recorded, then fitted or from the value network).
fn finish_input(
    input: &mut InputSummary,
    reader: &LogReader,
    plan: &Plan,
    cfg: &AuditConfig,
    scores: &Scores,
    [recorded, fitted]: [&crate::critic::ExplainedVariance; 2],
    value_net: Option<&crate::critic::net::ValueCritic>,
) {
    input.file = reader.file().to_string();
    input.rows = reader.rows();
    input.score_dim = plan.d;
    input.parameters = scores.names.clone();
    input.value_net = value_net.map(|v| v.summary());
    input.scores_from = if scores.policy.is_some() {
        "policy"
    } else {
        "columns"
    }
    .to_string();
    input.critic = crate::critic::CriticQuality {
        recorded_explained_variance: reader
            .schema()
            .has(Role::Value)
            .then(|| recorded.value())
            .flatten(),
        fitted_explained_variance: fitted.value().filter(|_| cfg.critic.is_some()),
        fitted_folds: cfg.critic.as_ref().map(|c| c.folds()),
        fitted_features: cfg.critic.as_ref().map(|c| c.features()),
    };
}

/// Reorders the rows of a row-major `n x width` buffer in place so that new row i is old row
/// `order[i]`, following the permutation's cycles with one spare row (no second copy of the
/// matrix, which for large logs is the largest allocation of a run).
fn permute_rows(flat: &mut [f64], width: usize, order: &[usize]) {
    let mut done = vec![false; order.len()];
    let mut spare = vec![0.0; width];
    for start in 0..order.len() {
        if done[start] {
            continue;
        }
        spare.copy_from_slice(&flat[start * width..(start + 1) * width]);
        let mut i = start;
        loop {
            done[i] = true;
            let j = order[i];
            if j == start {
                flat[i * width..(i + 1) * width].copy_from_slice(&spare);
                break;
            }
            flat.copy_within(j * width..(j + 1) * width, i * width);
            i = j;
        }
    }
}

/// Adds the few-episodes warning when it applies.
pub fn few_episodes_warning(n: usize, warnings: &mut crate::warnings::Warnings) {
    if n < FEW_EPISODES {
        warnings.add(
            "few_episodes",
            format!(
                "only {n} episodes (fewer than {FEW_EPISODES}): bootstrap intervals are unreliable"
            ),
            None,
        );
    }
}

/// Mean rows of the full sample, of every bootstrap replicate and of every half split.
pub struct Resampled {
    pub point: Vec<f64>,
    pub replicates: Array2<f64>,
    pub halves: Array2<f64>,
}

pub fn resample_all(data: &Collected, cfg: &AuditConfig) -> Resampled {
    let contrib = &data.contrib;
    let point: Vec<f64> = contrib
        .mean_axis(ndarray::Axis(0))
        .expect("collect() guarantees n >= 2")
        .to_vec();
    let seed = cfg.seed;
    let replicates = resample::weighted_means(contrib.view(), cfg.resamples, |b, w| {
        resample::bootstrap_counts(seed, b as u64, w)
    });
    let halves = resample::weighted_means(contrib.view(), 2 * cfg.splits, |r, w| {
        let (mut first, mut second) = (vec![0.0; w.len()], vec![0.0; w.len()]);
        resample::half_split(seed, (r / 2) as u64, &mut first, &mut second);
        w.copy_from_slice(if r % 2 == 0 { &first } else { &second });
    });
    Resampled {
        point,
        replicates,
        halves,
    }
}

/// The replicate gradients of an audit, computed from the contribution rows one estimator at
/// a time (bootstrap and half splits as in [`resample_all`], same seeds and blocks), so no
/// replicate rows of the full width and no B x estimators x d array are held.
pub struct Resampler<'a> {
    pub plan: &'a Plan,
    pub contrib: ndarray::ArrayView2<'a, f64>,
    pub seed: u64,
    pub resamples: usize,
    pub splits: usize,
}

impl<'a> Resampler<'a> {
    /// The resampler of an audit's contribution rows, with the run's seed, resamples and splits.
    pub fn of(plan: &'a Plan, contrib: ndarray::ArrayView2<'a, f64>, cfg: &AuditConfig) -> Self {
        Resampler {
            plan,
            contrib,
            seed: cfg.seed,
            resamples: cfg.resamples,
            splits: cfg.splits,
        }
    }

    fn gradients<W>(&self, k: usize, rows: usize, weights: W) -> (Array2<f64>, usize)
    where
        W: Fn(usize, &mut [f64]) + Sync,
    {
        let grad = |mean: &[f64], out: &mut [f64]| {
            self.plan.gradient_from_columns(k, mean, out)
                == crate::contrib::GradNote::ConstantReturns
        };
        let cols = self.plan.columns(k);
        resample::weighted_gradients(self.contrib, rows, cols, self.plan.d, weights, grad)
    }
}

impl stats::ReplicateGradients for Resampler<'_> {
    fn bootstrap(&self, k: usize) -> (Array2<f64>, usize) {
        let seed = self.seed;
        self.gradients(k, self.resamples, |b, w| {
            resample::bootstrap_counts(seed, b as u64, w)
        })
    }

    fn halves(&self, k: usize) -> Array2<f64> {
        let seed = self.seed;
        let (grads, _) = self.gradients(k, 2 * self.splits, |r, w| {
            let (mut first, mut second) = (vec![0.0; w.len()], vec![0.0; w.len()]);
            resample::half_split(seed, (r / 2) as u64, &mut first, &mut second);
            w.copy_from_slice(if r % 2 == 0 { &first } else { &second });
        });
        grads
    }
}

/// Every estimator's statistics and the signal, streamed over the estimators (see
/// [`Resampler`]); `per_coord` asks for the per-coordinate terms of the squared figures.
pub fn statistics(
    data: &Collected,
    plan: &Plan,
    reference: usize,
    cfg: &AuditConfig,
    per_coord: bool,
) -> (Vec<stats::EstimatorStats>, stats::Signal) {
    let contrib = &data.contrib;
    let point: Vec<f64> = contrib
        .mean_axis(ndarray::Axis(0))
        .expect("collect() guarantees n >= 2")
        .to_vec();
    let source = Resampler::of(plan, contrib.view(), cfg);
    let scfg = StatsConfig {
        episodes: contrib.nrows(),
        confidence: cfg.confidence,
        target_snr: cfg.target_snr,
        per_coord,
        bias_level: cfg.bias_level,
        multiplicity: cfg.multiplicity,
    };
    let (mut stats, signal) = stats::summarise_with(plan, reference, &point, &source, &scfg);
    // cosine_half's interval from the episode jackknife, not the split cosines' spread.
    for (k, st) in stats.iter_mut().enumerate() {
        if let Some(c) = st.cosine_half {
            let splits = (cfg.seed, cfg.splits);
            let iv = cosine::interval(plan, contrib.view(), k, splits, c, cfg.confidence);
            st.cosine_half_interval = iv;
        }
    }
    (stats, signal)
}

/// What an audit fixes before reading episodes: where scores come from, the estimators and
/// their contribution layout.
pub struct Prepared {
    pub scores: Scores,
    pub plan: Plan,
    /// Index of the reference in `plan.estimators`.
    pub reference: usize,
    pub skipped: Vec<Skipped>,
}

/// Checks the config against the log's header and plans the contributions.
pub fn prepare(reader: &LogReader, cfg: &AuditConfig) -> Result<Prepared> {
    cfg.validate()?;
    let scores = scores(reader, cfg)?;
    let d = scores.dim;
    if let Some(k) = cfg.sketch {
        if scores.policy.is_some() {
            return Err(Error::usage(
                "--score-sketch describes logged score columns; it does not combine with --policy scores",
            ));
        }
        if k != d {
            return Err(Error::usage(format!(
                "{}: --score-sketch {k} but the log has {d} score columns; give the number of \
                 projection columns",
                reader.file()
            )));
        }
    }
    let (estimators, skipped) = select(
        reader.schema(),
        cfg.estimators.as_deref(),
        cfg.reference,
        cfg.fitted_values(),
    )?;
    let reference = estimators
        .iter()
        .position(|e| *e == cfg.reference)
        .expect("select() keeps the reference");
    // The moment columns give each replicate its own variance, for the noise scale's interval.
    let plan = Plan::new(estimators, cfg.gamma, d).with_moments(reference);
    Ok(Prepared {
        scores,
        plan,
        reference,
        skipped,
    })
}

impl Prepared {
    /// The layout the report is built on.
    pub fn layout(&self, cfg: &AuditConfig) -> Layout<'_> {
        let rescale = match (cfg.sketch, &self.scores.projection) {
            (Some(k), _) => Some((k, crate::sketch::Source::Logged)),
            (None, Some(p)) => Some((p.k(), crate::sketch::Source::Computed { full_dim: p.dim() })),
            (None, None) => None,
        };
        Layout {
            plan: &self.plan,
            reference: self.reference,
            skipped: &self.skipped,
            rescale,
        }
    }
}

/// What a report needs of an audit besides its statistics (also rebuilt from shard files).
pub struct Layout<'a> {
    pub plan: &'a Plan,
    pub reference: usize,
    pub skipped: &'a [Skipped],
    /// Projection count and source when the figures are rescaled from projected scores.
    pub rescale: Option<(usize, crate::sketch::Source)>,
}

impl Layout<'_> {
    /// Whether the statistics must keep their per-coordinate terms (sketched or projected
    /// scores).
    pub fn per_coord(&self) -> bool {
        self.rescale.is_some()
    }
}

/// Runs the whole audit over an opened log.
pub fn run(reader: LogReader, cfg: &AuditConfig) -> Result<AuditReport> {
    let prep = prepare(&reader, cfg)?;
    let layout = prep.layout(cfg);
    if cfg.resampling == Resampling::Poisson {
        let mut part = streamed::accumulate(reader, &prep, cfg)?;
        let mut report = streamed::finish(&mut part, &layout, cfg)?;
        plain_ends_warning(
            cfg,
            "--resampling poisson holds no per-episode rows",
            &mut report,
        );
        return Ok(report);
    }
    let data = collect(reader, &prep.plan, cfg, &prep.scores)?;
    let n = data.contrib.nrows();
    let mut warnings = data.warnings.clone();
    few_episodes_warning(n, &mut warnings);
    let stats = statistics(&data, &prep.plan, prep.reference, cfg, layout.per_coord());
    let scale = |k: usize| {
        let iv = significance::interval(&data, &prep.plan, k, prep.reference, cfg);
        (iv, None)
    };
    let mut out = report(&layout, cfg, (data.input.clone(), warnings), stats, &scale);
    // Sketched or projected figures are rescaled in report(); the interval would not be.
    if layout.per_coord() {
        plain_ends_warning(cfg, "the scores are sketched or projected", &mut out);
    } else if cfg.mse_intervals {
        mse_intervals(&mut out, &data, &prep, cfg);
    }
    Ok(out)
}

/// When the interval ends of bias_sq and mse were asked for (a gate rule) but cannot be formed
/// in this run, says so: the ends are then the percentile ones, which under-cover with
/// heavy-tailed episodes (README, "Coverage of the intervals").
fn plain_ends_warning(cfg: &AuditConfig, why: &str, report: &mut AuditReport) {
    if cfg.mse_intervals {
        report.warnings.add(
            "percentile_interval_ends",
            format!(
                "the interval ends of bias_sq, mse and the figures built on them are the \
                 percentile ones: {why} for the studentised ends, so they may be optimistic \
                 (README, \"Coverage of the intervals\")"
            ),
            None,
        );
    }
}

/// Gives each per-episode row with a defined mse its mse interval and bias_sq's upper end
/// (stats/mse.rs);
/// the influence columns of every estimator share one pass of the bootstrap's counts.
fn mse_intervals(report: &mut AuditReport, data: &Collected, prep: &Prepared, cfg: &AuditConfig) {
    let plan = &prep.plan;
    let names: Vec<String> = plan.estimators.iter().map(|e| e.to_string()).collect();
    let defined = |k: usize| {
        let name = &names[k];
        report
            .estimators
            .iter()
            .any(|r| &r.name == name && r.mse.is_some())
    };
    let source = Resampler::of(plan, data.contrib.view(), cfg);
    let (gr, _) = stats::ReplicateGradients::bootstrap(&source, prep.reference);
    // Two draws per estimator (mse, then bias_sq), all through one pass of the counts.
    let draws: Vec<_> = (0..plan.estimators.len())
        .flat_map(|k| {
            let pair = (k, prep.reference);
            defined(k)
                .then(|| significance::interval_draws(data, plan, pair, &gr, cfg))
                .flatten()
                .unwrap_or([None, None])
        })
        .collect();
    let seed = cfg.seed;
    let spreads = stats::mse::spreads(&draws, cfg.confidence, |u| {
        resample::weighted_means(u, cfg.resamples, |b, w| {
            resample::bootstrap_counts(seed, b as u64, w)
        })
    });
    for (name, pair) in names.iter().zip(spreads.chunks(2)) {
        if let Some(row) = report.estimators.iter_mut().find(|r| &r.name == name) {
            row.mse_interval = pair[0].1;
            row.bias_sq_upper = pair[1].1.map(|i| i.high);
        }
    }
}

/// The report model from an audit's statistics, whichever resampler produced them.
pub fn report(
    layout: &Layout,
    cfg: &AuditConfig,
    (input, warnings): (InputSummary, crate::warnings::Warnings),
    (stats, signal): (Vec<stats::EstimatorStats>, stats::Signal),
    scale: &significance::ScaleIntervals,
) -> AuditReport {
    let (plan, reference) = (layout.plan, layout.reference);
    let refs = ReferenceFigures::of(&stats[reference], &signal);
    let per_coord: Vec<crate::sketch::CoordFigures> = plan
        .estimators
        .iter()
        .zip(&stats)
        .filter_map(|(e, s)| {
            s.per_coord.as_ref().map(|c| crate::sketch::CoordFigures {
                estimator: e.to_string(),
                variance: c.variance.clone(),
                bias_sq: c.bias_sq.clone(),
                mse: c.mse.clone(),
            })
        })
        .collect();
    let distinct = stats
        .iter()
        .filter(|s| s.bias_p_adjusted.is_some() && !s.repeats_a_test)
        .count();
    let mut estimators: Vec<EstimatorRow> = plan
        .estimators
        .iter()
        .zip(stats)
        .enumerate()
        .map(|(k, (e, s))| EstimatorRow::new(e.to_string(), k == reference, s, &refs))
        .collect();
    crate::report::sort_rows(&mut estimators);
    let verdict = Verdict::from_rows(&estimators, refs.signal);
    let noise_scale = significance::noise_scales(
        plan,
        reference,
        &input,
        &estimators,
        verdict.best.as_deref(),
        scale,
    );
    let (sig, gap) = (
        significance::significance(&estimators, distinct, cfg),
        significance::baseline_gap(&estimators),
    );
    let signal_coords = signal.per_coord.as_deref();
    let mut report = AuditReport {
        tool: crate::report::Tool::current(),
        input,
        settings: Settings {
            gamma: cfg.gamma,
            resamples: cfg.resamples,
            seed: cfg.seed,
            confidence: cfg.confidence,
            target_snr: cfg.target_snr,
            reference: cfg.reference.to_string(),
            splits: cfg.splits,
            resampling: cfg.resampling.name().to_string(),
        },
        signal: refs.signal,
        signal_interval: refs.signal_interval,
        reference_variance: refs.variance,
        estimators,
        significance: sig,
        baseline_gap: gap,
        noise_scale,
        skipped: layout.skipped.to_vec(),
        verdict,
        warnings,
    };
    if let Some((k, source)) = layout.rescale {
        crate::sketch::rescale(&mut report, k, source, &per_coord, signal_coords);
    }
    report
}

pub mod streamed;

pub mod calibration;

#[cfg(test)]
mod tests;

#[cfg(test)]
mod props;

#[cfg(test)]
mod coverage;
