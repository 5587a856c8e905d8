//! Per-scheme benchmarks at the shape of the performance goals in DEVELOPERS.md
//! (L = M = 512, d = 64, H = 8, f64).
//!
//! One function per scheme, each registering its own groups, all combined in the
//! `criterion_group!` at the bottom: adding a scheme is one function and one name
//! there. `scores/plain_qk` is the no-position baseline every scheme's scores are read
//! against. Inputs are built outside the timed closures, and every result is checked
//! once before timing so a broken kernel cannot produce a fast, meaningless figure.

use criterion::{black_box, criterion_group, criterion_main, Criterion};
use ndarray::Array3;
use posconform::attention::dot_scores;
use posconform::math::Stream;
use posconform::rotary::{self, Pairing, Rotary, RotaryParams};
use posconform::Scale;

const HEADS: usize = 8;
const QUERIES: usize = 512;
const MEMORY: usize = 512;
const HEAD_DIM: usize = 64;
const SHAPE: &str = "L512_M512_d64_h8";
/// Where the current segment starts: far enough out that no angle is trivial.
const QUERY_START: i64 = 100_000;

/// Queries `[H, L, d]` and keys `[H, M+L, d]` from a fixed seed.
fn queries_and_keys() -> (Array3<f64>, Array3<f64>) {
    let mut stream = Stream::new(2024);
    (
        stream.array((HEADS, QUERIES, HEAD_DIM), 1.0),
        stream.array((HEADS, MEMORY + QUERIES, HEAD_DIM), 1.0),
    )
}

/// Every entry a query may see is finite, every other is `-inf`, shape `[H, L, M+L]`.
fn assert_scores_well_formed(scores: &Array3<f64>) {
    assert_eq!(scores.dim(), (HEADS, QUERIES, MEMORY + QUERIES));
    for head in scores.outer_iter() {
        for (i, row) in head.outer_iter().enumerate() {
            for (j, x) in row.iter().enumerate() {
                assert_eq!(x.is_finite(), j <= MEMORY + i, "[{i}, {j}] = {x}");
            }
        }
    }
}

fn plain_qk(c: &mut Criterion) {
    let (q, k) = queries_and_keys();
    let (once, _) = dot_scores(q.view(), k.view(), Scale::default()).unwrap();
    assert_scores_well_formed(&once);
    let mut group = c.benchmark_group("scores");
    group.bench_function(format!("plain_qk/{SHAPE}"), |b| {
        b.iter(|| {
            black_box(dot_scores(
                black_box(q.view()),
                black_box(k.view()),
                Scale::default(),
            ))
        })
    });
    group.finish();
}

fn rotary(c: &mut Criterion) {
    let (q, k) = queries_and_keys();
    let rope = Rotary::new(RotaryParams::full(HEAD_DIM, Pairing::HalfSplit)).unwrap();
    let window = posconform::Window::new(MEMORY, QUERIES).unwrap();
    let (query_positions, key_positions) = rotary::positions(window, QUERY_START).unwrap();

    let rotated = rope.apply(k.view(), &key_positions).unwrap();
    assert_eq!(rotated.dim(), k.dim());
    assert!(rotated.iter().all(|x| x.is_finite()));
    let mut group = c.benchmark_group("rotary");
    // What one attention step rotates: its queries and all of its keys.
    group.bench_function(format!("apply/{SHAPE}"), |b| {
        b.iter(|| {
            let q_rotated = rope.apply(black_box(q.view()), &query_positions).unwrap();
            let k_rotated = rope.apply(black_box(k.view()), &key_positions).unwrap();
            black_box((q_rotated, k_rotated))
        })
    });
    group.finish();

    let (once, _) =
        rotary::scores(&rope, q.view(), k.view(), QUERY_START, Scale::default()).unwrap();
    assert_scores_well_formed(&once);
    let mut group = c.benchmark_group("scores");
    group.bench_function(format!("rotary/{SHAPE}"), |b| {
        b.iter(|| {
            black_box(rotary::scores(
                &rope,
                black_box(q.view()),
                black_box(k.view()),
                QUERY_START,
                Scale::default(),
            ))
        })
    });
    group.finish();
}

criterion_group!(schemes, plain_qk, rotary);
criterion_main!(schemes);
