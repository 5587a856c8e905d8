//! The variant pipeline itself: with no deviation it is the reference.

use posconform::case::Output;
use posconform::compare::{compare, CompareOptions, Verdict};
use posconform::math::Dtype;
use posconform::reference::{expected, variant_outputs};
use posconform::scheme::model::PairPositions;
use posconform::suite::suite;
use posconform::tensor::Tensor;
use posconform::variant::{Deviation, NoDeviation, WindowCtx};
use posconform::{Case, Scale};

fn as_arrays(outputs: &posconform::reference::Outputs, dtype: Dtype) -> posconform::case::Arrays {
    outputs
        .iter()
        .map(|(o, a)| {
            let t = if o.is_integer() {
                Tensor::from_f64(Dtype::I64, a.clone())
            } else {
                Tensor::from_f64(dtype, a.clone())
            };
            (o.name().to_string(), t)
        })
        .collect()
}

/// Runs `deviation` on `case` and compares its outputs with the reference at the f64
/// budget.
fn judge(case: &Case, deviation: &dyn Deviation) -> Verdict {
    let inputs = case.inputs().unwrap();
    let want = expected(case, &inputs).unwrap();
    let got = variant_outputs(case, &inputs, Dtype::F64, deviation).unwrap();
    let options = CompareOptions {
        declared: Some(Dtype::F64),
        ..CompareOptions::default()
    };
    compare(case, &inputs, &want, &as_arrays(&got, Dtype::F64), &options)
        .unwrap()
        .verdict
}

/// Every core and long case: the variant pipeline with no deviation (every pair scored
/// by `pair_scores`, the variant's masking, segment and decode bookkeeping) is within
/// the f64 budget of the reference.
#[test]
fn no_deviation_reproduces_the_reference_on_every_core_case() {
    for case in suite("core").unwrap() {
        assert_eq!(judge(&case, &NoDeviation), Verdict::Pass, "{}", case.id);
    }
}

/// Planted-bug companion: a deviation that drops the score scale is caught on a
/// scores case by the same comparison.
#[test]
fn a_deviation_that_drops_the_scale_is_caught() {
    struct NoScale;
    impl Deviation for NoScale {
        fn scale(&self, _ctx: &WindowCtx<'_, '_>, _scale: Scale) -> Scale {
            Scale::Fixed(1.0)
        }
    }
    let cases = suite("core").unwrap();
    let case = cases
        .iter()
        .find(|c| c.id == "rotary.scores.scaled")
        .unwrap();
    assert_eq!(judge(case, &NoScale), Verdict::Fail);
    let _ = (Output::Scores, PairPositions::standard);
}
