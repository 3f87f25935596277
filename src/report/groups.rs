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
}
