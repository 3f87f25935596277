//! The catalogue of known faults in advantage and return code, each recomputing the column the
//! way the faulty code would from the same log. A variant explains a logged column when every
//! step lies within tolerance of it and it differs from the reference on at least one step.
//!
//! Faults that cross episodes work on *streams*: the rows of one environment in file order
//! (the whole log is one stream when it has no environment column), or, for the file-order
//! trace fault, all rows in file order. Within a stream every step is a link
//! (r, V, next, cut): the value after the step that the code bootstraps from, and whether the
//! recursion stops after it. The chain computation of a claim on links is
//!
//! ```text
//! GAE(L):   A_i = r_i + gamma next_i - V_i + [not cut_i] gamma L A_{i+1}
//! return:   the same with L = 1
//! n-step:   A_i = sum_{k<m} gamma^k r_{i+k} + gamma^m next_{i+m-1} - V_i,
//!           m = min(n, steps to the first cut at or after i, inclusive)
//! ```
//!
//! The correct computation is one chain per episode with next = V_{t+1} (V_T at the end) and a
//! cut at its last step; each fault changes the links:
//!
//! | variant | links |
//! |---|---|
//! | truncation_as_termination | V_T = 0 for truncated episodes |
//! | bootstrap_from_current_value | next_t = V_t (0 after a terminal step) |
//! | trace_across_episodes_file_order | all rows in file order, cut only at the end; GAE keeps each delta right and carries the trace, n-step and returns bootstrap from the next row |
//! | trace_across_episodes_env_order | the same per environment (needs an environment column) |
//! | end_flag_early | the cut (next = 0) one step before each episode's last step; the last step continues into the next episode |
//! | end_flag_late | the cut (next = 0) one step after each episode's last step |
//! | bootstrap_twice_at_truncation | V_T counted twice: r_{T-1} + 2 gamma V_T |
//! | reward_twice_at_truncation | r_{T-1} counted twice at truncation |
//! | next_episode_first_value | V_T = V_0 of the environment's next episode at truncation |
//! | normalised_batch | y = a A + b over the whole log (least squares; a > 0) |
//! | normalised_minibatch | y = a_k A + b_k on consecutive runs of rows in file order |
//! | other_window | an n-step claim at a fitted window n, fit.rs |
//! | other_gamma_lambda | the claim at a fitted gamma (and lambda), fit.rs |

use super::{Batch, CheckConfig, Claim, Claimed, Column, Kind, fit, reference};
use crate::episode::End;
use crate::report::crosscheck::VariantResult;
use std::collections::BTreeMap;

/// One step of a chain (see the module header).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Link {
    pub r: f64,
    pub v: f64,
    pub next: f64,
    pub cut: bool,
}

/// The claim's advantages on a chain of links; the last link must be cut.
pub fn chain(c: &Claimed, links: &[Link]) -> Vec<f64> {
    let gamma = c.gamma;
    let n_links = links.len();
    let mut out = vec![0.0; n_links];
    match c.claim {
        Claim::Gae(_) | Claim::Return => {
            let decay = c.decay();
            let mut acc = 0.0;
            for i in (0..n_links).rev() {
                let l = links[i];
                let carried = if l.cut { 0.0 } else { decay * acc };
                acc = l.r + gamma * l.next - l.v + carried;
                out[i] = acc;
            }
        }
        Claim::NStep(n) => {
            // Discounted reward sums that restart after every cut: G_i = r_i + gamma G_{i+1}.
            let mut g = vec![0.0; n_links + 1];
            let mut stop = vec![n_links; n_links];
            let mut next_cut = n_links;
            for i in (0..n_links).rev() {
                if links[i].cut {
                    next_cut = i;
                }
                stop[i] = next_cut;
                let after = if links[i].cut { 0.0 } else { g[i + 1] };
                g[i] = links[i].r + gamma * after;
            }
            for i in 0..n_links {
                let m = n.min(stop[i] + 1 - i);
                let gm = gamma.powi(m as i32);
                let after = if i + m <= stop[i] { g[i + m] } else { 0.0 };
                out[i] = g[i] - gm * after + gm * links[i + m - 1].next - links[i].v;
            }
        }
    }
    out
}

/// The flat indices of each stream, in file order: one stream per environment value (the
/// whole log when it has none), or one for the whole log when `whole` is set.
pub fn streams(batch: &Batch, at: &[(usize, usize)], whole: bool) -> Vec<Vec<usize>> {
    let mut keys: Vec<Option<&str>> = Vec::new();
    let mut out: Vec<Vec<usize>> = Vec::new();
    for (i, &(e, _)) in at.iter().enumerate() {
        let env = if whole {
            None
        } else {
            batch.episodes[e].env.as_deref()
        };
        let k = match keys.iter().position(|x| *x == env) {
            Some(k) => k,
            None => {
                keys.push(env);
                out.push(Vec::new());
                keys.len() - 1
            }
        };
        out[k].push(i);
    }
    for s in &mut out {
        s.sort_by_key(|&i| (batch.line(at[i].0, at[i].1), i));
    }
    out
}

/// The claim recomputed per episode from changed inputs: `inputs` gives (rewards, tail).
fn per_episode(batch: &Batch, c: &Claimed, inputs: impl Fn(usize) -> (Vec<f64>, f64)) -> Vec<f64> {
    batch.flat(|e, _, v| {
        let (r, tail) = inputs(e);
        let mut out = Vec::new();
        reference::advantages(c, &r, v, tail, &mut out);
        out
    })
}

/// The truncation bootstrap of episode e, if it was truncated with one.
fn bootstrap(batch: &Batch, e: usize) -> Option<f64> {
    match batch.episodes[e].end {
        End::Truncated { bootstrap } => bootstrap,
        End::Terminated => None,
    }
}

/// Chains each stream with `link(position in stream, stream)` and scatters the result into a
/// flat column.
fn by_streams(
    batch: &Batch,
    c: &Claimed,
    streams: &[Vec<usize>],
    link: impl Fn(usize, &[usize]) -> Link,
) -> Vec<f64> {
    let mut out = vec![0.0; batch.steps];
    for s in streams {
        let links: Vec<Link> = (0..s.len()).map(|k| link(k, s)).collect();
        for (k, a) in chain(c, &links).into_iter().enumerate() {
            out[s[k]] = a;
        }
    }
    out
}

/// The data a link needs about flat step i: (r, V, correct next, last step of its episode).
fn step(batch: &Batch, at: &[(usize, usize)], i: usize) -> (f64, f64, f64, bool) {
    let (e, t) = at[i];
    let ep = &batch.episodes[e];
    let v = &batch.values[e];
    let last = t + 1 == ep.len();
    let next = if last { ep.tail_value() } else { v[t + 1] };
    (ep.rewards[t], v[t], next, last)
}

/// The trace or return carried across episode ends along each stream.
fn carried(batch: &Batch, c: &Claimed, at: &[(usize, usize)], s: &[Vec<usize>]) -> Vec<f64> {
    let gae = matches!(c.claim, Claim::Gae(_));
    by_streams(batch, c, s, |k, s| {
        let (r, v, next, _) = step(batch, at, s[k]);
        let end = k + 1 == s.len();
        let next = if gae || end {
            next
        } else {
            step(batch, at, s[k + 1]).1
        };
        Link {
            r,
            v,
            next,
            cut: end,
        }
    })
}

/// The end flag read one step early (`early`) or late along each stream.
fn shifted(
    batch: &Batch,
    c: &Claimed,
    at: &[(usize, usize)],
    s: &[Vec<usize>],
    early: bool,
) -> Vec<f64> {
    by_streams(batch, c, s, |k, s| {
        let (r, v, next, _) = step(batch, at, s[k]);
        if k + 1 == s.len() {
            return Link {
                r,
                v,
                next,
                cut: true,
            };
        }
        let flagged = if early {
            step(batch, at, s[k + 1]).3
        } else {
            k > 0 && step(batch, at, s[k - 1]).3
        };
        let next = if flagged {
            0.0
        } else {
            step(batch, at, s[k + 1]).1
        };
        Link {
            r,
            v,
            next,
            cut: flagged,
        }
    })
}

/// V_0 of the next episode of the same stream, for each episode (None for a stream's last).
fn next_first_values(batch: &Batch, at: &[(usize, usize)]) -> Vec<Option<f64>> {
    let mut out = vec![None; batch.episodes.len()];
    for s in streams(batch, at, false) {
        let firsts: Vec<usize> = s.iter().copied().filter(|&i| at[i].1 == 0).collect();
        for w in firsts.windows(2) {
            out[at[w[0]].0] = Some(batch.values[at[w[1]].0][0]);
        }
    }
    out
}

/// A candidate column with its name and fitted parameters.
pub struct Candidate {
    pub name: &'static str,
    pub description: String,
    pub column: Vec<f64>,
    /// Per-step tolerances of the candidate when they differ from the column's (affine maps
    /// scale them); None for the column's own.
    pub tol: Option<Vec<f64>>,
    pub parameters: BTreeMap<&'static str, f64>,
}

fn candidate(name: &'static str, description: &str, column: Vec<f64>) -> Candidate {
    Candidate {
        name,
        description: description.to_string(),
        column,
        tol: None,
        parameters: BTreeMap::new(),
    }
}

/// The input-level faults (every row but the normalisations and the fit), as advantages.
pub fn input_faults(batch: &Batch, c: &Claimed, at: &[(usize, usize)]) -> Vec<Candidate> {
    let mut out = episode_faults(batch, c, at);
    out.extend(stream_faults(batch, c, at));
    out
}

/// Faults at one episode's end or in its bootstraps.
fn episode_faults(batch: &Batch, c: &Claimed, at: &[(usize, usize)]) -> Vec<Candidate> {
    let rewards = |e: usize| batch.episodes[e].rewards.clone();
    let tail = |e: usize| batch.episodes[e].tail_value();
    let mut out = vec![candidate(
        "truncation_as_termination",
        "truncated episodes bootstrapped with 0, as if terminated",
        per_episode(batch, c, |e| (rewards(e), 0.0)),
    )];
    let per_ep = streams_per_episode(batch, at);
    out.push(candidate(
        "bootstrap_from_current_value",
        "each bootstrap reads V(s_t), the step's own state, instead of V(s_t+1)",
        by_streams(batch, c, &per_ep, |k, s| {
            let (r, v, _, last) = step(batch, at, s[k]);
            let terminal = last && batch.episodes[at[s[k]].0].end == End::Terminated;
            Link {
                r,
                v,
                next: if terminal { 0.0 } else { v },
                cut: last,
            }
        }),
    ));
    out.push(candidate(
        "bootstrap_twice_at_truncation",
        "at truncation the bootstrap gamma V_T is counted twice (added to the reward and \
         bootstrapped again)",
        per_episode(batch, c, |e| (rewards(e), 2.0 * tail(e))),
    ));
    out.push(candidate(
        "reward_twice_at_truncation",
        "at truncation the last reward is counted twice",
        per_episode(batch, c, |e| {
            let mut r = rewards(e);
            if let (Some(_), Some(last)) = (bootstrap(batch, e), r.last_mut()) {
                *last *= 2.0;
            }
            (r, tail(e))
        }),
    ));
    let firsts = next_first_values(batch, at);
    out.push(candidate(
        "next_episode_first_value",
        "at truncation the bootstrap is V of the next episode's first state (an auto-reset \
         environment's observation)",
        per_episode(batch, c, |e| {
            let t = match (&batch.episodes[e].end, firsts[e]) {
                (End::Truncated { .. }, Some(v0)) => v0,
                _ => tail(e),
            };
            (rewards(e), t)
        }),
    ));
    out
}

/// Faults that read across episode boundaries along streams.
fn stream_faults(batch: &Batch, c: &Claimed, at: &[(usize, usize)]) -> Vec<Candidate> {
    let mut out = Vec::new();
    out.push(candidate(
        "trace_across_episodes_file_order",
        "the trace (or return) is not reset at episode ends: carried over rows in file order",
        carried(batch, c, at, &streams(batch, at, true)),
    ));
    if super::environments(&batch.episodes) >= 2 {
        out.push(candidate(
            "trace_across_episodes_env_order",
            "the trace (or return) is not reset at episode ends: carried over each \
             environment's rows in file order",
            carried(batch, c, at, &streams(batch, at, false)),
        ));
    }
    let env = streams(batch, at, false);
    out.push(candidate(
        "end_flag_early",
        "the end flag is read one step early: the recursion stops before each episode's last \
         step, which runs on into the next episode",
        shifted(batch, c, at, &env, true),
    ));
    out.push(candidate(
        "end_flag_late",
        "the end flag is read one step late: the recursion runs into the next episode's first \
         step and stops after it",
        shifted(batch, c, at, &env, false),
    ));
    out
}

/// One stream per episode (the correct chains), for faults inside an episode.
fn streams_per_episode(batch: &Batch, at: &[(usize, usize)]) -> Vec<Vec<usize>> {
    let _ = at;
    batch
        .offsets
        .iter()
        .zip(&batch.episodes)
        .map(|(&o, ep)| (o..o + ep.len()).collect())
        .collect()
}

/// Judges a candidate column against the logged one.
fn judge(batch: &Batch, at: &[(usize, usize)], col: &Column, mut cand: Candidate) -> VariantResult {
    cand.parameters.retain(|_, v| v.is_finite());
    let n = col.logged.len();
    let mut matching = 0;
    let mut affected = 0;
    let mut episodes = vec![false; batch.episodes.len()];
    let mut first: Option<u64> = None;
    let tol = cand.tol.as_deref().unwrap_or(&col.tol);
    for i in 0..n {
        let x = cand.column[i];
        // A step without a finite value or tolerance cannot be matched.
        if !(x.is_finite() && tol[i].is_finite()) || col.unchecked(i) {
            continue;
        }
        if (col.logged[i] - x).abs() <= tol[i] {
            matching += 1;
        }
        if (x - col.reference[i]).abs() > tol[i] {
            affected += 1;
            episodes[at[i].0] = true;
            let line = batch.line(at[i].0, at[i].1);
            first = Some(first.map_or(line, |f| f.min(line)));
        }
    }
    VariantResult {
        name: cand.name,
        description: cand.description,
        explains: matching == n && affected > 0,
        steps_matching: matching as u64,
        affected_steps: affected as u64,
        affected_episodes: episodes.iter().filter(|x| **x).count() as u64,
        first_affected_line: first,
        parameters: cand.parameters,
    }
}

/// Adds V_t to advantages when the checked column holds value targets.
fn as_kind(batch: &Batch, kind: Kind, mut adv: Vec<f64>) -> Vec<f64> {
    if kind == Kind::Return {
        let v = batch.flat(|_, _, v| v.to_vec());
        for (a, v) in adv.iter_mut().zip(v) {
            *a += v;
        }
    }
    adv
}

/// Every variant of the catalogue, judged against the column.
pub fn evaluate(
    batch: &Batch,
    cfg: &CheckConfig,
    col: &Column,
    at: &[(usize, usize)],
) -> Vec<VariantResult> {
    let mut out = Vec::new();
    for mut cand in input_faults(batch, &cfg.claim, at) {
        cand.column = as_kind(batch, col.kind, cand.column);
        out.push(judge(batch, at, col, cand));
    }
    if col.kind == Kind::Advantage {
        out.push(judge(batch, at, col, super::fit::normalised_batch(col)));
        out.push(judge(batch, at, col, normalised_minibatch(batch, at, col)));
    }
    if let Some((claim, n)) = fit::window(batch, cfg, col) {
        let mut cand = candidate(
            "other_window",
            "the n-step computation with another window n, fitted to the column",
            as_kind(batch, col.kind, recompute(batch, &claim)),
        );
        cand.parameters.insert("n", n as f64);
        out.push(judge(batch, at, col, cand));
    }
    let (claim, params) = fit::gamma_lambda(batch, cfg, col);
    let mut cand = candidate(
        "other_gamma_lambda",
        "the claimed computation with another gamma (and lambda), fitted to the column",
        as_kind(batch, col.kind, recompute(batch, &claim)),
    );
    cand.parameters = params;
    out.push(judge(batch, at, col, cand));
    out
}

/// The reference advantages under another claim.
fn recompute(batch: &Batch, claim: &Claimed) -> Vec<f64> {
    batch.flat(|_, ep, v| {
        let mut out = Vec::new();
        reference::advantages(claim, &ep.rewards, v, ep.tail_value(), &mut out);
        out
    })
}

/// Per-minibatch normalisation: runs of rows in file order, each an affine image of the
/// reference (see fit.rs for the segmentation).
fn normalised_minibatch(batch: &Batch, at: &[(usize, usize)], col: &Column) -> Candidate {
    let order = streams(batch, at, true).pop().unwrap_or_default();
    fit::normalised_runs(col, &order)
}
