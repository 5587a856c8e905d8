//! The reference's matrix product (`posconform::math::product::gemm`: one fixed
//! summation order, bit-identical on every machine) against ndarray's product
//! (matrixmultiply, processor-dispatched kernels with fused multiply-add) and numpy's
//! (`a @ b`, OpenBLAS or whatever numpy was built with), on the shapes attention
//! needs: `q·kᵀ` (L × d · d × K), `probs·v` (L × K · K × d), and a square product.
//!
//! Run: `cargo bench --bench product`. numpy is timed in a child process in the same
//! run (`benches/peers/numpy_products.py`; skipped with a note when python3 or numpy is
//! missing) and its medians are printed after the criterion groups with the ratios to
//! ours. Read the ratios; nothing asserts on time.

use std::hint::black_box;
use std::time::Duration;

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion};
use ndarray::Array2;
use posconform::math::product::gemm;
use posconform::math::Stream;

const SHAPES: &[(&str, usize, usize, usize)] = &[
    ("q_kt", 512, 64, 1024),
    ("probs_v", 512, 1024, 64),
    ("square", 512, 512, 512),
];

fn operands(m: usize, k: usize, n: usize) -> (Array2<f64>, Array2<f64>) {
    let mut s = Stream::new(5);
    (s.array((m, k), 1.0), s.array((k, n), 1.0))
}

fn products(c: &mut Criterion) {
    let single = rayon::ThreadPoolBuilder::new()
        .num_threads(1)
        .build()
        .expect("a one-thread pool");
    let mut group = c.benchmark_group("product");
    group
        .sample_size(20)
        .measurement_time(Duration::from_secs(3));
    for &(name, m, k, n) in SHAPES {
        let (a, b) = operands(m, k, n);
        // Checked once, outside the timed loops: both products agree to rounding.
        let mut ours = Array2::zeros((m, n));
        gemm(1.0, &a, &b, 0.0, &mut ours);
        let theirs = a.dot(&b);
        let worst = ours
            .iter()
            .zip(&theirs)
            .map(|(x, y)| (x - y).abs())
            .fold(0.0, f64::max);
        assert!(worst < 1e-10, "{name}: products differ by {worst:e}");
        let id = format!("{name}/{m}x{k}x{n}");
        let mut out = Array2::zeros((m, n));
        group.bench_function(BenchmarkId::new("posconform_2_threads", &id), |bench| {
            bench.iter(|| gemm(1.0, black_box(&a), black_box(&b), 0.0, &mut out))
        });
        group.bench_function(BenchmarkId::new("posconform_1_thread", &id), |bench| {
            single.install(|| bench.iter(|| gemm(1.0, black_box(&a), black_box(&b), 0.0, &mut out)))
        });
        group.bench_function(BenchmarkId::new("ndarray", &id), |bench| {
            bench.iter(|| {
                ndarray::linalg::general_mat_mul(1.0, black_box(&a), black_box(&b), 0.0, &mut out)
            })
        });
    }
    group.finish();
    numpy_side_by_side();
}

/// numpy's medians for the same shapes, from a child process in this run.
fn numpy_side_by_side() {
    let script = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/benches/peers/numpy_products.py"
    );
    let mut command = std::process::Command::new("python3");
    command.arg(script);
    for &(_, m, k, n) in SHAPES {
        command.args([m.to_string(), k.to_string(), n.to_string()]);
    }
    match command.output() {
        Ok(out) if out.status.success() => {
            println!("numpy (same run, median of `a @ b`):");
            for line in String::from_utf8_lossy(&out.stdout).lines() {
                println!("  {line}  (m k n seconds)");
            }
        }
        Ok(out) => println!(
            "numpy not timed: {}",
            String::from_utf8_lossy(&out.stderr).trim()
        ),
        Err(e) => println!("numpy not timed: python3: {e}"),
    }
}

criterion_group!(benches, products);
criterion_main!(benches);
