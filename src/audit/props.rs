//! Property tests of the whole audit on random batches of episodes.

use super::*;
use crate::testkit::reader;
use proptest::prelude::*;
use std::fmt::Write;

/// One episode: rewards, values, two score components, truncated (with bootstrap) or not.
#[derive(Debug, Clone)]
struct Ep {
    rows: Vec<(f64, f64, f64, f64)>,
    truncated: Option<f64>,
}

fn episode() -> impl Strategy<Value = Ep> {
    (
        prop::collection::vec(
            (-5.0f64..5.0, -5.0f64..5.0, -2.0f64..2.0, -2.0f64..2.0),
            1..30,
        ),
        prop::option::of(-5.0f64..5.0),
    )
        .prop_map(|(rows, truncated)| Ep { rows, truncated })
}

fn batch() -> impl Strategy<Value = Vec<Ep>> {
    prop::collection::vec(episode(), 3..25)
}

/// The log of `eps`, rewards and values times `c`, rows in the order given by `order` (a list
/// of episode indices, one entry per row, taken in sequence within each episode).
fn log(eps: &[Ep], c: f64, order: &[usize]) -> String {
    let mut text =
        String::from("episode,step,reward,terminated,truncated,value,next_value,score_0,score_1\n");
    let mut next = vec![0usize; eps.len()];
    for &e in order {
        let t = next[e];
        next[e] += 1;
        let (r, v, s0, s1) = eps[e].rows[t];
        let last = t + 1 == eps[e].rows.len();
        let (term, trunc, boot) = match (last, eps[e].truncated) {
            (true, Some(b)) => (0, 1, format!("{}", b * c)),
            (true, None) => (1, 0, String::new()),
            _ => (0, 0, String::new()),
        };
        writeln!(
            text,
            "e{e},{t},{},{term},{trunc},{},{boot},{s0},{s1}",
            r * c,
            v * c
        )
        .unwrap();
    }
    text
}

fn in_order(eps: &[Ep]) -> Vec<usize> {
    eps.iter()
        .enumerate()
        .flat_map(|(i, e)| std::iter::repeat_n(i, e.rows.len()))
        .collect()
}

fn cfg() -> AuditConfig {
    AuditConfig {
        resamples: 60,
        splits: 6,
        estimators: Some(
            Estimator::parse_list(
                "rtg,total,rtg_discounted,mean_baseline,whitened,td,gae:0.9,nstep:3",
            )
            .unwrap(),
        ),
        ..AuditConfig::default()
    }
}

fn near(a: f64, b: f64, rel: f64) -> bool {
    (a - b).abs() <= rel * a.abs().max(b.abs()) + 1e-300
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 24, ..ProptestConfig::default() })]

    // The batch gradient is a mean over episodes, and contributions are sorted by episode id
    // before resampling, so neither the order of the episodes nor the interleaving of their rows
    // can change any number (the report is compared as JSON, bit for bit).
    #[test]
    fn order_and_interleaving_change_nothing(eps in batch(), seed in any::<u64>()) {
        let plain = in_order(&eps);
        let mut mixed = plain.clone();
        // A seeded shuffle of the row sequence keeps each episode's own rows in order, since
        // log() takes an episode's rows in sequence whatever positions they land on.
        let mut state = seed | 1;
        for i in (1..mixed.len()).rev() {
            state ^= state << 13; state ^= state >> 7; state ^= state << 17;
            mixed.swap(i, (state % (i as u64 + 1)) as usize);
        }
        let a = run(reader(&log(&eps, 1.0, &plain)), &cfg()).unwrap();
        let b = run(reader(&log(&eps, 1.0, &mixed)), &cfg()).unwrap();
        prop_assert_eq!(serde_json::to_string(&a).unwrap(), serde_json::to_string(&b).unwrap());
    }

    // Every Psi_t except whitened's is linear in (rewards, values, bootstrap values), so scaling
    // them by c > 0 scales each gradient by c and, with the same resamples, every variance and
    // squared bias by c^2; snr, ess and cosine_half are ratios of such terms and do not move.
    // Whitening divides by the spread of returns, which scales by c too: its gradient is
    // scale-free.
    #[test]
    fn scaling_rewards_scales_gradients(eps in batch(), c in 0.01f64..100.0) {
        let order = in_order(&eps);
        let a = run(reader(&log(&eps, 1.0, &order)), &cfg()).unwrap();
        let b = run(reader(&log(&eps, c, &order)), &cfg()).unwrap();
        for ea in &a.estimators {
            let eb = b.estimators.iter().find(|e| e.name == ea.name).unwrap();
            let k = if ea.name == "whitened" { 1.0 } else { c };
            for (x, y) in ea.gradient.as_ref().unwrap().iter().zip(eb.gradient.as_ref().unwrap()) {
                prop_assert!(near(x * k, *y, 1e-6), "{}: {x} * {k} vs {y}", ea.name);
            }
            if ea.name != "whitened" {
                prop_assert!(near(ea.variance.unwrap() * c * c, eb.variance.unwrap(), 1e-6), "{} variance", ea.name);
                for (p, q) in [(ea.snr, eb.snr), (ea.ess, eb.ess), (ea.cosine_half, eb.cosine_half)] {
                    match (p, q) {
                        (Some(p), Some(q)) => prop_assert!(near(p, q, 1e-6), "{}: {p} vs {q}", ea.name),
                        (p, q) => prop_assert_eq!(p.is_some(), q.is_some()),
                    }
                }
            }
        }
    }
}
