//! Score computation of the relative-bias schemes (ALiBi, T5 buckets, Shaw clipped)
//! next to plain masked `q·kᵀ`, in one run.
//!
//! Run: `cargo bench --bench relative_bias`. Target, read as ratios of the reported
//! times and never asserted on time: each scheme within 1.5x of `plain_qk`
//! (`posconform::attention::dot_scores`, which includes the causal mask) at
//! L = M = 512, d = 64, H = 8. `bare_matmul` (one `q_h·k_hᵀ` per head, no mask) shows
//! the floor.

use std::hint::black_box;

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion};
use ndarray::{Array2, Array3};
use posconform::alibi::{self, AlibiParams};
use posconform::attention::dot_scores;
use posconform::bucketed::{self, bucket, BucketedParams, Buckets};
use posconform::clipped::{self, ClippedParams};
use posconform::math::Stream;
use posconform::Scale;

const HEADS: usize = 8;
const QUERIES: usize = 512;
const MEMORY: usize = 512;
const HEAD_DIM: usize = 64;
/// Shaw et al. 2018 report k = 16 among their clip distances (from memory).
const CLIP: usize = 16;

struct Inputs {
    q: Array3<f64>,
    k: Array3<f64>,
    slopes: Vec<f64>,
    table: Array2<f64>,
    w_key: Array3<f64>,
}

impl Inputs {
    fn new() -> Self {
        let mut s = Stream::new(42);
        Inputs {
            q: s.array((HEADS, QUERIES, HEAD_DIM), 1.0),
            k: s.array((HEADS, MEMORY + QUERIES, HEAD_DIM), 1.0),
            slopes: alibi::slopes(HEADS).unwrap(),
            table: s.array((HEADS, 32), 1.0),
            w_key: s.array((1, 2 * CLIP + 1, HEAD_DIM), 1.0),
        }
    }
}

fn bare_matmul(x: &Inputs) -> Vec<Array2<f64>> {
    x.q.outer_iter()
        .zip(x.k.outer_iter())
        .map(|(q, k)| q.dot(&k.t()))
        .collect()
}

fn close(a: f64, b: f64) -> bool {
    (a - b).abs() <= 1e-12 * (1.0 + a.abs())
}

/// One check of each result outside the timed loop, against the plain scores.
fn assert_results(x: &Inputs) {
    let (plain, _) = dot_scores(x.q.view(), x.k.view(), Scale::InverseSqrtDim).unwrap();
    let last = MEMORY + QUERIES - 1;
    assert_eq!(plain[[0, 0, MEMORY + 1]], f64::NEG_INFINITY);

    let al = alibi::scores(x.q.view(), x.k.view(), &x.slopes, &AlibiParams::default()).unwrap();
    // Query 5 to key 0 is at distance M + 5.
    let expected = plain[[3, 5, 0]] - x.slopes[3] * (MEMORY + 5) as f64;
    assert!(close(al[[3, 5, 0]], expected));

    let rule = Buckets::t5(false);
    let t5 = bucketed::scores(
        x.q.view(),
        x.k.view(),
        x.table.view(),
        &BucketedParams::t5(rule),
    )
    .unwrap();
    let unscaled = plain[[2, 7, 100]] * (HEAD_DIM as f64).sqrt();
    let expected = unscaled + x.table[[2, bucket(100 - (MEMORY + 7) as i64, &rule)]];
    assert!(close(t5[[2, 7, 100]], expected));

    let params = ClippedParams {
        clip_distance: CLIP,
        scale: Scale::InverseSqrtDim,
    };
    let sh = clipped::scores(x.q.view(), x.k.view(), x.w_key.view(), &params).unwrap();
    // The last query on itself reads the middle row of w^K (relative position 0).
    let extra: f64 = (0..HEAD_DIM)
        .map(|c| x.q[[1, QUERIES - 1, c]] * x.w_key[[0, CLIP, c]])
        .sum::<f64>()
        / (HEAD_DIM as f64).sqrt();
    assert!(close(
        sh[[1, QUERIES - 1, last]],
        plain[[1, QUERIES - 1, last]] + extra
    ));
}

fn scores(c: &mut Criterion) {
    let x = Inputs::new();
    assert_results(&x);
    let shape = format!("L{QUERIES}_M{MEMORY}_d{HEAD_DIM}_h{HEADS}");
    let mut group = c.benchmark_group("scores");
    group.sample_size(20);
    group.bench_function(BenchmarkId::new("bare_matmul", &shape), |b| {
        b.iter(|| black_box(bare_matmul(black_box(&x))))
    });
    group.bench_function(BenchmarkId::new("plain_qk", &shape), |b| {
        b.iter(|| black_box(dot_scores(x.q.view(), x.k.view(), Scale::InverseSqrtDim).unwrap()))
    });
    let alibi_params = AlibiParams::default();
    group.bench_function(BenchmarkId::new("alibi", &shape), |b| {
        b.iter(|| {
            black_box(alibi::scores(x.q.view(), x.k.view(), &x.slopes, &alibi_params).unwrap())
        })
    });
    let t5 = BucketedParams::t5(Buckets::t5(false));
    group.bench_function(BenchmarkId::new("bucketed", &shape), |b| {
        b.iter(|| black_box(bucketed::scores(x.q.view(), x.k.view(), x.table.view(), &t5).unwrap()))
    });
    let shaw = ClippedParams {
        clip_distance: CLIP,
        scale: Scale::InverseSqrtDim,
    };
    group.bench_function(BenchmarkId::new("clipped", &shape), |b| {
        b.iter(|| {
            black_box(clipped::scores(x.q.view(), x.k.view(), x.w_key.view(), &shaw).unwrap())
        })
    });
    group.finish();
}

criterion_group!(benches, scores);
criterion_main!(benches);
