//! Speed of the robust trend statistics (criterion). Run: `cargo bench --bench robust`.
//!
//! `robust_every_refit_to_100` compares recomputing at every refit of a
//! short series with the kept pairwise slopes (`PairwiseTrend`).
//!
//! Targets: Theil-Sen slope with its confidence interval at n = 10,000 within
//! 100 ms; Mann-Kendall at n = 1,000,000 well under a second.

use std::hint::black_box;
use std::time::Duration;

use criterion::{BenchmarkId, Criterion, criterion_group, criterion_main};
use slopewarden::stats::pairwise::PairwiseTrend;
use slopewarden::stats::robust::{mann_kendall, theil_sen};

/// SplitMix64: deterministic pseudo-random numbers for the test series.
struct Rng(u64);

impl Rng {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in [0, 1).
    fn unit(&mut self) -> f64 {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// A monitoring-like series: x in decimal years over 25 years with jitter,
/// y a linear trend plus noise, rounded to 2 decimals (so some ties).
fn series(n: usize) -> (Vec<f64>, Vec<f64>) {
    let mut rng = Rng(n as u64);
    let step = 25.0 / n as f64;
    let x: Vec<f64> = (0..n)
        .map(|i| 2000.0 + (i as f64 + 0.8 * rng.unit()) * step)
        .collect();
    let y: Vec<f64> = x
        .iter()
        .map(|&t| {
            let noise = rng.unit() + rng.unit() + rng.unit() - 1.5;
            ((12.0 + 0.35 * (t - 2000.0) + 2.0 * noise) * 100.0).round() / 100.0
        })
        .collect();
    (x, y)
}

fn bench_theil_sen(c: &mut Criterion) {
    let mut group = c.benchmark_group("theil_sen");
    group
        .sample_size(10)
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(3));
    for n in [1_000, 10_000] {
        let (x, y) = series(n);
        group.bench_with_input(BenchmarkId::from_parameter(n), &n, |b, _| {
            b.iter(|| theil_sen(black_box(&x), black_box(&y), 0.95))
        });
    }
    group.finish();
}

fn bench_mann_kendall(c: &mut Criterion) {
    let mut group = c.benchmark_group("mann_kendall");
    group
        .sample_size(10)
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(4));
    for n in [10_000, 1_000_000] {
        let (x, y) = series(n);
        group.bench_with_input(BenchmarkId::from_parameter(n), &n, |b, _| {
            b.iter(|| mann_kendall(black_box(&x), black_box(&y)))
        });
    }
    group.finish();
}

/// A short series refitting at every record, as the ingest path keeps its
/// robust slope current up to 100 points: Theil-Sen and Mann-Kendall at
/// every n from 3 to 100, from scratch against kept pairwise slopes, side
/// by side in one run.
fn bench_every_refit(c: &mut Criterion) {
    let mut group = c.benchmark_group("robust_every_refit_to_100");
    group
        .sample_size(20)
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(3));
    let (x, y) = series(100);
    group.bench_function("from_scratch", |b| {
        b.iter(|| {
            for n in 3..=100 {
                black_box(theil_sen(&x[..n], &y[..n], 0.95).ok());
                black_box(mann_kendall(&x[..n], &y[..n]).ok());
            }
        })
    });
    let points: Vec<(f64, f64)> = x.iter().copied().zip(y.iter().copied()).collect();
    group.bench_function("kept_pairwise", |b| {
        b.iter(|| {
            let mut kept = PairwiseTrend::new();
            for n in 3..=100 {
                kept.follow(black_box(&points[..n]));
                black_box(kept.theil_sen(0.95).ok());
                black_box(kept.mann_kendall().ok());
            }
        })
    });
    group.finish();
}

criterion_group!(
    benches,
    bench_theil_sen,
    bench_mann_kendall,
    bench_every_refit
);
criterion_main!(benches);
