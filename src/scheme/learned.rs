//! Learned absolute positions: a trained table `P[L_max, d]` indexed by position.
//!
//! Convention (docs/conventions.md, "learned"): a position at or beyond `L_max`, or
//! below zero, is an error. The reference never wraps (`p mod L_max`) and never clamps
//! (`min(p, L_max-1)`): both silently give two distinct tokens one encoding.
//!
//! Restarting positions at 0 in every segment of a recurrent model is the classic
//! misuse of this table: tokens `t` and `t + L` then share an encoding (position
//! aliasing). [`aliased_pairs`] finds such collisions.

use ndarray::{Array2, ArrayView2};

use crate::error::{Error, Result};

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
        let limit = self.max_positions();
        let mut out = Array2::zeros((positions.len(), self.width()));
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
            row.assign(&self.table.row(p as usize));
        }
        Ok(out)
    }
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
