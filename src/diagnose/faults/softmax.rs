//! Mistakes in the softmax itself.

use ndarray::{Array3, Axis};

use super::{op_in, SOFTMAX};
use crate::attention::masked_softmax;
use crate::case::Case;
use crate::diagnose::{Fault, FaultKind, FaultVariant, Matching};
use crate::error::Result;
use crate::math::Dtype;
use crate::variant::{Deviation, WindowCtx};

/// The largest finite value of a dtype.
fn largest(dtype: Dtype) -> f64 {
    match dtype {
        Dtype::F16 => 65504.0,
        Dtype::Bf16 => 3.3895313892515355e38,
        Dtype::F32 => f32::MAX as f64,
        _ => f64::MAX,
    }
}

/// Below this an exponential rounds to 0 in the dtype (half its smallest subnormal).
fn tiny(dtype: Dtype) -> f64 {
    match dtype {
        Dtype::F16 => 2f64.powi(-25),
        Dtype::Bf16 => 2f64.powi(-134),
        Dtype::F32 => 2f64.powi(-150),
        _ => f64::MIN_POSITIVE * f64::EPSILON / 2.0,
    }
}

pub(super) struct NoMaxSubtraction;

impl Deviation for NoMaxSubtraction {
    fn softmax(&self, ctx: &WindowCtx<'_, '_>, scores: &Array3<f64>) -> Result<Array3<f64>> {
        // exp(s) in the kernel's dtype: beyond its largest finite value it is +inf, and
        // the row's normalisation then gives NaN there and 0 elsewhere; a row whose
        // exponentials all underflow (or are all masked) gives 0/0. Other rows are the
        // reference's (the subtraction changes only rounding).
        let top = largest(ctx.dtype);
        let mut probs = masked_softmax(scores.view())?;
        for (mut p, s) in probs
            .lanes_mut(Axis(2))
            .into_iter()
            .zip(scores.lanes(Axis(2)))
        {
            let e: Vec<f64> = s.iter().map(|&x| x.exp()).collect();
            if e.iter().any(|&x| x > top) {
                // inf / inf where it overflows, finite / inf = 0 elsewhere.
                for (p, &x) in p.iter_mut().zip(&e) {
                    *p = if x > top { f64::NAN } else { 0.0 };
                }
            } else if e.iter().all(|&x| x < tiny(ctx.dtype)) {
                p.fill(f64::NAN);
            }
        }
        Ok(probs)
    }
}

impl FaultVariant for NoMaxSubtraction {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, SOFTMAX)
    }
}

pub(super) const SOFTMAX_WITHOUT_MAX_SUBTRACTION: Fault = Fault {
    id: "softmax-without-max-subtraction",
    mistake:
        "The softmax exponentiates the raw scores (exp(s) / Σ exp(s)) without subtracting the \
              row maximum, so large scores overflow to inf and the row turns into NaN.",
    arises: "A hand-written softmax in a fused kernel; it works in tests with small random \
             inputs and fails once scores pass about 11 (f16), 88 (f32, bf16) or 709 (f64).",
    exposes: "Cases whose scores exceed the dtype's exponent range (random cases draw large \
              magnitudes for every dtype).",
    fix: "Subtract each row's maximum before exp (the result is unchanged in exact arithmetic), \
          treating a row whose maximum is -inf as fully masked.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &NoMaxSubtraction,
};

pub(super) struct OverQueries;

impl Deviation for OverQueries {
    fn softmax(&self, _: &WindowCtx<'_, '_>, scores: &Array3<f64>) -> Result<Array3<f64>> {
        // Normalised along the query axis: the transposed scores' rows.
        let transposed = scores.view().permuted_axes([0, 2, 1]);
        let probs = masked_softmax(transposed)?;
        Ok(probs
            .permuted_axes([0, 2, 1])
            .as_standard_layout()
            .into_owned())
    }
}

impl FaultVariant for OverQueries {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, SOFTMAX)
    }
}

pub(super) const SOFTMAX_OVER_QUERIES: Fault = Fault {
    id: "softmax-over-queries",
    mistake: "The softmax normalises over the query axis instead of the key axis: columns sum to \
              1, rows do not.",
    arises: "softmax(dim=-2) for dim=-1, or scores laid out [K, L] in a kernel that transposed \
             one operand.",
    exposes: "Every attention, stream and decode case with L > 1.",
    fix: "Normalise each query's row over the keys: softmax(scores, dim=-1) on [H, L, K].",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &OverQueries,
};
