//! Tightness, on demand: for each planted bug and each dtype, at which start positions
//! `p0` the checker still catches it.
//!
//! ```sh
//! cargo test --release --test zoo -- --ignored --nocapture tightness
//! ```
//!
//! Each bug is planted in the plain in-contract kernel of the dtype (f64 exact, f32
//! throughout, f16 or bf16 per op; `variants::base`), which declares only that dtype.
//! Cases have one fixed shape (H = 2, L = 8, M = 8, d = 64, fixed seeds), written for
//! the dtype, at `p0` on the ladder 0, 1, 10, …, 10^6: rotary (half-split, full width)
//! and interleaved sinusoid encode, scores and attention; for the two bugs that do not
//! depend on positions (`scale-1-over-d`, `accumulate-f16`) the scores and attention of
//! every scheme they apply to (see `kinds`). A rung counts as caught only where the same
//! kernel without the bug passes the same case (otherwise the alarm proves nothing).
//!
//! Cell legend: one character per rung of the ladder, `C` caught, `.` missed (the bug
//! passes), `F` the correct kernel already fails there (not counted), `-` no such case
//! (learned tables stop at p0 = 10^4 and need p0 >= M). Last column: the smallest p0 at
//! which any of the row's cases catches the bug.
//!
//! The test asserts that every bug is caught somewhere in f64.

use posconform::case::{Case, Operation};
use posconform::check::run_case;
use posconform::compare::{CompareOptions, Verdict};
use posconform::kernel::Kernel;
use posconform::math::Dtype;
use posconform::rotary::{Pairing, RotaryScaling};
use posconform::scheme::{
    alibi::AlibiSpec, bucketed::BucketedSpec, clipped::ClippedSpec, learned::LearnedSpec,
    rotary::RotarySpec, sinusoidal::SinusoidalSpec, xl_relative::XlRelativeSpec, SchemeSpec,
};
use posconform::{Scale, SinusoidLayout};

use crate::kernel::{Bug, Variant, ZooKernel};
use crate::variants;

/// The ladder of start positions.
pub const LADDER: [i64; 8] = [0, 1, 10, 100, 1_000, 10_000, 100_000, 1_000_000];
const DTYPES: [Dtype; 4] = [Dtype::F64, Dtype::F32, Dtype::F16, Dtype::Bf16];

fn rotary() -> SchemeSpec {
    SchemeSpec::Rotary(RotarySpec {
        rotary_dim: 64,
        base: 10_000.0,
        pairing: Pairing::HalfSplit,
        scaling: RotaryScaling::None,
        scale: Scale::InverseSqrtDim,
    })
}

fn sinusoid() -> SchemeSpec {
    SchemeSpec::Sinusoidal(SinusoidalSpec {
        base: 10_000.0,
        layout: SinusoidLayout::Interleaved,
    })
}

/// `(label, scheme, operation)` of the cases a bug is measured on: rotary and sinusoid
/// encode, scores and attention for the positional bugs; for `scale-1-over-d` and
/// `accumulate-f16` the scores and attention of every scheme whose scale is `1/√d`
/// (encode has no `1/√d`, and rotary/sinusoid encode no dot product), plus
/// Transformer-XL encode (a dot product per element) for `accumulate-f16`.
fn kinds(bug: Bug) -> Vec<(String, SchemeSpec, Operation)> {
    let positional = [("rot", rotary()), ("sin", sinusoid())];
    let window = [("sc", Operation::Scores), ("att", Operation::Attention)];
    let mut out = Vec::new();
    let push = |out: &mut Vec<_>, s: &str, spec: &SchemeSpec, o: &str, op: &Operation| {
        out.push((format!("{s}-{o}"), spec.clone(), op.clone()))
    };
    if !matches!(bug, Bug::ScaleOneOverD | Bug::AccumulateF16) {
        for (s, spec) in &positional {
            push(&mut out, s, spec, "enc", &Operation::Encode);
            for (o, op) in &window {
                push(&mut out, s, spec, o, op);
            }
        }
        return out;
    }
    let mut schemes = positional.to_vec();
    schemes.extend([
        ("lrn", SchemeSpec::Learned(LearnedSpec { max_positions: 0 })),
        (
            "xl",
            SchemeSpec::XlRelative(XlRelativeSpec {
                scale: Scale::InverseSqrtDim,
                clamp_len: None,
            }),
        ),
        (
            "alb",
            SchemeSpec::Alibi(AlibiSpec {
                scale: Scale::InverseSqrtDim,
            }),
        ),
        (
            "clp",
            SchemeSpec::Clipped(ClippedSpec {
                clip_distance: 4,
                scale: Scale::InverseSqrtDim,
            }),
        ),
    ]);
    if bug == Bug::AccumulateF16 {
        // T5 uses no scale, so only the accumulation bug applies to it.
        schemes.push((
            "bkt",
            SchemeSpec::Bucketed(BucketedSpec {
                num_buckets: 32,
                max_distance: 128,
                bidirectional: false,
                scale: Scale::Fixed(1.0),
            }),
        ));
    }
    for (s, spec) in &schemes {
        for (o, op) in &window {
            push(&mut out, s, spec, o, op);
        }
    }
    if bug == Bug::AccumulateF16 {
        let xl = schemes
            .iter()
            .find(|(s, _)| *s == "xl")
            .expect("xl")
            .1
            .clone();
        push(&mut out, "xl", &xl, "enc", &Operation::Encode);
    }
    out
}

fn case(label: &str, scheme: &SchemeSpec, op: &Operation, p0: i64, dtype: Dtype) -> Option<Case> {
    let (l, m) = (8usize, 8usize);
    let mut scheme = scheme.clone();
    if let SchemeSpec::Learned(LearnedSpec { max_positions }) = &mut scheme {
        if p0 < m as i64 || p0 > 10_000 {
            return None;
        }
        *max_positions = p0 as usize + l;
    }
    let seed = label
        .bytes()
        .fold(0x7157u64, |h, b| h.wrapping_mul(31).wrapping_add(b as u64));
    let case = Case {
        id: format!("tightness.{label}.p{p0}.{dtype}"),
        scheme,
        operation: op.clone(),
        heads: 2,
        query_len: l,
        memory_len: if *op == Operation::Encode { 0 } else { m },
        head_dim: 64,
        query_start: p0,
        hidden_keys: Vec::new(),
        input_scale: 1.0,
        dtype,
        seed,
        faults: Vec::new(),
        purpose: "tightness ladder".into(),
    };
    case.validate().ok().map(|_| case)
}

fn fails(variant: &Variant, case: &Case) -> bool {
    let mut kernel = ZooKernel::new(variant.clone());
    let info = kernel.describe().expect("describe");
    let (report, _) = run_case(&mut kernel, &info, case, &CompareOptions::default());
    match report.verdict {
        Verdict::Pass => false,
        Verdict::Fail => true,
        other => panic!("{}: {} gave {other:?}", variant.name, case.id),
    }
}

#[test]
#[ignore = "a measurement: run on demand (see the module docs)"]
fn tightness() {
    let mut uncaught_in_f64 = Vec::new();
    println!("tightness: p0 ladder {LADDER:?}; C caught, . missed, F correct kernel fails too, - no case");
    for bug in Bug::ALL {
        let kinds = kinds(bug);
        print!("\n{:<26}", bug.name());
        for (label, _, _) in &kinds {
            print!(" {label:<8}");
        }
        println!(" smallest p0 caught");
        for dtype in DTYPES {
            let correct = variants::base(dtype);
            let buggy = correct.with_bug(bug);
            let mut smallest: Option<i64> = None;
            print!("  {:<24}", dtype.name());
            for (label, scheme, op) in &kinds {
                let mut cell = String::new();
                for p0 in LADDER {
                    let Some(c) = case(label, scheme, op, p0, dtype) else {
                        cell.push('-');
                        continue;
                    };
                    let mark = if fails(&correct, &c) {
                        'F'
                    } else if fails(&buggy, &c) {
                        smallest = Some(smallest.map_or(p0, |s| s.min(p0)));
                        'C'
                    } else {
                        '.'
                    };
                    cell.push(mark);
                }
                print!(" {cell:<8}");
            }
            println!(
                " {}",
                smallest.map_or("never".to_string(), |p| p.to_string())
            );
            if dtype == Dtype::F64 && smallest.is_none() {
                uncaught_in_f64.push(bug.name());
            }
        }
    }
    assert!(
        uncaught_in_f64.is_empty(),
        "never caught in f64: {uncaught_in_f64:?}"
    );
}
