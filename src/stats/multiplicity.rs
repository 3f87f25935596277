//! Control of false alarms across the whole table: every audited estimator but the reference is
//! tested for bias at once, so a per-test level would flag something spurious in a sizeable
//! share of audits. The raw p-values are adjusted by one of two classical procedures:
//!
//! - Holm (1979), the default: sort p_(1) <= ... <= p_(m); the adjusted value of the i-th is
//!   max_{j <= i} min(1, (m - j + 1) p_(j)). Rejecting every adjusted p <= alpha keeps the
//!   family-wise error rate (the chance of even one false "bias detected" in the table) at or
//!   below alpha under any dependence between the tests (they are strongly dependent here:
//!   every estimator is paired with the same reference and the same resamples).
//! - Benjamini and Hochberg (1995): adjusted p_(i) = min_{j >= i} min(1, m p_(j) / j); rejecting
//!   adjusted p <= alpha keeps the expected share of false detections among the detections at
//!   or below alpha. Proved for independent or positively dependent tests (Benjamini and
//!   Yekutieli 2001); it detects more than Holm when several estimators are biased.

use serde::Serialize;

/// Which error rate the table's bias decisions control.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Multiplicity {
    /// Holm's step-down procedure: family-wise error rate.
    Holm,
    /// Benjamini-Hochberg step-up procedure: false-discovery rate.
    Bh,
}

impl Multiplicity {
    pub fn key(self) -> &'static str {
        match self {
            Multiplicity::Holm => "holm",
            Multiplicity::Bh => "bh",
        }
    }

    /// What the decisions control, in words for the reports.
    pub fn describe(self) -> &'static str {
        match self {
            Multiplicity::Holm => "Holm family-wise error rate",
            Multiplicity::Bh => "Benjamini-Hochberg false-discovery rate",
        }
    }

    /// Adjusted p-values in the input order; None entries are not tested and stay None.
    pub fn adjust(self, p: &[Option<f64>]) -> Vec<Option<f64>> {
        let mut order: Vec<usize> = (0..p.len()).filter(|&i| p[i].is_some()).collect();
        // Ties by index, so the result does not depend on the sort's stability.
        order.sort_by(|&a, &b| p[a].unwrap().total_cmp(&p[b].unwrap()).then(a.cmp(&b)));
        let m = order.len() as f64;
        let mut out = vec![None; p.len()];
        match self {
            Multiplicity::Holm => {
                let mut running: f64 = 0.0;
                for (j, &i) in order.iter().enumerate() {
                    let v = ((m - j as f64) * p[i].unwrap()).min(1.0);
                    running = running.max(v);
                    out[i] = Some(running);
                }
            }
            Multiplicity::Bh => {
                let mut running: f64 = 1.0;
                for (j, &i) in order.iter().enumerate().rev() {
                    let v = (m * p[i].unwrap() / (j as f64 + 1.0)).min(1.0);
                    running = running.min(v);
                    out[i] = Some(running);
                }
            }
        }
        out
    }
}

impl Multiplicity {
    /// [`Multiplicity::adjust`] where some tests are one test under several names: `same[i]`
    /// is the index of the first entry that test i repeats (i itself when it is new). Each group
    /// counts once in m, with its smallest raw p, and every member gets the group's adjusted
    /// value. (gae:0, nstep:1 and td are one estimator: counting it three times would make the
    /// table's other tests needlessly conservative.)
    pub fn adjust_grouped(self, p: &[Option<f64>], same: &[usize]) -> Vec<Option<f64>> {
        let mut first: Vec<Option<f64>> = vec![None; p.len()];
        for (i, &g) in same.iter().enumerate() {
            if let Some(x) = p[i] {
                first[g] = Some(first[g].map_or(x, |y: f64| y.min(x)));
            }
        }
        let adjusted = self.adjust(&first);
        (0..p.len()).map(|i| p[i].and(adjusted[same[i]])).collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Three copies of one test and two others: Holm over m = 3 distinct tests by hand
    // (sorted 0.01, 0.02, 0.04: 3 x 0.01 = 0.03, max(0.03, 2 x 0.02) = 0.04,
    // max(0.04, 1 x 0.04) = 0.04), the copies sharing their group's value; the ungrouped
    // adjustment over m = 5 gives 0.05 for the smallest instead.
    #[test]
    fn repeated_tests_count_once() {
        let p = [Some(0.02), Some(0.01), Some(0.01), Some(0.01), Some(0.04)];
        let same = [0, 1, 1, 1, 4];
        let adj = Multiplicity::Holm.adjust_grouped(&p, &same);
        let want = [0.04, 0.03, 0.03, 0.03, 0.04];
        for (a, w) in adj.iter().zip(want) {
            assert!((a.unwrap() - w).abs() < 1e-15, "{adj:?}");
        }
        assert!((Multiplicity::Holm.adjust(&p)[1].unwrap() - 0.05).abs() < 1e-15);
        // No repeats: the same as adjust.
        let plain = [0, 1, 2, 3, 4];
        assert_eq!(
            Multiplicity::Bh.adjust_grouped(&p, &plain),
            Multiplicity::Bh.adjust(&p)
        );
    }

    // Worked example: p = (0.01, 0.04, 0.03, 0.005), m = 4, with None (the reference) kept.
    // Holm, sorted 0.005, 0.01, 0.03, 0.04: 4*0.005 = 0.02, 3*0.01 = 0.03, 2*0.03 = 0.06,
    // 1*0.04 = 0.04 -> running max 0.06. BH, from the top: 0.04*4/4 = 0.04, 0.03*4/3 = 0.04,
    // 0.01*4/2 = 0.02, 0.005*4/1 = 0.02 (the same numbers as R's p.adjust(p, "holm"/"BH")).
    #[test]
    fn holm_and_bh_by_hand() {
        let p = [Some(0.01), None, Some(0.04), Some(0.03), Some(0.005)];
        let close = |got: Vec<Option<f64>>, want: [Option<f64>; 5]| {
            for (g, w) in got.iter().zip(want) {
                match (g, w) {
                    (Some(g), Some(w)) => assert!((g - w).abs() < 1e-15, "{got:?}"),
                    (None, None) => {}
                    _ => panic!("{got:?} vs {want:?}"),
                }
            }
        };
        close(
            Multiplicity::Holm.adjust(&p),
            [Some(0.03), None, Some(0.06), Some(0.06), Some(0.02)],
        );
        close(
            Multiplicity::Bh.adjust(&p),
            [Some(0.02), None, Some(0.04), Some(0.04), Some(0.02)],
        );
        assert_eq!(Multiplicity::Holm.adjust(&[None, None]), vec![None, None]);
    }
}
