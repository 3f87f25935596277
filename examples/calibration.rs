//! The bias test's calibration study (src/audit/calibration.rs): the false-alarm rate of the
//! table-wide flag over simulated logs where every estimator in the table is unbiased, at
//! d = 1 and d = 8 with normal and Student t(3) reward noise, and its power against a known
//! injected bias. Prints the Markdown tables quoted in the README.
//!
//! ```sh
//! cargo run --release --example calibration -- --logs 500 --episodes 300 --resamples 500
//! ```

use gradaudit::audit::calibration::{Bandit, Flags, NULL_SET, Noise, flags, within};
use rayon::prelude::*;

fn arg(name: &str, default: usize) -> usize {
    let args: Vec<String> = std::env::args().collect();
    args.iter()
        .position(|a| a == name)
        .and_then(|i| args.get(i + 1))
        .map_or(default, |v| {
            v.parse().unwrap_or_else(|_| {
                eprintln!("{name} takes a count, not '{v}'");
                std::process::exit(2)
            })
        })
}

fn main() {
    let (logs, episodes, resamples) = (
        arg("--logs", 500),
        arg("--episodes", 300),
        arg("--resamples", 500),
    );
    let level = gradaudit::stats::BIAS_LEVEL;
    let bandit = |d, noise, leak| Bandit {
        d,
        steps: 4,
        noise,
        leak,
    };
    let null: Vec<Bandit> = [
        (1, Noise::Gaussian),
        (8, Noise::Gaussian),
        (1, Noise::StudentT3),
        (8, Noise::StudentT3),
    ]
    .into_iter()
    .map(|(d, n)| bandit(d, n, 0.0))
    .collect();
    // At d = 8 the value column's offset (T - t) d mu makes the paired difference noisier
    // (its per-episode variance grows as d^2), so larger leaks give comparable power.
    let power: Vec<Bandit> = [(1, [0.1, 0.2, 0.4]), (8, [0.2, 0.4, 0.8])]
        .into_iter()
        .flat_map(|(d, leaks)| leaks.map(|leak| bandit(d, Noise::Gaussian, leak)))
        .collect();
    let start = std::time::Instant::now();
    let run = |set: &[Bandit], seed0: u64| -> Vec<Flags> {
        set.par_iter()
            .map(|b| flags(b, NULL_SET, (logs, episodes, resamples), seed0, level))
            .collect()
    };
    let null_flags = run(&null, 10_000);
    let power_flags = run(&power, 20_000);
    println!(
        "{logs} logs per setting, {episodes} episodes of 4 steps, {resamples} resamples, \
         estimators {NULL_SET} (reference rtg; 9 tests), level {level}; ± is the Monte-Carlo \
         standard error sqrt(p (1 - p) / M); pass: Holm rate <= level + 2 sqrt(level (1 - \
         level) / M) = {:.4}\n",
        level + 2.0 * (level * (1.0 - level) / logs as f64).sqrt()
    );
    println!(
        "| setting (all unbiased) | Holm (default) | BH | no adjustment | worst single \
         estimator, raw | pass |"
    );
    println!("|---|---|---|---|---|---|");
    for (b, f) in null.iter().zip(&null_flags) {
        let (raw, name) = &f.worst_raw;
        println!(
            "| {} | {} | {} | {} | {raw} ({name}) | {} |",
            b.describe(),
            f.holm,
            f.bh,
            f.unadjusted,
            if within(f.holm, level, 2.0) {
                "yes"
            } else {
                "NO"
            }
        );
    }
    println!(
        "\n| injected bias (value_baseline) | bias norm | value_baseline detected (Holm) | \
         any flag (Holm) |"
    );
    println!("|---|---|---|---|");
    for (b, f) in power.iter().zip(&power_flags) {
        println!(
            "| {}, leak {} | {:.3} | {} | {} |",
            b.describe(),
            b.leak,
            b.value_baseline_bias_norm(),
            f.value_baseline,
            f.holm
        );
    }
    eprintln!("{:.0} s", start.elapsed().as_secs_f64());
}
