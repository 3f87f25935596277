//! `sweep`: one estimator family evaluated over a grid of lambda, n or gamma from a single pass
//! over the log and one shared set of resamples, so the grid points are comparable. Reports the
//! bias-variance curve, the MSE-optimal point, the points within one bootstrap standard error
//! of it, and the most conservative (least biased) of those.

use crate::audit::{self, AuditConfig, Resampled};
use crate::contrib::Plan;
use crate::error::{Error, Result};
use crate::estimator::Estimator;
use crate::log::{LogReader, Role};
use crate::report::{EstimatorRow, InputSummary, ReferenceFigures, Tool};
use crate::stats::{self, Interval, StatsConfig};
use crate::warnings::Warnings;
use serde::Serialize;

/// The swept parameter.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Over {
    Lambda,
    Nstep,
    Gamma,
}

impl Over {
    pub fn key(self) -> &'static str {
        match self {
            Over::Lambda => "lambda",
            Over::Nstep => "nstep",
            Over::Gamma => "gamma",
        }
    }

    /// The default grid, as a spec.
    pub fn default_grid(self) -> &'static str {
        match self {
            Over::Lambda => "0:1:0.05",
            Over::Nstep => "1,2,4,8,16,32,64,full",
            Over::Gamma => "0.9,0.95,0.97,0.99,0.995,1",
        }
    }

    /// Which way is conservative, said once in every report.
    pub fn conservative_side(self) -> &'static str {
        match self {
            Over::Lambda => "larger lambda trusts the critic less",
            Over::Nstep => "a longer window trusts the critic less",
            Over::Gamma => "a gamma nearer 1 discounts the objective less",
        }
    }
}

/// One grid point: its label, its numeric value and the estimator it stands for.
#[derive(Debug, Clone, PartialEq)]
pub struct GridPoint {
    pub label: String,
    pub value: f64,
    pub estimator: Estimator,
    pub gamma: f64,
}

/// The most points a start:stop:step grid may have.
const MAX_GRID: usize = 10_000;

/// Values like 0.15000000000000002 from start + i * step are rounded to 10 decimals.
fn tidy(x: f64) -> f64 {
    (x * 1e10).round() / 1e10
}

fn parse_values(spec: &str) -> Result<Vec<String>, String> {
    let spec = spec.trim();
    let parts: Vec<&str> = spec.split(':').collect();
    if parts.len() == 3 {
        let num = |t: &str| {
            t.trim()
                .parse::<f64>()
                .map_err(|_| format!("'{t}' is not a number"))
        };
        let (a, b, step) = (num(parts[0])?, num(parts[1])?, num(parts[2])?);
        let ordered = step > 0.0 && b >= a && a.is_finite() && b.is_finite();
        if !ordered {
            return Err(format!(
                "'{spec}': use start:stop:step with stop >= start and step > 0"
            ));
        }
        // Counted in f64 first: a tiny step makes a count beyond usize (or infinite).
        let count = ((b - a) / step + 1e-9).floor() + 1.0;
        if count.is_nan() || count > MAX_GRID as f64 {
            return Err(format!(
                "'{spec}': the step {} is too small, it makes {} points; at most \
                 {MAX_GRID} (use a step of at least {})",
                crate::report::table::num(step),
                crate::report::table::num(count),
                // Rounded up in the fourth digit, so that the step quoted is enough.
                crate::report::table::num((b - a) / (MAX_GRID as f64 - 1.0) * 1.001)
            ));
        }
        let count = count as usize;
        return Ok((0..count)
            .map(|i| format!("{}", tidy(a + i as f64 * step)))
            .collect());
    }
    let out: Vec<String> = spec
        .split(',')
        .map(|p| p.trim().to_string())
        .filter(|p| !p.is_empty())
        .collect();
    if out.is_empty() {
        return Err("the grid is empty".into());
    }
    Ok(out)
}

/// A grid value that must be a number in [0, 1] (lambda, gamma).
fn unit_interval(name: &str, text: &str) -> Result<f64, String> {
    let x: f64 = text
        .parse()
        .map_err(|_| format!("{name} '{text}' is not a number"))?;
    if (0.0..=1.0).contains(&x) {
        Ok(x)
    } else {
        Err(format!("{name} {text} must lie in [0, 1]"))
    }
}

/// Parses a grid spec (a comma list, or start:stop:step) for `over`. `family` is the estimator
/// swept over gamma; `gamma` the discount of lambda and n sweeps.
pub fn parse_grid(
    over: Over,
    spec: &str,
    family: Estimator,
    gamma: f64,
) -> Result<Vec<GridPoint>, String> {
    let values = parse_values(spec)?;
    let mut grid = Vec::new();
    for text in values {
        let point = match over {
            Over::Lambda => {
                let l = unit_interval("lambda", &text)?;
                GridPoint {
                    label: format!("{l}"),
                    value: l,
                    estimator: Estimator::Gae(l),
                    gamma,
                }
            }
            Over::Nstep if matches!(text.as_str(), "full" | "inf") => GridPoint {
                // The full return: nstep:N for N >= T equals gae:1 (GAE paper identity).
                label: "full".into(),
                value: f64::INFINITY,
                estimator: Estimator::Gae(1.0),
                gamma,
            },
            Over::Nstep => {
                let n: usize =
                    text.parse().ok().filter(|n| *n >= 1).ok_or_else(|| {
                        format!("n '{text}' must be a whole number >= 1, or 'full'")
                    })?;
                GridPoint {
                    label: n.to_string(),
                    value: n as f64,
                    estimator: Estimator::NStep(n),
                    gamma,
                }
            }
            Over::Gamma => {
                let g = unit_interval("gamma", &text)?;
                GridPoint {
                    label: format!("{g}"),
                    value: g,
                    estimator: family,
                    gamma: g,
                }
            }
        };
        if grid.iter().any(|p: &GridPoint| p.label == point.label) {
            return Err(format!("grid point {} appears twice", point.label));
        }
        grid.push(point);
    }
    grid.sort_by(|a, b| a.value.total_cmp(&b.value));
    Ok(grid)
}

#[derive(Debug, Clone, PartialEq)]
pub struct SweepConfig {
    /// Gamma (for lambda and n sweeps), reference, resamples, seed, confidence, target snr.
    pub audit: AuditConfig,
    pub over: Over,
    pub grid: Vec<GridPoint>,
    /// The estimator swept over gamma (rtg_discounted by default).
    pub family: Estimator,
}

/// One grid point's figures.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SweepPoint {
    pub label: String,
    /// The parameter value; null for n = full.
    pub value: Option<f64>,
    pub estimator: String,
    pub gamma: f64,
    /// Null where undefined: a sum overflowed f64, or a figure it derives from did.
    pub bias_sq: Option<f64>,
    pub bias_detected: bool,
    pub variance: Option<f64>,
    pub mse: Option<f64>,
    /// Bootstrap standard error of the MSE estimate.
    pub mse_se: Option<f64>,
    pub mse_interval: Option<Interval>,
    pub snr: Option<f64>,
    pub ess: Option<f64>,
    pub episodes_for_snr: Option<u64>,
    pub bias_limited: bool,
    pub notes: Vec<String>,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SweepSettings {
    pub over: Over,
    pub family: String,
    pub gamma: f64,
    pub reference: String,
    pub resamples: usize,
    pub seed: u64,
    pub confidence: f64,
    pub target_snr: f64,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Choice {
    /// Index of the MSE-minimising point; null when no point has a defined MSE.
    pub best: Option<usize>,
    /// Indices of the points whose MSE is within one standard error of the minimum.
    pub band: Vec<usize>,
    /// Index of the recommended point: the least biased in the band; null with `best`.
    pub recommended: Option<usize>,
    pub text: String,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SweepReport {
    pub tool: Tool,
    pub input: InputSummary,
    pub settings: SweepSettings,
    /// Null when the reference's sums overflowed.
    pub signal: Option<f64>,
    pub points: Vec<SweepPoint>,
    pub choice: Choice,
    pub warnings: Warnings,
}

/// Refuses sweeps the data cannot support: projected scores (not rescaled here), value-based
/// grids without a value column or critic, and batch-dependent families.
fn check_sweepable(reader: &LogReader, cfg: &SweepConfig, scores: &audit::Scores) -> Result<()> {
    if scores.projection.is_some() {
        return Err(Error::usage(
            "sweep does not rescale projected scores; give --project exact (or audit, which does)",
        ));
    }
    let needs_value = cfg.grid.iter().any(|p| !p.estimator.needs().is_empty());
    if needs_value && !reader.schema().has(Role::Value) && !cfg.audit.fitted_values() {
        return Err(Error::usage(format!(
            "{}: sweeping {} needs the value column (a critic's V(s_t)), which the log lacks; \
             --fit-value fits one",
            reader.file(),
            cfg.over.key()
        )));
    }
    if cfg.grid.iter().any(|p| p.estimator.batch_dependent()) {
        return Err(Error::usage(format!(
            "{} depends on the whole batch and cannot be swept; choose a per-episode estimator",
            cfg.family
        )));
    }
    Ok(())
}

/// Runs a sweep over an opened log.
pub fn run(reader: LogReader, cfg: &SweepConfig) -> Result<SweepReport> {
    cfg.audit.validate()?;
    if cfg.grid.is_empty() {
        return Err(Error::usage("the grid is empty"));
    }
    let scores = audit::scores(&reader, &cfg.audit)?;
    let d = scores.dim;
    check_sweepable(&reader, cfg, &scores)?;
    // Entry 0 is the reference; the grid points follow in order.
    let mut estimators = vec![cfg.audit.reference];
    let mut gammas = vec![cfg.audit.gamma];
    for p in &cfg.grid {
        estimators.push(p.estimator);
        gammas.push(p.gamma);
    }
    let plan = Plan::with_gammas(estimators, gammas, cfg.audit.gamma, d).with_moments(0);
    let data = audit::collect(reader, &plan, &cfg.audit, &scores)?;
    let n = data.contrib.nrows();
    let mut warnings = data.warnings.clone();
    audit::few_episodes_warning(n, &mut warnings);
    let Resampled {
        point,
        replicates,
        halves,
    } = audit::resample_all(&data, &cfg.audit);
    let scfg = StatsConfig {
        bias_level: cfg.audit.bias_level,
        multiplicity: cfg.audit.multiplicity,
        episodes: n,
        confidence: cfg.audit.confidence,
        target_snr: cfg.audit.target_snr,
        per_coord: false,
    };
    let (stats, signal) =
        stats::summarise(&plan, 0, &point, replicates.view(), halves.view(), &scfg);

    let refs = ReferenceFigures::of(&stats[0], &signal);
    // The report's row rules apply: figures derived from overflowed ones are undefined.
    let rows: Vec<EstimatorRow> = cfg
        .grid
        .iter()
        .enumerate()
        .map(|(i, g)| EstimatorRow::new(g.label.clone(), false, stats[i + 1].clone(), &refs))
        .collect();
    let points = grid_points(cfg, rows, &plan, &replicates, data.contrib.view())?;
    let choice = choose(&points, cfg.over);
    Ok(SweepReport {
        tool: Tool::with_schema("gradaudit.sweep/1"),
        input: data.input,
        settings: SweepSettings {
            over: cfg.over,
            family: match cfg.over {
                Over::Lambda => "gae".into(),
                Over::Nstep => "nstep".into(),
                Over::Gamma => cfg.family.to_string(),
            },
            gamma: cfg.audit.gamma,
            reference: cfg.audit.reference.to_string(),
            resamples: cfg.audit.resamples,
            seed: cfg.audit.seed,
            confidence: cfg.audit.confidence,
            target_snr: cfg.audit.target_snr,
        },
        signal: refs.signal,
        points,
        choice,
        warnings,
    })
}

/// The grid's points from their rows, with each point's MSE standard error and interval
/// (sweep/mse.rs); entry i + 1 of the plan is grid point i.
fn grid_points(
    cfg: &SweepConfig,
    rows: Vec<EstimatorRow>,
    plan: &Plan,
    replicates: &ndarray::Array2<f64>,
    contrib: ndarray::ArrayView2<f64>,
) -> Result<Vec<SweepPoint>> {
    let draws: Vec<Option<crate::stats::mse::Draws>> = rows
        .iter()
        .enumerate()
        .map(|(i, row)| {
            row.mse?;
            mse::draws(plan, i + 1, replicates, contrib)
        })
        .collect();
    let spreads = mse::spreads(&draws, contrib, cfg)?;
    Ok(cfg
        .grid
        .iter()
        .zip(rows)
        .zip(spreads)
        .map(|((g, row), (mse_se, mse_interval))| SweepPoint {
            label: g.label.clone(),
            value: g.value.is_finite().then_some(g.value),
            estimator: g.estimator.to_string(),
            gamma: g.gamma,
            bias_sq: row.bias_sq,
            bias_detected: row.bias_detected,
            variance: row.variance,
            mse: row.mse,
            mse_se,
            mse_interval,
            snr: row.snr,
            ess: row.ess,
            episodes_for_snr: row.episodes_for_snr,
            bias_limited: row.bias_limited,
            notes: row
                .notes
                .into_iter()
                .filter(|n| !n.starts_with("cosine_half"))
                .collect(),
        })
        .collect())
}

/// Whether a grid point sits where its parameter ends (lambda or gamma 0 or 1, n = 1 or full).
fn natural_limit(over: Over, p: &SweepPoint) -> bool {
    match (over, p.value) {
        (Over::Nstep, None) => true,
        (Over::Nstep, Some(n)) => n == 1.0,
        (_, Some(v)) => v == 0.0 || v == 1.0,
        (_, None) => false,
    }
}

/// The MSE-minimising point, the one-standard-error band around it, and the least biased point
/// of the band (ties go to the larger parameter, the conservative side for every sweep). Points
/// whose MSE is undefined take no part; when no point has one there is no choice.
pub fn choose(points: &[SweepPoint], over: Over) -> Choice {
    use crate::report::table::num;
    let defined: Vec<(usize, f64, f64)> = points
        .iter()
        .enumerate()
        .filter_map(|(i, p)| Some((i, p.mse?, p.bias_sq?)))
        .collect();
    let Some(&(best, best_mse, _)) = defined.iter().min_by(|a, b| a.1.total_cmp(&b.1)) else {
        return Choice {
            best: None,
            band: Vec::new(),
            recommended: None,
            text: "no grid point has a defined MSE: the log's sums overflowed the range of f64 \
                   (see the notes); rescale the rewards or the scores"
                .into(),
        };
    };
    let b = &points[best];
    let limit = best_mse + b.mse_se.unwrap_or(0.0);
    let in_band: Vec<&(usize, f64, f64)> = defined.iter().filter(|p| p.1 <= limit).collect();
    let band: Vec<usize> = in_band.iter().map(|p| p.0).collect();
    let recommended = in_band
        .iter()
        .min_by(|a, b| a.2.total_cmp(&b.2).then(b.0.cmp(&a.0)))
        .map_or(best, |p| p.0);
    let r = &points[recommended];
    let mut text = format!(
        "lowest MSE at {} = {} (mse {}); {} point(s) lie within one standard error ({})",
        over.key(),
        b.label,
        num(best_mse),
        band.len(),
        b.mse_se.map_or("n/a".into(), num)
    );
    text.push_str(&format!(
        "; recommended: {} = {}, the least biased of them (bias does not shrink with more \
         episodes, variance does; {})",
        over.key(),
        r.label,
        over.conservative_side()
    ));
    if defined.len() < points.len() {
        text.push_str(&format!(
            "; {} point(s) have no defined MSE (their sums overflowed) and were left out",
            points.len() - defined.len()
        ));
    }
    if band.len() == points.len() && points.len() > 1 {
        text.push_str(
            "; every grid point is within one standard error: this log cannot tell the settings \
             apart, and more episodes would narrow the band",
        );
    } else {
        // An edge of the grid matters only where the parameter could go further.
        let open_edge = |i: usize| band.contains(&i) && !natural_limit(over, &points[i]);
        if open_edge(0) || open_edge(points.len() - 1) {
            text.push_str("; the band reaches the edge of the grid, so a wider grid may do better");
        }
    }
    Choice {
        best: Some(best),
        band,
        recommended: Some(recommended),
        text,
    }
}

mod mse;
#[cfg(test)]
mod tests;
