//! Criterion benchmarks of the hot stages: reading a log, the per-episode estimator pass, the
//! bootstrap's weighted sums, and the statistics at three score widths. End-to-end timings are
//! in scripts/bench.sh.

use criterion::{Criterion, Throughput, criterion_group, criterion_main};
use gradaudit::audit;
use gradaudit::contrib::{Plan, Work};
use gradaudit::estimator::Estimator;
use gradaudit::log::{LogReader, Progress, ReadOptions};
use gradaudit::resample;
use gradaudit::stats::{self, StatsConfig};
use ndarray::Array2;
use std::fmt::Write;
use std::hint::black_box;

/// A rover-like log in memory: `episodes` x `steps` rows, 32 score columns.
fn log_text(episodes: usize, steps: usize) -> String {
    let mut s = String::from("episode,step,reward,terminated,truncated,value,next_value");
    for j in 0..32 {
        write!(s, ",score_{j}").unwrap();
    }
    s.push('\n');
    for e in 0..episodes {
        for t in 0..steps {
            let last = t + 1 == steps;
            let x = (e * 31 + t * 7) as f64;
            write!(
                s,
                "ep{e},{t},{:.6},0,{},{:.6},",
                -(x * 0.001).sin(),
                u8::from(last),
                (x * 0.002).cos()
            )
            .unwrap();
            if last {
                s.push_str("0.5");
            }
            for j in 0..32 {
                write!(s, ",{:.9}", ((x + j as f64) * 0.37).sin()).unwrap();
            }
            s.push('\n');
        }
    }
    s
}

fn reader(c: &mut Criterion) {
    let text = log_text(500, 200);
    let mut g = c.benchmark_group("reader");
    g.throughput(Throughput::Bytes(text.len() as u64));
    g.sample_size(10);
    g.bench_function("100k rows x 32 scores", |b| {
        b.iter(|| {
            let opts = ReadOptions {
                progress: Progress::Hidden,
                ..ReadOptions::default()
            };
            let bytes = text.clone().into_bytes();
            let mut r =
                LogReader::from_reader(Box::new(std::io::Cursor::new(bytes)), "bench", &opts, None)
                    .unwrap();
            let mut steps = 0;
            while let Some(ep) = r.next_episode().unwrap() {
                steps += ep.len();
            }
            black_box(steps)
        })
    });
    g.finish();
}

fn estimators(c: &mut Criterion) {
    let text = log_text(1, 200);
    let opts = ReadOptions {
        progress: Progress::Hidden,
        ..ReadOptions::default()
    };
    let mut r = LogReader::from_reader(
        Box::new(std::io::Cursor::new(text.into_bytes())),
        "bench",
        &opts,
        None,
    )
    .unwrap();
    let ep = r.next_episode().unwrap().unwrap();
    let plan = Plan::new(
        Estimator::default_set()
            .into_iter()
            .filter(|e| !matches!(e, Estimator::Q | Estimator::AdvantageQ))
            .collect(),
        0.99,
        32,
    );
    let mut work = Work::default();
    let mut row = vec![0.0; plan.width()];
    let mut g = c.benchmark_group("estimators");
    g.throughput(Throughput::Elements(ep.len() as u64));
    g.bench_function("16 estimators, 200-step episode, d = 32", |b| {
        b.iter(|| {
            plan.contribute(black_box(&ep), &mut work, &mut row);
            black_box(row[0])
        })
    });
    g.finish();
}

fn resampler(c: &mut Criterion) {
    let contrib = Array2::from_shape_fn((5000, 579), |(i, j)| ((i * 7 + j) as f64 * 0.01).sin());
    let mut g = c.benchmark_group("resampler");
    g.sample_size(10);
    g.throughput(Throughput::Elements(256));
    g.bench_function("256 replicates, N = 5000, width 579", |b| {
        b.iter(|| {
            let m = resample::weighted_means(contrib.view(), 256, |r, w| {
                resample::bootstrap_counts(1, r as u64, w)
            });
            black_box(m[[0, 0]])
        })
    });
    g.finish();
}

/// The statistics streamed over estimators (bootstrap and half splits from the summaries,
/// then every figure): 1,000 episodes, B = 2000, 200 splits, rtg / total / td / gae:0.9 / the
/// mean baseline, at three score widths. Its cost should grow linearly with d.
fn statistics(c: &mut Criterion) {
    let mut g = c.benchmark_group("statistics");
    g.sample_size(10);
    for d in [64, 256, 1024] {
        let plan = Plan::new(
            vec![
                Estimator::Rtg,
                Estimator::Total,
                Estimator::Td,
                Estimator::Gae(0.9),
                Estimator::MeanBaseline,
            ],
            0.99,
            d,
        );
        let width = plan.width();
        let contrib = Array2::from_shape_fn((1000, width), |(i, j)| {
            if j == width - 1 {
                50.0 // episode length T
            } else {
                ((i * 7 + j) as f64 * 0.01).sin()
            }
        });
        let source = audit::Resampler {
            plan: &plan,
            contrib: contrib.view(),
            seed: 1,
            resamples: 2000,
            splits: 200,
        };
        let point = contrib.mean_axis(ndarray::Axis(0)).unwrap().to_vec();
        let cfg = StatsConfig {
            episodes: 1000,
            confidence: 0.95,
            target_snr: 1.0,
            per_coord: false,
            bias_level: stats::BIAS_LEVEL,
            multiplicity: stats::Multiplicity::Holm,
        };
        g.throughput(Throughput::Elements(d as u64));
        g.bench_function(format!("5 estimators, N = 1000, B = 2000, d = {d}"), |b| {
            b.iter(|| {
                let (st, _) = stats::summarise_with(&plan, 0, &point, &source, &cfg);
                black_box(st[1].mse)
            })
        });
    }
    g.finish();
}

criterion_group!(benches, reader, estimators, resampler, statistics);
criterion_main!(benches);
