//! Speed of the statistics engine (criterion). Run: `cargo bench --bench stats`.
//!
//! Targets (issue: statistics engine): a streaming add with the newcomer's
//! diagnostics and the slope's p-value in at most 2 µs whatever n is; all
//! points' diagnostics at n = 1,000,000 in at most 100 ms.

use std::hint::black_box;

use criterion::{BenchmarkId, Criterion, criterion_group, criterion_main};
use slopewarden::stats::{Influence, SeriesState, fit_line, influence, influence_into};

/// Deterministic data like a weekly monitoring series in decimal years.
fn series(n: usize) -> (Vec<f64>, Vec<f64>) {
    let mut s: u64 = 0x9E37_79B9_7F4A_7C15;
    let mut next = move || {
        s ^= s >> 12;
        s ^= s << 25;
        s ^= s >> 27;
        (s.wrapping_mul(0x2545_F491_4F6C_DD1D) >> 11) as f64 / (1u64 << 53) as f64
    };
    let mut x = Vec::with_capacity(n);
    let mut y = Vec::with_capacity(n);
    for i in 0..n {
        let t = 1990.0 + i as f64 / 52.0 + (next() - 0.5) / 200.0;
        x.push(t);
        y.push(12.0 - 0.03 * (t - 1990.0) + (next() - 0.5) * 2.0);
    }
    (x, y)
}

fn streaming_add(c: &mut Criterion) {
    let mut group = c.benchmark_group("streaming_add_with_diagnostics_and_p");
    for n in [100usize, 10_000, 1_000_000] {
        let (x, y) = series(n);
        let mut state = SeriesState::new();
        for (&a, &b) in x.iter().zip(&y) {
            state
                .add(a, b)
                .unwrap_or_else(|e| panic!("BUG: generated data is finite: {e}"));
        }
        let (nx, ny) = (x[n - 1] + 1.0 / 52.0, y[n - 1] + 0.3);
        group.bench_with_input(BenchmarkId::from_parameter(n), &state, |b, st| {
            b.iter(|| {
                let mut s = *st;
                let arrival = s.add(black_box(nx), black_box(ny));
                let arrival = arrival.unwrap_or_else(|e| panic!("BUG: finite input: {e}"));
                black_box((arrival.influence, arrival.prediction, arrival.slope_p()))
            })
        });
    }
    group.finish();
}

fn all_points(c: &mut Criterion) {
    let mut group = c.benchmark_group("diagnostics_all_points");
    group.sample_size(20);
    for n in [1_000usize, 1_000_000] {
        let (x, y) = series(n);
        let fit = fit_line(&x, &y, 0.95).unwrap_or_else(|e| panic!("BUG: {e}"));
        group.bench_with_input(BenchmarkId::new("fresh_vec", n), &n, |b, _| {
            b.iter(|| black_box(influence(&x, &y, &fit).map(|v| v.len())))
        });
        // Every point's diagnostics computed, the largest Cook's distance
        // kept: the work of a scan, with no per-point storage.
        group.bench_with_input(BenchmarkId::new("scan", n), &n, |b, _| {
            b.iter(|| {
                let view = Influence::new(&x, &y, &fit).unwrap_or_else(|e| panic!("BUG: {e}"));
                black_box(
                    view.iter()
                        .filter_map(|p| p.cooks_distance())
                        .fold(0.0f64, f64::max),
                )
            })
        });
        let mut out = Vec::new();
        group.bench_with_input(BenchmarkId::new("reused_vec", n), &n, |b, _| {
            b.iter(|| black_box(influence_into(&x, &y, &fit, &mut out).map(|()| out.len())))
        });
    }
    group.finish();
    let mut group = c.benchmark_group("fit_line");
    group.sample_size(20);
    let (x, y) = series(1_000_000);
    group.bench_function("1000000", |b| {
        b.iter(|| black_box(fit_line(&x, &y, 0.95).map(|f| f.slope)))
    });
    group.finish();
}

criterion_group!(benches, streaming_add, all_points);
criterion_main!(benches);
