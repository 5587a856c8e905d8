//! Learned absolute positions: a trained table `P[L_max, d]` indexed by position.
//!
//! Convention (docs/conventions.md, "learned"): a position at or beyond `L_max`, or
//! below zero, is an error. The reference never wraps (`p mod L_max`) and never clamps
//! (`min(p, L_max-1)`): both silently give two distinct tokens one encoding.
//!
//! Restarting positions at 0 in every segment of a recurrent model is the classic
//! misuse of this table: tokens `t` and `t + L` then share an encoding (position
//! aliasing). [`aliased_pairs`] finds such collisions.

use ndarray::{Array2, Array3, ArrayD, ArrayView2, ArrayView3};

use crate::attention::Scale;
use crate::error::{Error, Result};
use crate::math::{Contract, Stream};
use crate::scheme::absolute::{self, AbsoluteTable};
use crate::scheme::model::{Inputs, Parameter, ParameterKind, SchemeKind, SchemeModel};
use crate::shape::{InputSpec, Output, Shape};

/// A learned absolute position table.
#[derive(Debug, Clone, PartialEq)]
pub struct LearnedTable {
    table: Array2<f64>,
}

impl LearnedTable {
    /// Wraps a table of shape `[L_max, d]`, `L_max >= 1`, `d >= 1`, finite entries.
    pub fn new(table: Array2<f64>) -> Result<Self> {
        let (rows, cols) = table.dim();
        if rows == 0 || cols == 0 {
            return Err(Error::shape(
                "table",
                "[L_max, d] with L_max >= 1 and d >= 1",
                &[rows, cols],
            ));
        }
        crate::error::expect_finite("table", table.iter())?;
        Ok(LearnedTable { table })
    }

    /// Number of positions the table holds (`L_max`).
    pub fn max_positions(&self) -> usize {
        self.table.nrows()
    }

    /// Width of one row (`d`).
    pub fn width(&self) -> usize {
        self.table.ncols()
    }

    /// The underlying table.
    pub fn as_array(&self) -> ArrayView2<'_, f64> {
        self.table.view()
    }

    /// The rows for `positions`: shape `[positions.len(), d]`.
    ///
    /// Errors: any position `< 0` or `>= L_max` (named in the error).
    pub fn lookup(&self, positions: &[i64]) -> Result<Array2<f64>> {
        lookup(self.table.view(), positions)
    }
}

/// The rows of `table[L_max, d]` for `positions`, without taking the table over;
/// errors as [`LearnedTable::lookup`].
pub fn lookup(table: ArrayView2<'_, f64>, positions: &[i64]) -> Result<Array2<f64>> {
    let limit = table.nrows();
    let mut out = Array2::zeros((positions.len(), table.ncols()));
    for (mut row, &p) in out.rows_mut().into_iter().zip(positions) {
        if p < 0 || p as u64 >= limit as u64 {
            return Err(Error::PositionOutOfRange {
                name: "learned table",
                position: p,
                reason: format!(
                    "the table holds positions 0..{limit}; positions are never wrapped or clamped"
                ),
            });
        }
        row.assign(&table.row(p as usize));
    }
    Ok(out)
}

/// Pairs `(a, b)`, `a < b`, of rows of `encodings` that are bit-identical while the
/// tokens they encode sit at distinct absolute positions `absolute[a] != absolute[b]`.
///
/// A non-empty answer means the positional signal cannot tell the two tokens apart:
/// position aliasing. Quadratic in the number of rows; meant for tests and diagnosis.
pub fn aliased_pairs(encodings: ArrayView2<'_, f64>, absolute: &[i64]) -> Vec<(usize, usize)> {
    let n = encodings.nrows().min(absolute.len());
    let mut pairs = Vec::new();
    for a in 0..n {
        for b in a + 1..n {
            if absolute[a] != absolute[b] && encodings.row(a) == encodings.row(b) {
                pairs.push((a, b));
            }
        }
    }
    pairs
}

// ---------------------------------------------------------------------------------
// The scheme in cases: parameters, arrays, reference, bounds, random parameters.

/// A learned case's parameters (`{"name": "learned", "max_positions": …}`): rows of a
/// table `table[max_positions, d]` (an input) added to queries and keys at their
/// absolute positions, scores scaled by `1/sqrt(d)`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct LearnedSpec {
    /// `P_max`, rows in the table.
    pub max_positions: usize,
}

impl AbsoluteTable for LearnedSpec {
    fn rows(
        &self,
        _shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        positions: &[i64],
    ) -> Result<Array2<f64>> {
        let table = inputs.get2("table")?;
        crate::error::expect_finite("table", table.iter())?;
        lookup(table, positions)
    }

    fn row_errors(
        &self,
        _shape: &Shape<'_>,
        rows: &Array2<f64>,
        _positions: &[i64],
        contract: &Contract,
    ) -> Array2<f64> {
        // A row is an exact lookup of an input.
        rows.mapv(|t| contract.input * t.abs())
    }
}

impl SchemeModel for LearnedSpec {
    fn scale(&self) -> Scale {
        Scale::InverseSqrtDim
    }

    fn per_head_inputs(&self) -> Option<&'static [&'static str]> {
        Some(&[])
    }

    fn validate(&self, shape: &Shape<'_>) -> Result<()> {
        if self.max_positions == 0 {
            return Err(Error::param("scheme.max_positions", ">= 1", 0));
        }
        let (first, last) = shape.position_range();
        if first < 0 || last > self.max_positions as i64 {
            return Err(Error::param(
                "query_start",
                format!(
                    "positions {first}..{last} inside the table 0..{}",
                    self.max_positions
                ),
                shape.query_start,
            ));
        }
        Ok(())
    }

    fn encode_inputs(&self, shape: &Shape<'_>) -> Vec<InputSpec> {
        vec![
            InputSpec::uniform("table", vec![self.max_positions, shape.head_dim], 1.0),
            InputSpec::positions(shape.query_len),
        ]
    }

    fn window_inputs(&self, shape: &Shape<'_>) -> Vec<InputSpec> {
        vec![InputSpec::uniform(
            "table",
            vec![self.max_positions, shape.head_dim],
            1.0,
        )]
    }

    fn encode_output(&self, shape: &Shape<'_>) -> (Output, Vec<usize>) {
        (Output::Rows, vec![shape.query_len, shape.head_dim])
    }

    fn encode(&self, shape: &Shape<'_>, inputs: &Inputs<'_, '_>) -> Result<ArrayD<f64>> {
        let positions = inputs.positions("positions")?;
        Ok(self.rows(shape, inputs, &positions)?.into_dyn())
    }

    fn window_scores(
        &self,
        shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
    ) -> Result<Array3<f64>> {
        absolute::window_scores(self, shape, inputs, q, k, p0)
    }

    fn pair_scores(
        &self,
        shape: &crate::shape::Shape<'_>,
        inputs: &crate::scheme::model::Inputs<'_, '_>,
        q: ndarray::ArrayView3<'_, f64>,
        k: ndarray::ArrayView3<'_, f64>,
        positions: &crate::scheme::model::PairPositions,
        scale: crate::attention::Scale,
    ) -> Result<ndarray::Array3<f64>> {
        crate::scheme::absolute::pair_scores(self, shape, inputs, q, k, positions, scale)
    }

    fn score_terms(
        &self,
        shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
        contract: &Contract,
    ) -> Result<Array3<f64>> {
        absolute::score_terms(self, shape, inputs, q, k, p0, contract)
    }

    fn encode_bounds(
        &self,
        _shape: &Shape<'_>,
        _inputs: &Inputs<'_, '_>,
        values: &ArrayD<f64>,
        contract: &Contract,
    ) -> Result<ArrayD<f64>> {
        // Lookups are exact; a kernel narrower than the case rounds them once.
        Ok(values.mapv(|v| contract.input * v.abs() + contract.floor))
    }
}

impl SchemeKind for LearnedSpec {
    const SOURCE: &'static str = "learned absolute table (common practice)";

    const PARAMETERS: &'static [Parameter] =
        &[Parameter::new("max_positions", ParameterKind::Number)];

    /// Far enough for rows far from the table's start, near enough that the table (a
    /// row per position up to the last one used) stays the size of the other arrays.
    const MAX_RANDOM_START: usize = 1000;

    fn random(stream: &mut Stream, shape: &Shape<'_>) -> Self {
        // The positions the case uses, and up to 7 rows beyond them: the last position
        // is often the table's last row, where an off-by-one lookup fails.
        let (_, end) = shape.position_range();
        LearnedSpec {
            max_positions: end.max(1) as usize + crate::scheme::model::range(stream, 0, 7),
        }
    }
}
