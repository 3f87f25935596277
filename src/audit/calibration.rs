//! Calibration of the bias test over many simulated logs with known truth: how often the
//! table-wide decision flags a bias when every estimator in the table is unbiased (the
//! false-alarm rate, which Holm 1979 bounds by `--bias-level` when the p-values are valid), and
//! how often it finds a bias of known size (power). The full study runs in release
//! (`cargo run --release --example calibration`, figures in the README); the tests here run
//! the same code on few logs.
//!
//! # The simulated logs
//! A d-dimensional Gaussian bandit played for T steps per episode: a_t ~ N(mu, sigma^2 I)
//! independently, r_t = sum_j a_tj + e_t with e_t independent noise (standard normal, or
//! Student t with 3 degrees of freedom: heavy tails, infinite fourth moment), score
//! s_t = (a_t - mu) / sigma^2. J(mu) = T sum_j mu_j, so the exact gradient is T in every
//! component. r_u depends on a_u alone, so E[s_t r_u] = 0 for u != t: total, rtg,
//! rtg_discounted and every Psi built from a value column that does not depend on the actions
//! (value_baseline, td, nstep, gae) have the same expectation, the true gradient. The value
//! column is V_t = (T - t) d mu + leak r_t: with leak = 0 every estimator of [`NULL_SET`] is
//! unbiased (mean_baseline and minvar_total up to the O(1/N) covariance of a batch-estimated
//! baseline with each episode's own terms, far below the O(1/sqrt(N)) noise here). With
//! leak > 0 the value column leaks the step's own reward: value_baseline subtracts leak r_t,
//! and E[s_tj r_t] = E[z^2] / sigma = 1 (sigma = 1), so its bias is exactly -leak T per
//! component, norm leak T sqrt(d); td, nstep and gae are biased too (they subtract V_t).
//!
//! # The figures
//! Each is a proportion p over M independent logs, with Monte-Carlo standard error
//! sqrt(p (1 - p) / M). From one audit per log, with the raw p-values of the report
//! (`bias_p`), the study counts: a flag anywhere in the table after Holm's adjustment (what
//! the default controls), after Benjamini-Hochberg's (under the global null FDR = FWER, so
//! the same bound applies), with no adjustment (per-test level, the old behaviour's
//! problem), and the largest per-estimator raw rejection rate (each p-value's own
//! calibration: about the level when the test is exact).

use super::{AuditConfig, run};
use crate::estimator::Estimator;
use crate::report::AuditReport;
use crate::stats::Multiplicity;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal, StudentT};
use std::fmt::Write;

/// Reward noise of the bandit logs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Noise {
    Gaussian,
    /// Student t with 3 degrees of freedom (infinite fourth moment).
    StudentT3,
}

/// The simulated bandit (see the module header).
#[derive(Debug, Clone, Copy)]
pub struct Bandit {
    pub d: usize,
    pub steps: usize,
    pub noise: Noise,
    /// Share of the step's own reward leaked into the value column (0: all unbiased).
    pub leak: f64,
}

const MU: f64 = 0.5;

/// Every estimator the bandit's columns allow except `whitened` (it rescales the gradient: a
/// bias by design) and the aliases of td (gae:0, nstep:1: the same estimator, which would count
/// as extra tests).
pub const NULL_SET: &str = "rtg,total,rtg_discounted,value_baseline,td,nstep:2,gae:0.5,gae:0.95,mean_baseline,minvar_total";

impl Bandit {
    /// The log of `episodes` episodes as CSV text, from `seed`.
    pub fn log(&self, episodes: usize, seed: u64) -> String {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let t3 = StudentT::new(3.0).expect("3 degrees of freedom");
        let mut text = String::from("episode,step,reward,terminated,value");
        for j in 0..self.d {
            let _ = write!(text, ",score_{j}");
        }
        text.push('\n');
        let mut z = vec![0.0f64; self.d];
        for e in 0..episodes {
            for t in 0..self.steps {
                for x in z.iter_mut() {
                    *x = StandardNormal.sample(&mut rng);
                }
                let noise: f64 = match self.noise {
                    Noise::Gaussian => StandardNormal.sample(&mut rng),
                    Noise::StudentT3 => t3.sample(&mut rng),
                };
                // sigma = 1: a = mu + z, score = z.
                let r = z.iter().map(|x| MU + x).sum::<f64>() + noise;
                let v = (self.steps - t) as f64 * self.d as f64 * MU + self.leak * r;
                let last = u8::from(t + 1 == self.steps);
                let _ = write!(text, "{e},{t},{r},{last},{v}");
                for x in &z {
                    let _ = write!(text, ",{x}");
                }
                text.push('\n');
            }
        }
        text
    }

    /// The exact bias norm of value_baseline, leak T sqrt(d).
    pub fn value_baseline_bias_norm(&self) -> f64 {
        self.leak * self.steps as f64 * (self.d as f64).sqrt()
    }

    /// A short description for the tables.
    pub fn describe(&self) -> String {
        let noise = match self.noise {
            Noise::Gaussian => "normal",
            Noise::StudentT3 => "Student t(3)",
        };
        format!("d = {}, T = {}, {noise} noise", self.d, self.steps)
    }
}

/// Audits a CSV text with the given estimators, resamples and seed (other settings default).
pub fn audit_text(text: &str, estimators: &str, resamples: usize, seed: u64) -> AuditReport {
    let cfg = AuditConfig {
        estimators: Some(Estimator::parse_list(estimators).expect("known estimators")),
        resamples,
        splits: 2,
        seed,
        ..AuditConfig::default()
    };
    let opts = crate::log::ReadOptions {
        progress: crate::log::Progress::Hidden,
        ..crate::log::ReadOptions::default()
    };
    let reader = crate::log::LogReader::from_reader(
        Box::new(std::io::Cursor::new(text.as_bytes().to_vec())),
        "simulated.csv",
        &opts,
        None,
    )
    .expect("a simulated log reads");
    run(reader, &cfg).expect("a simulated log audits")
}

/// A proportion k / m with its Monte-Carlo standard error.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Rate {
    pub k: usize,
    pub m: usize,
}

impl Rate {
    pub fn p(self) -> f64 {
        self.k as f64 / self.m as f64
    }

    /// sqrt(p (1 - p) / m) at the measured p.
    pub fn se(self) -> f64 {
        (self.p() * (1.0 - self.p()) / self.m as f64).sqrt()
    }
}

impl std::fmt::Display for Rate {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{:.3} ± {:.3}", self.p(), self.se())
    }
}

/// The counts of one setting over M logs (see the module header).
#[derive(Debug, Clone)]
pub struct Flags {
    pub holm: Rate,
    pub bh: Rate,
    pub unadjusted: Rate,
    /// The largest per-estimator raw rejection rate, and its estimator.
    pub worst_raw: (Rate, String),
    /// value_baseline flagged after Holm's adjustment (power when leak > 0).
    pub value_baseline: Rate,
}

/// A shorter table for quick runs: three tests besides the reference, one of each kind (the
/// total return, a value baseline, a batch-estimated baseline).
pub const SMALL_SET: &str = "rtg,total,value_baseline,minvar_total";

/// Audits `logs` bandit logs (seeds seed0, seed0 + 1, ...) with `estimators` (rtg, the
/// reference, first) and counts the flags at `level`.
pub fn flags(
    b: &Bandit,
    estimators: &str,
    (logs, episodes, resamples): (usize, usize, usize),
    seed0: u64,
    level: f64,
) -> Flags {
    let names: Vec<String> = estimators
        .split(',')
        .filter(|n| *n != "rtg")
        .map(str::to_string)
        .collect();
    let (mut holm, mut bh, mut none, mut vb) = (0, 0, 0, 0);
    let mut raw = vec![0usize; names.len()];
    for i in 0..logs {
        let seed = seed0 + i as u64;
        let r = audit_text(&b.log(episodes, seed), estimators, resamples, seed);
        let p: Vec<Option<f64>> = names
            .iter()
            .map(|n| {
                r.estimators
                    .iter()
                    .find(|e| e.name == *n)
                    .and_then(|e| e.bias_p)
            })
            .collect();
        let any = |adj: &[Option<f64>]| usize::from(adj.iter().flatten().any(|&q| q <= level));
        holm += any(&Multiplicity::Holm.adjust(&p));
        bh += any(&Multiplicity::Bh.adjust(&p));
        none += any(&p);
        for (count, q) in raw.iter_mut().zip(&p) {
            *count += usize::from(q.is_some_and(|q| q <= level));
        }
        // The report's own decision (Holm at the default level) for value_baseline.
        vb += usize::from(
            r.estimators
                .iter()
                .any(|e| e.name == "value_baseline" && e.bias_detected),
        );
    }
    let rate = |k| Rate { k, m: logs };
    let (w, &k) = raw
        .iter()
        .enumerate()
        .max_by_key(|(_, k)| **k)
        .expect("estimators tested");
    Flags {
        holm: rate(holm),
        bh: rate(bh),
        unadjusted: rate(none),
        worst_raw: (rate(k), names[w].clone()),
        value_baseline: rate(vb),
    }
}

/// The pass condition of a false-alarm rate: at most the level plus `k` Monte-Carlo standard
/// errors, the error taken at p = level (the rate the check's null says it has).
pub fn within(rate: Rate, level: f64, k: f64) -> bool {
    rate.p() <= level + k * (level * (1.0 - level) / rate.m as f64).sqrt()
}

#[cfg(test)]
mod tests;
