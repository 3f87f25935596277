//! Merging shards: the settings must agree (else an error listing every difference), no
//! episode may be in two shards (their sorted id hashes are compared pairwise), then the
//! sums, counts, warnings and critic sums add up and the merged partial is finished into the
//! report exactly as a single Poisson pass over the whole log would be.

use super::{Rebuilt, Shard, ShardSettings};
use crate::audit::streamed::Partial;
use crate::error::{Error, Result};
use crate::report::{AuditReport, MergedShard};

/// One shard to merge and the name it is known by in messages (its path).
pub struct MergeInput {
    pub name: String,
    pub shard: Shard,
}

/// How many hashes two sorted lists share.
fn shared(a: &[u128], b: &[u128]) -> usize {
    let (mut i, mut j, mut n) = (0, 0, 0);
    while i < a.len() && j < b.len() {
        match a[i].cmp(&b[j]) {
            std::cmp::Ordering::Less => i += 1,
            std::cmp::Ordering::Greater => j += 1,
            std::cmp::Ordering::Equal => {
                n += 1;
                i += 1;
                j += 1;
            }
        }
    }
    n
}

/// Checks that the shards fit together and adds them up.
pub fn merge(inputs: Vec<MergeInput>) -> Result<(ShardSettings, Partial)> {
    let Some(first) = inputs.first() else {
        return Err(Error::usage("merge: give at least one shard file"));
    };
    let settings = first.shard.settings.clone();
    let mut problems = Vec::new();
    for other in &inputs[1..] {
        for d in settings.differences(&other.shard.settings) {
            problems.push(format!("{} vs {}: {d}", first.name, other.name));
        }
    }
    if !problems.is_empty() {
        return Err(Error::usage(format!(
            "merge: the shards were written with different settings, so their sums do not add \
             up to one audit:\n  {}\nwrite every shard with the same options",
            problems.join("\n  ")
        )));
    }
    for (i, a) in inputs.iter().enumerate() {
        for b in &inputs[i + 1..] {
            let n = shared(&a.shard.partial.hashes, &b.shard.partial.hashes);
            if n > 0 {
                return Err(Error::usage(format!(
                    "merge: {} and {} share {n} episode(s); each episode must be in exactly one \
                     shard (was a shard given twice, or a log split with overlapping ranges?)",
                    a.name, b.name
                )));
            }
        }
    }
    let shards: Vec<MergedShard> = inputs
        .iter()
        .map(|i| MergedShard {
            shard: i.name.clone(),
            log: i.shard.partial.input.file.clone(),
        })
        .collect();
    let mut iter = inputs.into_iter();
    let mut total = iter.next().expect("checked non-empty").shard.partial;
    let mut files = vec![total.input.file.clone()];
    for next in iter {
        let mut p = next.shard.partial;
        total.sums.merge(&mut p.sums);
        total.hashes.extend_from_slice(&p.hashes);
        let (t, i) = (&mut total.input, &p.input);
        t.rows += i.rows;
        t.episodes += i.episodes;
        t.steps += i.steps;
        t.terminated += i.terminated;
        t.truncated += i.truncated;
        files.push(i.file.clone());
        total.warnings.extend(&p.warnings);
        total.recorded.merge(&p.recorded);
    }
    total.hashes.sort_unstable();
    total.input.file = files.join(" + ");
    total.input.shards = shards;
    Ok((settings, total))
}

/// The report of merged shards (every format renders it like an audit's).
pub fn merged_report(inputs: Vec<MergeInput>) -> Result<AuditReport> {
    let (settings, mut partial) = merge(inputs)?;
    let rebuilt = Rebuilt::of(&settings)?;
    partial.input.critic.recorded_explained_variance = settings
        .recorded_values
        .then(|| partial.recorded.value())
        .flatten();
    crate::audit::streamed::finish(&mut partial, &rebuilt.layout(), &rebuilt.cfg)
}
