//! Transformer-XL relative scoring: the naive per-pair form, the efficient
//! relative-shift form, and the two bare matrix products the efficient form needs (the
//! floor on this machine), side by side in one run.
//!
//! Run: `cargo bench --bench xl_relative`. Targets (DEVELOPERS.md, "Benchmarks and size
//! goals"), read as ratios of the reported times, never asserted on time: rel_shift >=
//! 10x faster than naive, and within 1.3x of bare_matmuls, at L = M = 512, d = 64, H = 8.

use std::hint::black_box;
use std::time::Duration;

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion};
use ndarray::{Array2, Array3, Axis};
use posconform::math::Stream;
use posconform::xl_relative::{scores, scores_naive, RelativeInputs, RelativeParams};

struct Inputs {
    q: Array3<f64>,
    k: Array3<f64>,
    r: Array3<f64>,
    u: Array2<f64>,
    v: Array2<f64>,
}

impl Inputs {
    fn new(heads: usize, l: usize, m: usize, d: usize) -> Self {
        let mut s = Stream::new(42);
        Inputs {
            q: s.array((heads, l, d), 1.0),
            k: s.array((heads, m + l, d), 1.0),
            r: s.array((heads, m + l, d), 1.0),
            u: s.array((heads, d), 1.0),
            v: s.array((heads, d), 1.0),
        }
    }

    fn view(&self) -> RelativeInputs<'_> {
        RelativeInputs {
            q: self.q.view(),
            k: self.k.view(),
            r: self.r.view(),
            u: self.u.view(),
            v: self.v.view(),
        }
    }
}

/// `q_h·k_hᵀ` and `q_h·r_hᵀ` for every head: the matrix products rel_shift cannot avoid.
fn bare_matmuls(x: &Inputs) -> Vec<(Array2<f64>, Array2<f64>)> {
    x.q.outer_iter()
        .zip(x.k.outer_iter())
        .zip(x.r.outer_iter())
        .map(|((q, k), r)| (q.dot(&k.t()), q.dot(&r.t())))
        .collect()
}

fn name(l: usize, m: usize, d: usize, h: usize) -> String {
    format!("L{l}_M{m}_d{d}_h{h}")
}

fn headline(c: &mut Criterion) {
    let (h, l, m, d) = (8, 512, 512, 64);
    let x = Inputs::new(h, l, m, d);
    let params = RelativeParams::default();
    // Checked once, outside the timed loops: both forms agree on visible entries.
    let (fast, slow) = (
        scores(&x.view(), &params).unwrap(),
        scores_naive(&x.view(), &params).unwrap(),
    );
    let worst = fast
        .iter()
        .zip(&slow)
        .filter(|(a, _)| a.is_finite())
        .map(|(a, b)| (a - b).abs())
        .fold(0.0, f64::max);
    assert!(worst < 1e-10, "forms disagree by {worst:e}");
    assert_eq!(bare_matmuls(&x).len(), h);

    let mut group = c.benchmark_group("xl_relative");
    group
        .sample_size(10)
        .measurement_time(Duration::from_secs(8));
    let id = name(l, m, d, h);
    group.bench_function(BenchmarkId::new("naive", &id), |b| {
        b.iter(|| black_box(scores_naive(black_box(&x.view()), &params).unwrap()))
    });
    group.bench_function(BenchmarkId::new("rel_shift", &id), |b| {
        b.iter(|| black_box(scores(black_box(&x.view()), &params).unwrap()))
    });
    group.bench_function(BenchmarkId::new("bare_matmuls", &id), |b| {
        b.iter(|| black_box(bare_matmuls(black_box(&x))))
    });
    group.finish();
}

fn sweep(c: &mut Criterion) {
    let mut group = c.benchmark_group("xl_relative_sweep");
    group
        .sample_size(10)
        .measurement_time(Duration::from_secs(4));
    let params = RelativeParams::default();
    for l in [128, 256, 512, 1024, 2048] {
        let x = Inputs::new(8, l, l, 64);
        assert_eq!(scores(&x.view(), &params).unwrap().len_of(Axis(2)), 2 * l);
        let id = name(l, l, 64, 8);
        // The naive form at 2048 takes seconds per call; the headline group compares it.
        if l <= 1024 {
            group.bench_function(BenchmarkId::new("naive", &id), |b| {
                b.iter(|| black_box(scores_naive(&x.view(), &params).unwrap()))
            });
        }
        group.bench_function(BenchmarkId::new("rel_shift", &id), |b| {
            b.iter(|| black_box(scores(&x.view(), &params).unwrap()))
        });
        group.bench_function(BenchmarkId::new("bare_matmuls", &id), |b| {
            b.iter(|| black_box(bare_matmuls(&x)))
        });
    }
    group.finish();
}

criterion_group!(benches, headline, sweep);
criterion_main!(benches);
