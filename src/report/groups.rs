//! Estimators that are the same estimator by construction, shown as one row with their names
//! joined in the human formats (table, Markdown, HTML). The JSON and CSV keep one entry per
//! estimator, since programs look estimators up by name.
//!
//! The identities (GAE paper, Schulman et al. 2016, eq. 17 and the n-step definition):
//! gae:0 = td = nstep:1, since GAE(gamma, 0) is the one-step TD residual
//! r_t + gamma V_{t+1} - V_t, which is also the 1-step advantage; and at gamma = 1,
//! rtg_discounted = rtg. Rows are joined only when their figures also agree (to a relative
//! 1e-9, which covers the last-bit differences of separate scans), so a bug that made two of
//! them differ would show instead of being hidden.

use super::{AuditReport, EstimatorRow};
use crate::estimator::Estimator;

/// One row of the human formats: estimators identical by construction, in report order.
#[derive(Debug, Clone)]
pub struct Group<'a> {
    pub rows: Vec<&'a EstimatorRow>,
}

impl<'a> Group<'a> {
    /// The row whose figures the group shows (all members agree).
    pub fn first(&self) -> &'a EstimatorRow {
        self.rows[0]
    }

    pub fn reference(&self) -> bool {
        self.rows.iter().any(|r| r.reference)
    }

    /// The members' names joined with " = ", in name order (their figures agree only to the
    /// last bits, so the report's MSE order among them is arbitrary).
    pub fn names(&self) -> String {
        let mut names: Vec<&str> = self.rows.iter().map(|r| r.name.as_str()).collect();
        names.sort_unstable();
        names.join(" = ")
    }

    /// The names with the reference marked, as the estimator column shows them.
    pub fn label(&self) -> String {
        if self.reference() {
            format!("{} (ref)", self.names())
        } else {
            self.names()
        }
    }
}

/// The identity class of an estimator name, when it has one.
fn class(name: &str, gamma: f64) -> Option<&'static str> {
    match Estimator::parse(name).ok()? {
        Estimator::Td | Estimator::NStep(1) | Estimator::Gae(0.0) => Some("td"),
        Estimator::Rtg | Estimator::RtgDiscounted if gamma == 1.0 => Some("rtg"),
        _ => None,
    }
}

fn close(a: Option<f64>, b: Option<f64>) -> bool {
    match (a, b) {
        (None, None) => true,
        (Some(x), Some(y)) => x == y || (x - y).abs() <= 1e-9 * x.abs().max(y.abs()),
        _ => false,
    }
}

/// Whether two rows show the same figures.
fn same_figures(a: &EstimatorRow, b: &EstimatorRow) -> bool {
    let figures = |r: &EstimatorRow| {
        [
            r.mse,
            r.bias_sq,
            r.variance,
            r.snr,
            r.ess,
            r.cosine_half,
            r.gradient_norm,
        ]
    };
    figures(a)
        .into_iter()
        .zip(figures(b))
        .all(|(x, y)| close(x, y))
        && a.bias_detected == b.bias_detected
        && a.bias_limited == b.bias_limited
        && a.episodes_for_snr == b.episodes_for_snr
}

/// The report's rows grouped, in the order of each group's first row.
pub fn groups(report: &AuditReport) -> Vec<Group<'_>> {
    let gamma = report.settings.gamma;
    let mut out: Vec<Group> = Vec::new();
    for row in &report.estimators {
        let joined = class(&row.name, gamma).and_then(|c| {
            out.iter_mut()
                .find(|g| class(&g.first().name, gamma) == Some(c) && same_figures(g.first(), row))
        });
        match joined {
            Some(g) => g.rows.push(row),
            None => out.push(Group { rows: vec![row] }),
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn identity_classes_follow_the_gae_identities() {
        assert_eq!(class("gae:0", 0.99), Some("td"));
        assert_eq!(class("nstep:1", 0.99), Some("td"));
        assert_eq!(class("td", 0.99), Some("td"));
        assert_eq!(class("nstep:2", 0.99), None);
        assert_eq!(class("gae:0.5", 0.99), None);
        assert_eq!(class("rtg_discounted", 0.99), None);
        assert_eq!(class("rtg_discounted", 1.0), Some("rtg"));
        assert_eq!(class("rtg", 1.0), Some("rtg"));
        assert!(close(Some(1.0), Some(1.0 + 1e-12)) && !close(Some(1.0), Some(1.001)));
        assert!(!close(None, Some(0.0)));
    }

    fn row(name: &str, mse: f64) -> EstimatorRow {
        EstimatorRow {
            name: name.into(),
            reference: name == "rtg",
            gradient: Some(vec![1.0]),
            gradient_norm: Some(1.0),
            gradient_norm_interval: None,
            variance: Some(mse / 2.0),
            bias_sq: Some(mse / 2.0),
            bias_sq_interval: None,
            bias_z: Some(3.0),
            bias_p: Some(0.001),
            bias_p_adjusted: Some(0.002),
            bias_detected: true,
            bias_norm_interval: None,
            mse: Some(mse),
            snr: Some(1.0),
            ess: Some(1.0),
            cosine_half: Some(0.5),
            cosine_half_interval: None,
            episodes_for_snr: Some(3),
            bias_limited: false,
            noise_scale: None,
            mse_interval: None,
            notes: vec![],
        }
    }

    fn report(rows: Vec<EstimatorRow>, gamma: f64) -> AuditReport {
        let rows_tested = rows.iter().filter(|r| !r.reference).count();
        AuditReport {
            tool: crate::report::Tool::current(),
            input: Default::default(),
            settings: crate::report::Settings {
                gamma,
                resamples: 10,
                seed: 1,
                confidence: 0.95,
                target_snr: 1.0,
                reference: "rtg".into(),
                splits: 2,
                resampling: "multinomial".into(),
            },
            signal: None,
            signal_interval: None,
            reference_variance: None,
            estimators: rows,
            skipped: vec![],
            significance: crate::report::significance::Significance {
                null: "bootstrap_centred_paired",
                multiplicity: crate::stats::Multiplicity::Holm,
                controls: crate::stats::Multiplicity::Holm.describe(),
                level: 0.05,
                tested: rows_tested,
                detected: rows_tested,
            },
            noise_scale: vec![],
            baseline_gap: None,
            verdict: crate::report::Verdict {
                best: None,
                dominated_by: None,
                text: String::new(),
            },
            warnings: Default::default(),
        }
    }

    #[test]
    fn rows_join_only_when_the_identity_holds_and_the_figures_agree() {
        let r = report(
            vec![
                row("td", 2.0),
                row("gae:0.5", 2.0),
                row("gae:0", 2.0 * (1.0 + 1e-12)),
                row("nstep:1", 2.5),
            ],
            0.99,
        );
        let g = groups(&r);
        let names: Vec<String> = g.iter().map(|g| g.names()).collect();
        // gae:0.5 has the same figures but no identity; nstep:1 the identity but other figures
        // (which a bug would cause): both stay rows of their own.
        assert_eq!(names, ["gae:0 = td", "gae:0.5", "nstep:1"]);
        // rtg_discounted is rtg only at gamma = 1; the joined row keeps the reference mark.
        let at = |gamma| {
            let r = report(vec![row("rtg", 4.0), row("rtg_discounted", 4.0)], gamma);
            groups(&r).iter().map(|g| g.label()).collect::<Vec<_>>()
        };
        assert_eq!(at(1.0), ["rtg = rtg_discounted (ref)"]);
        assert_eq!(at(0.99), ["rtg (ref)", "rtg_discounted"]);
    }
}
