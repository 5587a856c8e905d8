//! Large cases compared one head at a time, so checking one holds the kernel's answer
//! (in its own dtype) and one head's expected values, bounds and baseline at a time
//! instead of the whole case's (docs/budgets.md, "Memory").
//!
//! Heads never mix: every output of head `h` is computed from head `h` of `q`, `k`,
//! `v` and of the scheme's per-head arrays ([`SchemeModel::per_head_inputs`]), so the
//! case restricted to one head ([`head_case`]) computes that head's rows with the same
//! operations in the same order. A budget needs two whole-case maxima (the baseline's
//! deviation and the largest expected magnitude, for the allowance) before any element
//! can be judged, so a first pass over the heads computes the expected values and the
//! baseline and keeps only those maxima; the second computes the expected values and
//! bounds again and judges each head's elements ([`crate::compare`]'s tally, the one
//! the whole-array comparison uses). The report is the whole-array comparison's, value
//! for value, except for a failing output's patterns, error map and diagnosis, which
//! read whole arrays: they are left out and a warning says so.
//!
//! Only cases whose scheme names its per-head arrays are split (every scheme but
//! ALiBi, whose slopes depend on the head count), and never `encode`, whose outputs
//! have no head axis.
//!
//! [`SchemeModel::per_head_inputs`]: crate::scheme::SchemeModel::per_head_inputs

use std::collections::BTreeMap;

use ndarray::Axis;

use crate::budget;
use crate::case::{Arrays, Case, Operation, Output, Visibility};
use crate::compare::{warn_about_dtypes, CaseReport, CompareOptions, Tally, Verdict, Warning};
use crate::error::{Error, Result};
use crate::math::precision::Dtype;
use crate::reference;
use crate::tensor::Tensor;

/// From this many bytes of outputs (as f64) on, `check` compares a case head by head.
/// Below it the whole-array comparison is faster (it computes the expected values
/// once) and its memory is small anyway.
pub const SPLIT_BYTES: u64 = 256 << 20;

/// Whether `case` can be compared head by head: more than one head, not `encode`,
/// and a scheme whose heads are independent.
pub fn splittable(case: &Case) -> bool {
    case.heads > 1
        && case.operation != Operation::Encode
        && case.model().per_head_inputs().is_some()
}

/// Bytes of `case`'s outputs held as f64.
pub fn output_bytes(case: &Case) -> u64 {
    case.output_shapes()
        .iter()
        .map(|(_, shape)| shape.iter().fold(8u64, |a, &d| a.saturating_mul(d as u64)))
        .fold(0u64, u64::saturating_add)
}

/// Whether `check` compares `case` head by head: splittable and outputs of at least
/// [`SPLIT_BYTES`].
pub fn compared_by_head(case: &Case) -> bool {
    splittable(case) && output_bytes(case) >= SPLIT_BYTES
}

/// `case` restricted to head `h` (one head, the same id, window and seed) and its
/// inputs: head `h` of `q`, `k`, `v` and of the scheme's per-head arrays, the other
/// arrays as they are. Errors when the case cannot be split or `h` is not a head.
pub fn head_case(case: &Case, inputs: &Arrays, h: usize) -> Result<(Case, Arrays)> {
    let per_head = case
        .model()
        .per_head_inputs()
        .filter(|_| splittable(case))
        .ok_or_else(|| {
            Error::param(
                "case",
                "a case whose heads are independent (not encode, not alibi)",
                &case.id,
            )
        })?;
    if h >= case.heads {
        return Err(Error::param("head", format!("below {}", case.heads), h));
    }
    let mut one = case.clone();
    one.heads = 1;
    let sliced = inputs
        .iter()
        .map(|(name, tensor)| {
            let t = if ["q", "k", "v"].contains(&name.as_str()) || per_head.contains(&name.as_str())
            {
                let values = tensor.view();
                let head = values.slice_axis(Axis(0), ndarray::Slice::from(h..h + 1));
                Tensor::from_f64(tensor.dtype(), head.to_owned())
            } else {
                tensor.clone()
            };
            (name.clone(), t)
        })
        .collect();
    Ok((one, sliced))
}

/// Compares the kernel's `got` outputs for `case` head by head, with budgets derived
/// for `options.budget_dtype`, else the declared dtype, else each array's own: the
/// report of [`crate::compare::compare`] without a failing output's patterns, error
/// map and diagnosis (a warning says they were left out). Integer outputs cannot
/// occur (they belong to `encode`).
pub fn compare_by_head(
    case: &Case,
    inputs: &Arrays,
    got: &Arrays,
    options: &CompareOptions,
) -> Result<CaseReport> {
    let heads = case.heads;
    let mut outputs: Vec<(Output, Vec<usize>)> = case.output_shapes();
    // The whole-array comparison goes through its outputs in this order.
    outputs.sort_by_key(|(o, _)| *o);
    let mut report = CaseReport::error(case, "");
    report.verdict = Verdict::Pass;
    let known: Vec<&str> = outputs.iter().map(|(o, _)| o.name()).collect();
    for name in got.keys().filter(|n| !known.contains(&n.as_str())) {
        report
            .warnings
            .push(Warning::IgnoredOutput { name: name.clone() });
    }
    let mut structural = Vec::new();
    // (output, its tensor, the declared and the budget dtype).
    let mut judged: Vec<(Output, &Tensor, Dtype, Dtype)> = Vec::new();
    for (output, shape) in &outputs {
        let Some(tensor) = got.get(output.name()) else {
            structural.push(format!("missing output `{output}`"));
            continue;
        };
        if tensor.shape() != shape.as_slice() {
            structural.push(format!(
                "output `{output}` has shape {:?}, expected {shape:?}",
                tensor.shape(),
            ));
            continue;
        }
        if output.is_integer() {
            return Err(Error::param("output", "float outputs only", output));
        }
        if !tensor.dtype().is_float() {
            structural.push(format!(
                "output `{output}` is declared i64; a float dtype is expected"
            ));
            continue;
        }
        let array_dtype = tensor.dtype();
        let declared = options.declared.unwrap_or(array_dtype);
        let budget_dtype = options.budget_dtype.unwrap_or(declared);
        warn_about_dtypes(
            *output,
            declared,
            array_dtype,
            budget_dtype,
            tensor,
            &mut report.warnings,
        );
        judged.push((*output, tensor, declared, budget_dtype));
    }
    // Budgets of one dtype per case: the whole-array comparison derives them once per
    // budget dtype, and every float output of a case has the same declared dtype
    // unless the kernel's arrays differ; each distinct one gets its own passes.
    let dtypes: std::collections::BTreeSet<Dtype> = judged.iter().map(|&(_, _, _, b)| b).collect();
    let visibility = Visibility::of(case);
    let mut finished = BTreeMap::new();
    for dtype in dtypes {
        // First pass: the whole-case maxima behind the allowance.
        let mut deviation: BTreeMap<Output, f64> = BTreeMap::new();
        let mut largest: BTreeMap<Output, f64> = BTreeMap::new();
        for h in 0..heads {
            let (one, one_inputs) = head_case(case, inputs, h)?;
            let expected = reference::expected(&one, &one_inputs)?;
            let baseline = if dtype == Dtype::F64 {
                reference::Outputs::new()
            } else {
                reference::baseline(&one, &one_inputs, dtype)?
            };
            for (output, want) in &expected {
                let d = baseline
                    .get(output)
                    .map(|b| budget::baseline_deviation(want, b))
                    .unwrap_or(0.0);
                let e = deviation.entry(*output).or_insert(0.0);
                *e = e.max(d);
                let l = largest.entry(*output).or_insert(0.0);
                *l = l.max(budget::largest_expected(want));
            }
        }
        // Second pass: each head's expected values and bounds, judged.
        let mut tallies: BTreeMap<Output, Tally<'_>> = BTreeMap::new();
        let mut buffer: Vec<f64> = Vec::new();
        for h in 0..heads {
            let (one, one_inputs) = head_case(case, inputs, h)?;
            let (expected, mut bounds) = reference::expected_and_bounds(&one, &one_inputs, dtype)?;
            for (output, want) in &expected {
                let Some(&(_, tensor, declared, _)) = judged
                    .iter()
                    .find(|(o, _, _, b)| o == output && *b == dtype)
                else {
                    continue;
                };
                let budget = budget::from_parts(
                    case,
                    *output,
                    dtype,
                    options.factor,
                    deviation.get(output).copied().unwrap_or(0.0),
                    largest.get(output).copied().unwrap_or(0.0),
                    bounds.remove(output),
                );
                let tally = tallies.entry(*output).or_insert_with(|| {
                    Tally::new(
                        *output,
                        tensor.shape(),
                        declared,
                        &budget,
                        &visibility,
                        false,
                    )
                });
                let want = want.as_standard_layout();
                let want = want.as_slice().unwrap_or(&[]);
                buffer.resize(want.len(), 0.0);
                let start = h * want.len();
                tensor.read_values(start, &mut buffer)?;
                let analytic = budget.analytic.as_ref().and_then(|a| a.as_slice());
                tally.feed(start, want, &buffer, analytic);
            }
        }
        for (output, tally) in tallies {
            let (mut out, _) = tally.finish();
            if let Some(&(_, tensor, _, _)) = judged.iter().find(|(o, ..)| *o == output) {
                out.array_dtype = tensor.dtype();
            }
            finished.insert(output, out);
        }
    }
    for output in outputs.iter().map(|(o, _)| *o) {
        if let Some(out) = finished.remove(&output) {
            report.outputs.push(out);
        }
    }
    crate::compare::warn_if_computed_in_another_dtype(case, &mut report);
    if !structural.is_empty() {
        report.verdict = Verdict::Error(structural.join("; "));
    } else if report.outputs.iter().any(|o| !o.passed) {
        report.verdict = Verdict::Fail;
        report.warnings.push(Warning::ComparedByHead {
            bytes: whole_comparison_bytes(case),
        });
    }
    Ok(report)
}

/// Bytes the whole-array comparison of `case` holds at its peak, estimated: the
/// expected values, their bounds and the baseline as f64 next to the kernel's answer.
pub fn whole_comparison_bytes(case: &Case) -> u64 {
    output_bytes(case).saturating_mul(4)
}
