//! The head-by-head comparison of large cases (src/headwise.rs) against the
//! whole-array one: the same report, value for value, on every core case it can split
//! (every operation but encode, every scheme but ALiBi, f64, f32 and f16), for a
//! correct answer and for one with a planted error.

use posconform::case::{Arrays, Case};
use posconform::compare::{compare, CaseReport, CompareOptions, Verdict, Warning};
use posconform::headwise::{compare_by_head, head_case, splittable};
use posconform::math::precision::Dtype;
use posconform::reference::expected;
use posconform::tensor::Tensor;

fn split_cases() -> Vec<Case> {
    let cases: Vec<Case> = posconform::suite::suite("core")
        .unwrap()
        .into_iter()
        .filter(splittable)
        .collect();
    assert!(cases.len() >= 20, "{} splittable core cases", cases.len());
    cases
}

/// The reference's outputs in the case dtype, decoded from bytes as a kernel's reply
/// is (so narrow ones keep their own width), with `plant` applied first.
fn answer(case: &Case, inputs: &Arrays, plant: impl Fn(&str, &mut Vec<f64>)) -> Arrays {
    expected(case, inputs)
        .unwrap()
        .into_iter()
        .map(|(output, values)| {
            let shape = values.shape().to_vec();
            let mut flat: Vec<f64> = values.iter().copied().collect();
            plant(output.name(), &mut flat);
            let rounded = Tensor::from_f64(
                case.dtype,
                ndarray::ArrayD::from_shape_vec(ndarray::IxDyn(&shape), flat).unwrap(),
            );
            let bytes = rounded.to_le_bytes();
            let tensor = Tensor::from_le_vec(case.dtype, &shape, bytes, &"answer").unwrap();
            (output.name().to_string(), tensor)
        })
        .collect()
}

fn both(case: &Case, got: &Arrays) -> (CaseReport, CaseReport) {
    let inputs = case.inputs().unwrap();
    let want = expected(case, &inputs).unwrap();
    let options = CompareOptions {
        declared: Some(case.dtype),
        diagnose: false,
        ..CompareOptions::default()
    };
    let whole = compare(case, &inputs, &want, got, &options).unwrap();
    let by_head = compare_by_head(case, &inputs, got, &options).unwrap();
    (whole, by_head)
}

/// A correct answer: the same report (verdict, maxima, worst element, criterion,
/// masking, warnings) from both comparisons.
#[test]
fn head_by_head_equals_whole_on_a_correct_answer() {
    let mut dtypes = std::collections::BTreeSet::new();
    for case in split_cases() {
        let inputs = case.inputs().unwrap();
        let got = answer(&case, &inputs, |_, _| {});
        let (whole, by_head) = both(&case, &got);
        assert_eq!(whole.verdict, Verdict::Pass, "{}", case.id);
        assert_eq!(whole, by_head, "{}", case.id);
        dtypes.insert(case.dtype);
    }
    assert!(dtypes.contains(&Dtype::F16) && dtypes.contains(&Dtype::F32));
}

/// An answer with one wrong element in the last head: both fail with the same
/// statistics and worst element; the head-by-head report leaves out the patterns and
/// the error map and says so.
#[test]
fn head_by_head_reports_a_planted_error_as_the_whole_comparison_does() {
    for case in split_cases() {
        let inputs = case.inputs().unwrap();
        let heads = case.heads;
        let got = answer(&case, &inputs, |_, flat| {
            // Near the end of the last head, on a finite (visible) element.
            let per_head = flat.len() / heads;
            let from = (heads - 1) * per_head;
            if let Some(n) = (from..flat.len()).rev().find(|&n| flat[n].is_finite()) {
                flat[n] += 0.25 + flat[n].abs();
            }
        });
        let (whole, by_head) = both(&case, &got);
        assert_eq!(whole.verdict, Verdict::Fail, "{}", case.id);
        assert_eq!(by_head.verdict, Verdict::Fail, "{}", case.id);
        let said = by_head
            .warnings
            .iter()
            .filter(|w| matches!(w, Warning::ComparedByHead { .. }))
            .count();
        assert_eq!(said, 1, "{}", case.id);
        let mut expected_report = whole.clone();
        for out in &mut expected_report.outputs {
            out.patterns.clear();
            out.error_map = None;
        }
        let mut stripped = by_head.clone();
        stripped
            .warnings
            .retain(|w| !matches!(w, Warning::ComparedByHead { .. }));
        assert_eq!(expected_report, stripped, "{}", case.id);
        // The worst element is the planted one, in the last head.
        let worst = whole
            .outputs
            .iter()
            .filter(|o| !o.passed)
            .find_map(|o| o.worst.clone())
            .unwrap();
        assert_eq!(worst[0], heads - 1, "{}", case.id);
    }
}

/// Head `h` of a split case is head `h` of the whole case's expected outputs (the
/// premise of the split), and a wrong head index is an error, not a panic.
#[test]
fn one_head_computes_that_heads_rows() {
    for case in split_cases() {
        let inputs = case.inputs().unwrap();
        let whole = expected(&case, &inputs).unwrap();
        for h in [0, case.heads - 1] {
            let (one, one_inputs) = head_case(&case, &inputs, h).unwrap();
            let part = expected(&one, &one_inputs).unwrap();
            for (output, values) in &whole {
                let head = values.index_axis(ndarray::Axis(0), h);
                let got = part[output].index_axis(ndarray::Axis(0), 0);
                let same = head
                    .iter()
                    .zip(got.iter())
                    .all(|(a, b)| a.to_bits() == b.to_bits());
                assert!(same, "{} head {h} {output}", case.id);
            }
        }
        assert!(head_case(&case, &inputs, case.heads).is_err());
    }
}

/// Companion: slicing a head the wrong way (the next head's keys) is caught by the
/// head-by-head comparison, so the tests above can fail.
#[test]
fn a_head_computed_from_the_wrong_keys_differs() {
    let case = split_cases()
        .into_iter()
        .find(|c| c.id == "xl_relative.scores.short_memory")
        .unwrap();
    let inputs = case.inputs().unwrap();
    let (one, mut one_inputs) = head_case(&case, &inputs, 0).unwrap();
    let (_, other) = head_case(&case, &inputs, 1).unwrap();
    one_inputs.insert("k".into(), other["k"].clone());
    let wrong = expected(&one, &one_inputs).unwrap();
    let whole = expected(&case, &inputs).unwrap();
    let (output, values) = whole.iter().next().unwrap();
    let head = values.index_axis(ndarray::Axis(0), 0);
    assert_ne!(head, wrong[output].index_axis(ndarray::Axis(0), 0));
}

/// ALiBi's slopes depend on the head count: its cases are never split.
#[test]
fn alibi_is_not_split() {
    let case = posconform::suite::suite("core")
        .unwrap()
        .into_iter()
        .find(|c| c.id == "alibi.scores.h12")
        .unwrap();
    assert!(!splittable(&case));
    let inputs = case.inputs().unwrap();
    assert!(head_case(&case, &inputs, 0).is_err());
}

/// A narrow answer decoded from bytes reads back the values it was given, by range
/// and whole, and equals the same array built from f64 values.
#[test]
fn narrow_tensors_read_back_their_values() {
    for dtype in [Dtype::F32, Dtype::F16, Dtype::Bf16] {
        let values: Vec<f64> = (0..24)
            .map(|i| dtype.round(i as f64 * 0.37 - 3.0))
            .collect();
        let wide = Tensor::from_f64(
            dtype,
            ndarray::ArrayD::from_shape_vec(ndarray::IxDyn(&[2, 3, 4]), values.clone()).unwrap(),
        );
        let narrow = Tensor::from_le_vec(dtype, &[2, 3, 4], wide.to_le_bytes(), &"t").unwrap();
        assert_eq!(narrow, wide);
        let mut part = vec![0.0; 5];
        narrow.read_values(7, &mut part).unwrap();
        assert_eq!(part, values[7..12]);
        assert!(narrow.read_values(20, &mut part).is_err());
        assert_eq!(narrow.view().iter().copied().collect::<Vec<_>>(), values);
    }
}
