//! Error budgets (docs/budgets.md): per output array, for the dtype a kernel declares,
//!
//! - *analytic*: the per-element bound of [`crate::reference::analytic_bounds`], derived
//!   from the numerical contract;
//! - *baseline*: `c × max(baseline error, floor)`, where the baseline error is the
//!   largest deviation of the same-precision reference ([`crate::reference::baseline`])
//!   from the f64 oracle (common practice: c = 2), and the floor `sqrt(n)·u·max|expected|`
//!   keeps an f64 budget from being zero;
//! - *exact*: integer outputs (buckets, indices) must match exactly.
//!
//! An element is within budget when its error is at most the larger of its analytic
//! bound and the baseline allowance.

use std::collections::BTreeMap;

use ndarray::ArrayD;

use crate::case::{Arrays, Case, Output};
use crate::error::Result;
use crate::math::precision::{accumulation_gamma, Dtype};
use crate::reference::{self, Outputs};

/// The error budget of one output array.
#[derive(Debug, Clone, PartialEq)]
pub struct Budget {
    /// The dtype the budget was derived for.
    pub dtype: Dtype,
    /// `c`.
    pub factor: f64,
    /// Largest deviation of the same-precision baseline from the oracle.
    pub baseline_error: f64,
    /// `sqrt(n)·u·max|expected|` (u of the accumulation precision).
    pub floor: f64,
    /// Per-element analytic bound, where one exists.
    pub analytic: Option<ArrayD<f64>>,
    /// Integer output: exact match required.
    pub exact: bool,
}

/// Budgets of a case's outputs, by output.
pub type Budgets = BTreeMap<Output, Budget>;

impl Budget {
    /// The baseline allowance `c · max(baseline error, floor)`.
    pub fn allowance(&self) -> f64 {
        if self.exact {
            0.0
        } else {
            self.factor * self.baseline_error.max(self.floor)
        }
    }

    /// The per-element tolerance: the larger of the analytic bound and the allowance.
    pub fn tolerance(&self) -> ArrayD<f64> {
        let allowance = self.allowance();
        match &self.analytic {
            Some(bound) => bound.mapv(|b| b.max(allowance)),
            None => ArrayD::from_elem(ndarray::IxDyn(&[]), allowance),
        }
    }

    /// The analytic bound at flat (row-major) index `n`, 0 where there is none (bounds
    /// are kept in row-major order, so the slice always exists).
    pub fn analytic_at(&self, n: usize) -> f64 {
        self.analytic
            .as_ref()
            .and_then(|a| a.as_slice().and_then(|s| s.get(n)).copied())
            .unwrap_or(0.0)
    }
}

/// Budgets of every output of `case` for a kernel computing in `dtype`.
pub fn budgets(
    case: &Case,
    inputs: &Arrays,
    expected: &Outputs,
    dtype: Dtype,
    factor: f64,
) -> Result<Budgets> {
    let analytic = reference::analytic_bounds(case, inputs, dtype)?;
    assemble(case, inputs, expected, analytic, dtype, factor)
}

/// The expected outputs of `case` and their budgets for a kernel computing in
/// `dtype`, in one pass of the reference ([`reference::expected_and_bounds`]): what
/// `check` and `emit` need, for about the cost of the expected outputs and the bounds'
/// own products. The same values as [`reference::expected`] and [`budgets`].
pub fn expected_and_budgets(
    case: &Case,
    inputs: &Arrays,
    dtype: Dtype,
    factor: f64,
) -> Result<(Outputs, Budgets)> {
    let (expected, analytic) = reference::expected_and_bounds(case, inputs, dtype)?;
    let budgets = assemble(case, inputs, &expected, analytic, dtype, factor)?;
    Ok((expected, budgets))
}

/// Budgets from the analytic bounds, with the baseline's error (not computed for f64).
fn assemble(
    case: &Case,
    inputs: &Arrays,
    expected: &Outputs,
    mut analytic: Outputs,
    dtype: Dtype,
    factor: f64,
) -> Result<Budgets> {
    // The f64 baseline is the oracle itself: its error is 0 by construction, and it is
    // never computed.
    let baseline = if dtype == Dtype::F64 {
        Outputs::new()
    } else {
        reference::baseline(case, inputs, dtype)?
    };
    let mut out = BTreeMap::new();
    for (&output, want) in expected {
        let baseline_error = baseline
            .get(&output)
            .map(|b| baseline_deviation(want, b))
            .unwrap_or(0.0);
        let budget = from_parts(
            case,
            output,
            dtype,
            factor,
            baseline_error,
            largest_expected(want),
            analytic.remove(&output),
        );
        out.insert(output, budget);
    }
    Ok(out)
}

/// The largest deviation of the baseline `b` from the oracle `want` over the finite
/// expected values (a maximum: the same taken over the whole array or head by head).
pub(crate) fn baseline_deviation(want: &ArrayD<f64>, b: &ArrayD<f64>) -> f64 {
    want.iter()
        .zip(b.iter())
        .filter(|(w, _)| w.is_finite())
        .map(|(w, b)| (w - b).abs())
        .fold(0.0, f64::max)
}

/// The largest finite expected magnitude (a maximum, like [`baseline_deviation`]).
pub(crate) fn largest_expected(want: &ArrayD<f64>) -> f64 {
    want.iter()
        .filter(|x| x.is_finite())
        .fold(0.0f64, |m, x| m.max(x.abs()))
}

/// The budget of `output` from the baseline's deviation, the largest expected
/// magnitude and the analytic bound (whole, or one head's rows).
pub(crate) fn from_parts(
    case: &Case,
    output: Output,
    dtype: Dtype,
    factor: f64,
    baseline_error: f64,
    largest: f64,
    analytic: Option<ArrayD<f64>>,
) -> Budget {
    let exact = output.is_integer();
    let dtype = if exact { Dtype::I64 } else { dtype };
    // The worst case is the analytic bound's job; the floor only keeps an f64 baseline
    // budget (where the baseline is the oracle itself) from being zero, so it uses the
    // probabilistic size sqrt(n)·u of a sum's rounding error (Higham and Mary 2019,
    // from memory), in the accumulation precision.
    let n = reference::reduction_length(case, output) as f64;
    let floor = n.sqrt() * accumulation_gamma(dtype, 1) * largest;
    Budget {
        dtype,
        factor,
        baseline_error,
        floor,
        // Flat indexing (analytic_at) needs row-major storage (copied only when the
        // bound is not already row-major).
        analytic: analytic.map(|a| {
            if a.is_standard_layout() {
                a
            } else {
                a.as_standard_layout().into_owned()
            }
        }),
        exact,
    }
}
