//! The element comparison `check` and `verify` run on every output: one scores output
//! of 8 × 512 × 1024 elements (Transformer-XL, H = 8, L = M = 512, d = 64) against its
//! budget, reported as elements per second.
//!
//! Run: `cargo bench --bench compare`. The expected outputs and budgets are computed
//! once, outside the timed loop; the kernel's answer is the expected one nudged by one
//! part in 10^15, so every element is compared and passes.

use std::hint::black_box;
use std::time::Duration;

use criterion::{criterion_group, criterion_main, Criterion, Throughput};
use posconform::budget::budgets;
use posconform::case::{Case, Operation, Output};
use posconform::compare::{compare_output, Visibility};
use posconform::math::Dtype;
use posconform::reference;
use posconform::scheme::xl_relative::XlRelativeSpec;
use posconform::scheme::SchemeSpec;
use posconform::Scale;

fn case() -> Case {
    Case {
        id: "bench.xl_relative.scores".into(),
        scheme: SchemeSpec::XlRelative(XlRelativeSpec {
            scale: Scale::InverseSqrtDim,
            clamp_len: None,
        }),
        operation: Operation::Scores,
        heads: 8,
        query_len: 512,
        memory_len: 512,
        head_dim: 64,
        query_start: 1000,
        hidden_keys: Vec::new(),
        input_scale: 1.0,
        dtype: Dtype::F64,
        seed: 7,
        faults: Vec::new(),
        purpose: "comparison benchmark".into(),
    }
}

fn compare(c: &mut Criterion) {
    let case = case();
    let inputs = case.inputs().expect("inputs");
    let expected = reference::expected(&case, &inputs).expect("expected");
    let budget = budgets(&case, &inputs, &expected, Dtype::F64, 2.0).expect("budgets");
    let want = &expected[&Output::Scores];
    let got = want.mapv(|x| x * (1.0 + 1e-15));
    let visibility = Visibility::of(&case);
    let report = compare_output(
        &case,
        Output::Scores,
        want,
        got.view(),
        Dtype::F64,
        &budget[&Output::Scores],
        &visibility,
    );
    assert!(report.passed, "the nudged answer must pass: {report:?}");
    let mut group = c.benchmark_group("compare");
    group.throughput(Throughput::Elements(want.len() as u64));
    group.measurement_time(Duration::from_secs(8));
    group.sample_size(20);
    group.bench_function("scores/H8_L512_K1024", |b| {
        b.iter(|| {
            black_box(compare_output(
                &case,
                Output::Scores,
                want,
                got.view(),
                Dtype::F64,
                &budget[&Output::Scores],
                &visibility,
            ))
        })
    });
    group.finish();
}

criterion_group!(benches, compare);
criterion_main!(benches);
