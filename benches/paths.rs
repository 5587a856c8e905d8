//! The paths users run, each timed next to a bare matrix product of the same shape:
//!
//! - `reference/<scheme>/<operation>/<shape>`: the f64 oracle of every scheme and
//!   operation ([`reference::expected`]) at H = 4, L = M = 128, d = 64 (stream: 256
//!   tokens in segments of 128 with 128 of memory; decode: 256 tokens after a prefill
//!   of 128, in chunks of 32);
//! - `paths/<path>/xl_relative_attention/H8_L512_M512_d64`: one Transformer-XL
//!   attention case (f64) through `check` end to end against a kernel that answers
//!   instantly (its answer is a copy of the expected outputs), `verify` of a result
//!   file against its vector file, `emit`'s vector (inputs, expected outputs, budgets),
//!   the budgets alone (expected outputs and bounds in one pass, and the analytic
//!   bounds on their own), and the element comparison;
//! - `bare_product/<shape>`: `H` products `L × d · d × K` (what `q·kᵀ` costs), the
//!   yardstick of each group.
//!
//! Run: `cargo bench --bench paths`. After the groups, a table gives each median as a
//! ratio to the bare product of its shape (read from criterion's own estimates in
//! target/criterion). Read the ratios; nothing asserts on time.

use std::hint::black_box;
use std::time::Duration;

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion};
use ndarray::Array2;
use posconform::budget;
use posconform::case::{Arrays, Case, Operation, OperationKind, Output};
use posconform::check::{run_case, CheckOptions};
use posconform::compare::{compare_output, CompareOptions, Visibility};
use posconform::kernel::{full_support, outputs_in, Answer, Kernel, KernelInfo};
use posconform::math::product::gemm;
use posconform::math::{Dtype, Stream};
use posconform::reference;
use posconform::shape::Shape;
use posconform::vector::{write_results, VectorFile};
use posconform::verify::verify_one;
use posconform::Scheme;

const REFERENCE_SHAPE: (usize, usize, usize, usize) = (4, 128, 128, 64);
const PATH_SHAPE: (usize, usize, usize, usize) = (8, 512, 512, 64);

fn shape_name((h, l, m, d): (usize, usize, usize, usize)) -> String {
    format!("H{h}_L{l}_M{m}_d{d}")
}

/// The bare product of a shape: `H` products `L × d · d × (M + L)`.
fn bare_product(c: &mut Criterion, group: &str, (h, l, m, d): (usize, usize, usize, usize)) {
    let mut s = Stream::new(3);
    let q: Vec<Array2<f64>> = (0..h).map(|_| s.array((l, d), 1.0)).collect();
    let k: Vec<Array2<f64>> = (0..h).map(|_| s.array((d, m + l), 1.0)).collect();
    let mut out: Vec<Array2<f64>> = (0..h).map(|_| Array2::zeros((l, m + l))).collect();
    c.benchmark_group(group)
        .sample_size(10)
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(2))
        .bench_function(shape_name((h, l, m, d)), |b| {
            b.iter(|| {
                for ((q, k), o) in q.iter().zip(&k).zip(out.iter_mut()) {
                    gemm(1.0, black_box(q), black_box(k), 0.0, o);
                }
            })
        });
}

/// A case of `scheme` and `operation` at `shape`, with the scheme's parameters drawn
/// as the fuzzer draws them (seeded, so the same every run).
fn case_of(
    scheme: Scheme,
    operation: Operation,
    (h, l, m, d): (usize, usize, usize, usize),
) -> Option<Case> {
    let query_start = 1000;
    let shape = Shape {
        heads: h,
        query_len: l,
        memory_len: m,
        head_dim: d,
        query_start,
        operation: &operation,
    };
    let spec = scheme.random_spec(&mut Stream::new(17), &shape);
    let case = Case {
        id: format!("bench.{}.{}", scheme.name(), operation.name()),
        scheme: spec,
        operation: operation.clone(),
        heads: h,
        query_len: l,
        memory_len: m,
        head_dim: d,
        query_start,
        hidden_keys: Vec::new(),
        dtype: Dtype::F64,
        seed: 11,
        faults: Vec::new(),
        input_scale: 1.0,
        purpose: "benchmark".into(),
    };
    case.validate().ok().map(|()| case)
}

fn operation_of(kind: OperationKind, (_, l, m, _): (usize, usize, usize, usize)) -> Operation {
    match kind {
        OperationKind::Encode => Operation::Encode,
        OperationKind::Scores => Operation::Scores,
        OperationKind::Attention => Operation::Attention,
        OperationKind::Stream => Operation::Stream { tokens: l + m },
        OperationKind::Decode => Operation::Decode {
            tokens: l + m,
            prefill: m,
            chunks: vec![l / 4; 4],
        },
    }
}

fn references(c: &mut Criterion) {
    bare_product(c, "bare_product", REFERENCE_SHAPE);
    let mut group = c.benchmark_group("reference");
    group
        .sample_size(10)
        .warm_up_time(Duration::from_millis(300))
        .measurement_time(Duration::from_secs(1));
    for &scheme in Scheme::ALL {
        for kind in OperationKind::ALL {
            let Some(case) = case_of(scheme, operation_of(kind, REFERENCE_SHAPE), REFERENCE_SHAPE)
            else {
                println!(
                    "{} {}: no valid case at this shape",
                    scheme.name(),
                    kind.name()
                );
                continue;
            };
            let inputs = case.inputs().expect("inputs");
            reference::expected(&case, &inputs).expect("the reference runs");
            let id = format!(
                "{}/{}/{}",
                scheme.name(),
                kind.name(),
                shape_name(REFERENCE_SHAPE)
            );
            group.bench_function(BenchmarkId::from_parameter(id), |b| {
                b.iter(|| black_box(reference::expected(black_box(&case), &inputs).unwrap()))
            });
        }
    }
    group.finish();
}

/// A kernel that answers instantly: a copy of outputs computed beforehand.
struct Instant(Arrays);

impl Kernel for Instant {
    fn describe(&mut self) -> posconform::Result<KernelInfo> {
        Ok(KernelInfo {
            name: "instant".into(),
            version: String::new(),
            supports: full_support(),
            dtypes: vec![Dtype::F64],
            conventions: Vec::new(),
        })
    }

    fn run(&mut self, _: &Case, _: Dtype, _: &Arrays) -> posconform::Result<Answer> {
        Ok(Answer::Outputs {
            outputs: self.0.clone(),
            elapsed_ms: None,
        })
    }
}

fn paths(c: &mut Criterion) {
    bare_product(c, "bare_product", PATH_SHAPE);
    let case = case_of(Scheme::XlRelative, Operation::Attention, PATH_SHAPE).expect("a valid case");
    let shape = format!("xl_relative_attention/{}", shape_name(PATH_SHAPE));
    let inputs = case.inputs().expect("inputs");
    let expected = reference::expected(&case, &inputs).expect("expected");
    let answer = outputs_in(expected.clone(), Dtype::F64);
    let mut kernel = Instant(answer.clone());
    let info = kernel.describe().unwrap();
    let options = CheckOptions::default();
    let (report, _) = run_case(&mut kernel, &info, &case, &options.compare);
    assert_eq!(report.verdict, posconform::compare::Verdict::Pass);

    let dir = tempfile::tempdir().expect("a temporary directory");
    let vector = VectorFile::build(&case, 2.0).expect("vector");
    write_results(dir.path(), &case.id, &answer).expect("results");
    let budgets = budget::budgets(&case, &inputs, &expected, Dtype::F64, 2.0).expect("budgets");
    let visibility = Visibility::of(&case);

    let mut group = c.benchmark_group("paths");
    group
        .sample_size(10)
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(4));
    group.bench_function(format!("check_one_case/{shape}"), |b| {
        b.iter(|| black_box(run_case(&mut kernel, &info, &case, &options.compare)))
    });
    group.bench_function(format!("verify/{shape}"), |b| {
        b.iter(|| black_box(verify_one(&vector, dir.path(), &CompareOptions::default())))
    });
    group.bench_function(format!("emit/{shape}"), |b| {
        b.iter(|| black_box(VectorFile::build(&case, 2.0).unwrap()))
    });
    group.bench_function(format!("expected_and_budgets/{shape}"), |b| {
        b.iter(|| black_box(budget::expected_and_budgets(&case, &inputs, Dtype::F64, 2.0).unwrap()))
    });
    group.bench_function(format!("analytic_bounds/{shape}"), |b| {
        b.iter(|| black_box(reference::analytic_bounds(&case, &inputs, Dtype::F64).unwrap()))
    });
    group.bench_function(format!("compare/{shape}"), |b| {
        b.iter(|| {
            for output in [Output::Probs, Output::Output] {
                black_box(compare_output(
                    &case,
                    output,
                    &expected[&output],
                    answer[output.name()].view().view(),
                    Dtype::F64,
                    &budgets[&output],
                    &visibility,
                ));
            }
        })
    });
    group.finish();
}

/// Each median as a ratio to the bare product of its shape, from criterion's estimates.
fn ratios(_: &mut Criterion) {
    let root = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("target/criterion");
    // (full id, median in ns) of the benchmark whose results are in `path`.
    let median = |path: std::path::PathBuf| -> Option<(String, f64)> {
        let read = |file: &str| -> Option<serde_json::Value> {
            let text = std::fs::read_to_string(path.join("new").join(file)).ok()?;
            serde_json::from_str(&text).ok()
        };
        let time = read("estimates.json")?["median"]["point_estimate"].as_f64()?;
        let id = read("benchmark.json")?["full_id"].as_str()?.to_string();
        Some((id, time))
    };
    println!("\nmedian / bare product of the same shape (criterion's medians, this run):");
    for (group, shape) in [("reference", REFERENCE_SHAPE), ("paths", PATH_SHAPE)] {
        let name = shape_name(shape);
        let Some((_, bare)) = median(root.join("bare_product").join(&name)) else {
            println!("  (no estimate for bare_product/{name})");
            continue;
        };
        println!("  bare_product/{name}: {:.3} ms", bare / 1e6);
        let mut rows = Vec::new();
        collect(&root.join(group), &mut rows, &median);
        for (id, time) in rows.into_iter().filter(|(id, _)| id.ends_with(&name)) {
            println!("  {id}: {:.3} ms = {:.2} x", time / 1e6, time / bare);
        }
    }
}

/// Every benchmark under `dir`, by its full id.
fn collect(
    dir: &std::path::Path,
    rows: &mut Vec<(String, f64)>,
    median: &dyn Fn(std::path::PathBuf) -> Option<(String, f64)>,
) {
    if let Some(row) = median(dir.to_path_buf()) {
        rows.push(row);
        return;
    }
    let Ok(entries) = std::fs::read_dir(dir) else {
        return;
    };
    let mut names: Vec<String> = entries
        .filter_map(|e| e.ok())
        .filter(|e| e.path().is_dir())
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| n != "report" && n != "new" && n != "base" && n != "change")
        .collect();
    names.sort();
    for name in names {
        collect(&dir.join(&name), rows, median);
    }
}

criterion_group!(benches, references, paths, ratios);
criterion_main!(benches);
