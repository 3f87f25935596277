//! The estimator catalogue: each policy-gradient estimator is a choice of return proxy Psi_t in
//! g = sum_t Psi_t s_t. This module owns their names (parsing and printing), what log columns
//! each needs, and the per-episode Psi_t computation; the scans themselves live in [`scan`].

pub mod scan;

use crate::episode::Episode;
use std::fmt;

/// One estimator of the policy gradient.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Estimator {
    /// Psi_t = sum of all rewards of the episode.
    Total,
    /// Psi_t = sum_{u>=t} r_u (undiscounted reward-to-go).
    Rtg,
    /// Psi_t = G_t = sum_{u>=t} gamma^(u-t) r_u.
    RtgDiscounted,
    /// Psi_t = G_t - b, b the mean of G over all steps of the batch.
    MeanBaseline,
    /// Psi_t = (G_t - b) / sd, sd the population standard deviation of G over the batch.
    Whitened,
    /// Psi_t = G_t - V_t.
    ValueBaseline,
    /// Psi_t = Q_t.
    Q,
    /// Psi_t = Q_t - V_t.
    AdvantageQ,
    /// Psi_t = r_t + gamma V_{t+1} - V_t.
    Td,
    /// n-step advantage with window n.
    NStep(usize),
    /// GAE(lambda).
    Gae(f64),
    /// Psi_t = R - b_j per score component j: the total return with the minimum-variance
    /// constant baseline b_j = E[H_j^2 R] / E[H_j^2], H_j = sum_t s_tj (Peters and Schaal 2008,
    /// episodic REINFORCE; Greensmith, Bartlett and Baxter 2004 for the general result),
    /// estimated from the batch (see contrib.rs).
    MinvarTotal,
    /// Reward-to-go in its per-reward form, sum_t C_tj (r_t - b_tj) with C_tj = sum_{u<=t} s_uj,
    /// and the time-dependent minimum-variance baseline b_tj = E[C_tj^2 r_t] / E[C_tj^2]
    /// (Peters and Schaal 2008, the per-decision G(PO)MDP form), per time bin, estimated from
    /// the batch (see contrib.rs).
    MinvarRtg,
    /// Psi_t = a logged per-step column (a training stack's own advantages), by header. The
    /// header is interned for the life of the run (`Box::leak`, a few bytes per name parsed) so
    /// that estimators stay `Copy`.
    Column(&'static str),
}

/// A log column an estimator cannot do without.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Need {
    Value,
    Q,
}

impl Need {
    pub fn column(self) -> &'static str {
        match self {
            Need::Value => "value",
            Need::Q => "q",
        }
    }
}

impl Estimator {
    /// Parses a name such as `rtg`, `gae:0.95` or `nstep:10`.
    pub fn parse(text: &str) -> Result<Estimator, String> {
        let text = text.trim();
        let simple = match text {
            "total" => Some(Estimator::Total),
            "rtg" => Some(Estimator::Rtg),
            "rtg_discounted" => Some(Estimator::RtgDiscounted),
            "mean_baseline" => Some(Estimator::MeanBaseline),
            "whitened" => Some(Estimator::Whitened),
            "value_baseline" => Some(Estimator::ValueBaseline),
            "q" => Some(Estimator::Q),
            "advantage_q" => Some(Estimator::AdvantageQ),
            "td" => Some(Estimator::Td),
            "minvar_total" => Some(Estimator::MinvarTotal),
            "minvar_rtg" => Some(Estimator::MinvarRtg),
            _ => None,
        };
        if let Some(e) = simple {
            return Ok(e);
        }
        if let Some(arg) = text.strip_prefix("gae:") {
            let lambda: f64 = arg
                .parse()
                .map_err(|_| format!("'{text}': lambda must be a number in [0, 1]"))?;
            if !(0.0..=1.0).contains(&lambda) {
                return Err(format!("'{text}': lambda must lie in [0, 1]"));
            }
            return Ok(Estimator::Gae(lambda));
        }
        if let Some(header) = text.strip_prefix("column:") {
            if header.is_empty() {
                return Err(format!("'{text}': give the header of the logged column"));
            }
            return Ok(Estimator::Column(Box::leak(
                header.to_string().into_boxed_str(),
            )));
        }
        if let Some(arg) = text.strip_prefix("nstep:") {
            let n: usize = arg
                .parse()
                .map_err(|_| format!("'{text}': n must be a whole number of steps >= 1"))?;
            if n == 0 {
                return Err(format!("'{text}': n must be at least 1"));
            }
            return Ok(Estimator::NStep(n));
        }
        Err(format!(
            "unknown estimator '{text}'; known: total, rtg, rtg_discounted, mean_baseline, \
             whitened, value_baseline, q, advantage_q, td, nstep:N, gae:LAMBDA, minvar_total, \
             minvar_rtg, column:HEADER"
        ))
    }

    /// Parses a comma-separated list, dropping duplicates but keeping the first order.
    pub fn parse_list(text: &str) -> Result<Vec<Estimator>, String> {
        let mut out: Vec<Estimator> = Vec::new();
        for part in text.split(',').filter(|p| !p.trim().is_empty()) {
            let e = Estimator::parse(part)?;
            if !out.contains(&e) {
                out.push(e);
            }
        }
        if out.is_empty() {
            return Err("the estimator list is empty".into());
        }
        Ok(out)
    }

    /// Every estimator, with the default grids for gae and nstep; without `minvar_rtg`, whose
    /// per-episode summary holds 3 d numbers per time bin (about 240 d instead of d): it is
    /// opt-in, so that a default audit's memory and time stay those of the other estimators.
    pub fn default_set() -> Vec<Estimator> {
        let mut v = vec![
            Estimator::Total,
            Estimator::Rtg,
            Estimator::RtgDiscounted,
            Estimator::MeanBaseline,
            Estimator::Whitened,
            Estimator::ValueBaseline,
            Estimator::Q,
            Estimator::AdvantageQ,
            Estimator::Td,
        ];
        v.extend([1, 5, 20].map(Estimator::NStep));
        v.extend([0.0, 0.5, 0.9, 0.95, 0.97, 1.0].map(Estimator::Gae));
        v.push(Estimator::MinvarTotal);
        v
    }

    pub fn needs(self) -> &'static [Need] {
        match self {
            Estimator::Total
            | Estimator::Rtg
            | Estimator::RtgDiscounted
            | Estimator::MeanBaseline
            | Estimator::Whitened
            | Estimator::MinvarTotal
            | Estimator::MinvarRtg
            | Estimator::Column(_) => &[],
            Estimator::Q => &[Need::Q],
            Estimator::AdvantageQ => &[Need::Q, Need::Value],
            Estimator::ValueBaseline | Estimator::Td | Estimator::NStep(_) | Estimator::Gae(_) => {
                &[Need::Value]
            }
        }
    }

    /// Whether the gradient depends on the whole batch (a baseline fitted on it), so it is not
    /// a plain mean of per-episode gradients.
    pub fn batch_dependent(self) -> bool {
        matches!(
            self,
            Estimator::MeanBaseline
                | Estimator::Whitened
                | Estimator::MinvarTotal
                | Estimator::MinvarRtg
        )
    }

    /// Psi_t for a per-episode estimator, into `out` (length T). `g` must hold the discounted
    /// returns of the episode and `deltas` its TD residuals, both at `gamma` (`deltas` may be
    /// empty when the episode has no values); the caller computes them once per gamma, since
    /// several estimators share them.
    ///
    /// # Panics
    /// For batch-dependent estimators (they have no per-episode Psi) and when a needed column
    /// is absent; callers filter by [`Estimator::needs`] first.
    pub fn psi(self, ep: &Episode, gamma: f64, g: &[f64], deltas: &[f64], out: &mut Vec<f64>) {
        let values = || {
            ep.values
                .as_deref()
                .expect("value column checked by needs()")
        };
        let q = || ep.q.as_deref().expect("q column checked by needs()");
        let t_len = ep.len();
        out.clear();
        match self {
            Estimator::Total => out.resize(t_len, ep.total_reward()),
            Estimator::Rtg => scan::discounted_returns(&ep.rewards, 1.0, out),
            Estimator::RtgDiscounted => out.extend_from_slice(g),
            Estimator::ValueBaseline => out.extend(g.iter().zip(values()).map(|(g, v)| g - v)),
            Estimator::Q => out.extend_from_slice(q()),
            Estimator::AdvantageQ => out.extend(q().iter().zip(values()).map(|(q, v)| q - v)),
            Estimator::Td => {
                debug_assert_eq!(deltas.len(), t_len, "TD residuals computed by the caller");
                out.extend_from_slice(deltas);
            }
            Estimator::NStep(n) => scan::nstep(g, values(), ep.tail_value(), gamma, n, out),
            Estimator::Gae(lambda) => {
                debug_assert_eq!(deltas.len(), t_len, "TD residuals computed by the caller");
                scan::gae(deltas, gamma, lambda, out);
            }
            Estimator::Column(header) => {
                let k = ep
                    .logged_names
                    .iter()
                    .position(|n| n == header)
                    .expect("the reader carries every column estimator's column");
                let w = ep.logged_names.len();
                out.extend((0..t_len).map(|t| ep.logged[t * w + k]));
            }
            Estimator::MeanBaseline
            | Estimator::Whitened
            | Estimator::MinvarTotal
            | Estimator::MinvarRtg => {
                panic!("{self} has no per-episode return proxy")
            }
        }
    }
}

impl fmt::Display for Estimator {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Estimator::Total => f.write_str("total"),
            Estimator::Rtg => f.write_str("rtg"),
            Estimator::RtgDiscounted => f.write_str("rtg_discounted"),
            Estimator::MeanBaseline => f.write_str("mean_baseline"),
            Estimator::Whitened => f.write_str("whitened"),
            Estimator::ValueBaseline => f.write_str("value_baseline"),
            Estimator::Q => f.write_str("q"),
            Estimator::AdvantageQ => f.write_str("advantage_q"),
            Estimator::Td => f.write_str("td"),
            Estimator::NStep(n) => write!(f, "nstep:{n}"),
            // f64's Display prints the shortest text that reads back exactly: 0.95, 1, 0.
            Estimator::Gae(l) => write!(f, "gae:{l}"),
            Estimator::MinvarTotal => f.write_str("minvar_total"),
            Estimator::MinvarRtg => f.write_str("minvar_rtg"),
            Estimator::Column(h) => write!(f, "column:{h}"),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_round_trip() {
        for e in Estimator::default_set()
            .into_iter()
            .chain([Estimator::MinvarRtg])
        {
            assert_eq!(Estimator::parse(&e.to_string()), Ok(e));
        }
        assert_eq!(Estimator::Gae(0.95).to_string(), "gae:0.95");
        assert_eq!(Estimator::Gae(1.0).to_string(), "gae:1");
        assert_eq!(Estimator::NStep(5).to_string(), "nstep:5");
        let c = Estimator::parse("column:adv").unwrap();
        assert_eq!(c, Estimator::Column("adv"));
        assert_eq!(c.to_string(), "column:adv");
        assert!(Estimator::parse("column:").is_err());
    }

    #[test]
    fn bad_names_explain() {
        assert!(Estimator::parse("gae:1.5").unwrap_err().contains("[0, 1]"));
        assert!(
            Estimator::parse("nstep:0")
                .unwrap_err()
                .contains("at least 1")
        );
        assert!(
            Estimator::parse("reinforce")
                .unwrap_err()
                .contains("known:")
        );
        assert_eq!(
            Estimator::parse_list("rtg, gae:0.9,rtg").unwrap(),
            vec![Estimator::Rtg, Estimator::Gae(0.9)]
        );
    }
}

#[cfg(test)]
mod props;
