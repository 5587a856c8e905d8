//! What the two absolute schemes (sinusoidal, learned) share: a table row added to every
//! query and key at its absolute position, then plain scaled dot products.

use ndarray::{Array2, Array3, ArrayView3};

use crate::attention::{dot_scores, window_for, Scale};
use crate::error::Result;
use crate::math::contract::R64;
use crate::math::Contract;
use crate::scheme::model::{head_products, Inputs, PairPositions, SchemeModel};
use crate::scheme::xl_relative::standard_positions;
use crate::shape::Shape;

/// An absolute table: its rows at some positions, and how far a kernel's rows may be off.
pub(crate) trait AbsoluteTable: SchemeModel {
    /// Rows `[positions.len(), d]`.
    fn rows(
        &self,
        shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        positions: &[i64],
    ) -> Result<Array2<f64>>;

    /// Per-element error a kernel inside `contract` may make in `rows`.
    fn row_errors(
        &self,
        shape: &Shape<'_>,
        rows: &Array2<f64>,
        positions: &[i64],
        contract: &Contract,
    ) -> Array2<f64>;
}

/// `scale · (q + P[p_q]) · (k + P[p_k])` over one window, masked.
pub(crate) fn window_scores(
    table: &impl AbsoluteTable,
    shape: &Shape<'_>,
    inputs: &Inputs<'_, '_>,
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    p0: i64,
) -> Result<Array3<f64>> {
    let scale = table.scale();
    let window = window_for(q, k)?;
    let (qp, kp) = standard_positions(window, p0);
    let q = &q + &table.rows(shape, inputs, &qp)?;
    let k = &k + &table.rows(shape, inputs, &kp)?;
    Ok(dot_scores(q.view(), k.view(), scale)?.0)
}

/// `scale · (q + P[pos_q]) · (k + P[pos_k])` for every pair, unmasked.
pub(crate) fn pair_scores(
    table: &impl AbsoluteTable,
    shape: &Shape<'_>,
    inputs: &Inputs<'_, '_>,
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    positions: &PairPositions,
    scale: Scale,
) -> Result<Array3<f64>> {
    positions.check(q, k)?;
    let q = &q + &table.rows(shape, inputs, &positions.queries)?;
    let k = &k + &table.rows(shape, inputs, &positions.keys)?;
    Ok(head_products(&q, &k, scale.factor(shape.head_dim)))
}

/// The score terms of docs/budgets.md for absolute schemes: with `q̂ = q + P` and the
/// per-component error `ε` of `q̂` (the table's own error, the sum's rounding, the
/// input's rounding), `ε_q·|k̂| + |q̂|·ε_k + ε_q·ε_k + γ'·|q̂|·|k̂|`, times the scale.
pub(crate) fn score_terms(
    table: &impl AbsoluteTable,
    shape: &Shape<'_>,
    inputs: &Inputs<'_, '_>,
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    p0: i64,
    contract: &Contract,
) -> Result<Array3<f64>> {
    let scale = table.scale();
    let window = window_for(q, k)?;
    let (qp, kp) = standard_positions(window, p0);
    let d = shape.head_dim;
    let factor = scale.factor(d).abs();
    let gamma = contract.dot_gamma(d);
    let rounding = contract.storage + R64;
    let errors =
        |x: ArrayView3<'_, f64>, positions: &[i64]| -> Result<(Array2<f64>, Array3<f64>)> {
            let rows = table.rows(shape, inputs, positions)?;
            let row_error = table.row_errors(shape, &rows, positions, contract);
            let eps = Array3::from_shape_fn(x.raw_dim(), |(h, n, c)| {
                let sum = x[[h, n, c]] + rows[[n, c]];
                row_error[[n, c]] + rounding * sum.abs() + contract.input * x[[h, n, c]].abs()
            });
            Ok((rows, eps))
        };
    let (qt, eq) = errors(q, &qp)?;
    let (kt, ek) = errors(k, &kp)?;
    let (qa, ka) = ((&q + &qt).mapv(f64::abs), (&k + &kt).mapv(f64::abs));
    let products = |a: &Array3<f64>, b: &Array3<f64>| head_products(a, b, factor);
    Ok(products(&eq, &ka) + products(&qa, &ek) + products(&eq, &ek) + products(&qa, &ka) * gamma)
}
