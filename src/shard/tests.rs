//! Round trips and refusals of shard files.

use super::*;
use crate::testkit::{Lq, reader};

fn shard_of(text: &str, cfg: &AuditConfig) -> Shard {
    write_shard(reader(text), cfg).expect("shard")
}

fn small_cfg() -> AuditConfig {
    AuditConfig {
        resamples: 40,
        splits: 3,
        ..AuditConfig::default()
    }
}

fn lq_log(n: usize, seed: u64) -> String {
    Lq {
        k: -0.4,
        sigma: 0.6,
        h: 4,
    }
    .log(n, 0.9, seed)
}

// A shard read back is the shard written, bit for bit: sums, hashes, counts, critic sums.
#[test]
fn a_shard_file_reads_back_exactly() {
    let shard = shard_of(&lq_log(30, 1), &small_cfg());
    let back = decode("x.shard", &encode(&shard).unwrap()).unwrap();
    assert_eq!(back.settings, shard.settings);
    let (a, b) = (&shard.partial, &back.partial);
    assert_eq!(a.sums.hi, b.sums.hi);
    assert_eq!(a.sums.lo, b.sums.lo);
    assert_eq!(a.sums.weight, b.sums.weight);
    assert_eq!(a.hashes, b.hashes);
    assert_eq!(a.input.episodes, 30);
    assert_eq!(b.input.steps, a.input.steps);
    assert_eq!(a.recorded.value(), b.recorded.value());
    assert!(a.recorded.value().is_some());
    assert_eq!(fingerprint(&a.hashes), fingerprint(&b.hashes));
}

#[test]
fn differences_name_each_setting() {
    let a = shard_of(&lq_log(10, 1), &small_cfg()).settings;
    let cfg = AuditConfig {
        gamma: 0.5,
        resamples: 41,
        ..small_cfg()
    };
    let b = shard_of(&lq_log(10, 2), &cfg).settings;
    let d = a.differences(&b);
    assert_eq!(
        d,
        vec!["gamma: 0.99 vs 0.5", "resamples: 40 vs 41"],
        "{d:?}"
    );
    assert!(a.differences(&a).is_empty());
}

// Damaged files: each is refused with the part that is wrong.
#[test]
fn damaged_shard_files_are_refused_by_part() {
    let shard = shard_of(&lq_log(12, 3), &small_cfg());
    let mut unsorted = shard.clone();
    unsorted.partial.hashes.swap(0, 1);
    let err = decode("u.shard", &encode(&unsorted).unwrap()).unwrap_err();
    assert!(
        err.to_string().contains("`id_hashes` is not sorted"),
        "{err}"
    );
    let mut wider = shard.clone();
    wider.settings.width += 1;
    let err = decode("w.shard", &encode(&wider).unwrap()).unwrap_err();
    assert!(err.to_string().contains("`sums_hi` has shape"), "{err}");
    let mut bytes = encode(&shard).unwrap();
    bytes.truncate(bytes.len() - 8);
    let err = decode("t.shard", &bytes).unwrap_err();
    assert!(
        err.to_string().starts_with("t.shard: not a usable"),
        "{err}"
    );
}

#[test]
fn a_fitted_critic_is_refused_for_shards() {
    let cfg = AuditConfig {
        value_net: Some("v.json".into()),
        ..small_cfg()
    };
    let err = write_shard(reader(&lq_log(5, 1)), &cfg).unwrap_err();
    assert!(
        err.to_string().contains("not available for shards"),
        "{err}"
    );
}
