//! Rotary position embedding, RoPE (Su et al. 2021, "RoFormer: Enhanced Transformer
//! with Rotary Position Embedding", eqs. 14–16 and 34).
//!
//! Convention (docs/conventions.md, "rotary"): with rotary width `d_rot <= d` (even),
//! `θ_j = base^(-2j/d_rot)` for `j = 0..d_rot/2-1`, and a vector at absolute position
//! `p` has each pair `(a, b)` rotated by the angle `p·θ_j`:
//!
//! ```text
//! (x_a, x_b) -> (x_a cos(pθ_j) - x_b sin(pθ_j),  x_a sin(pθ_j) + x_b cos(pθ_j))
//! ```
//!
//! - [`Pairing::Adjacent`]: `(a, b) = (2j, 2j+1)`, the paper's eq. 34;
//! - [`Pairing::HalfSplit`]: `(a, b) = (j, j + d_rot/2)`, the "rotate half" layout many
//!   implementations use. The two are different functions with the same properties, so
//!   only golden values tell them apart (docs/faults.md, `rotary-pairing-swapped`).
//!
//! Dimensions `d_rot..d` (partial rotary) pass through bit-exactly. Positions are any
//! `i64` with `|p| <= 2^53`, so that `p` converts to `f64` exactly; offsets for cached
//! decoding are just larger positions. Attention follows the shared causal convention of
//! [`crate::attention`]: query `i` at `p0 + i`, key `j` at `p0 - M + j`, visible iff
//! `j <= M + i`. Because `<R_m q, R_n k>` depends only on `m - n`, rotating queries and
//! keys once and taking plain dot products *is* the relative scheme.
//!
//! Context extension ([`RotaryScaling`]): linear position interpolation divides
//! positions by a factor `s` (Chen et al. 2023, "Extending Context Window of Large
//! Language Models via Positional Interpolation"); NTK-aware scaling keeps positions and
//! raises the base to `b' = b·s^(d_rot/(d_rot-2))` (from a community post, as credited
//! in Peng et al. 2023, "YaRN", Definition 1).

use ndarray::{s, Array2, Array3, ArrayD, ArrayView3, Axis};

use crate::attention::{attend, dot_scores, masked_softmax, window_for, Scale, Window};
use crate::error::{expect_finite, expect_shape, Error, Result};
use crate::math::angle::{self, DoubleDouble};
use crate::math::product::gemm;
use crate::math::{AngleScaling, Contract, Stream};
use crate::scheme::model::{
    head_products, pick, range, Inputs, PairPositions, Parameter, ParameterKind, SchemeKind,
    SchemeModel,
};
use crate::scheme::sinusoidal::precise_frequencies;
use crate::scheme::xl_relative::standard_positions;
use crate::scheme::SchemeSpec;
use crate::shape::{InputSpec, Output, Shape};

/// The base of the paper's `θ_i = 10000^(-2(i-1)/d)` (Su et al. 2021, under eq. 15,
/// from memory; the same base as Vaswani et al. 2017, §3.5).
pub const DEFAULT_BASE: f64 = 10_000.0;

/// The largest position magnitude whose conversion to `f64` is exact (2^53).
pub const MAX_POSITION: i64 = 1 << 53;

/// Which two dimensions of the rotary part form the pair rotated by `θ_j`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Pairing {
    /// `(2j, 2j+1)`, RoFormer eq. 34.
    Adjacent,
    /// `(j, j + d_rot/2)`, the "rotate half" layout.
    HalfSplit,
}

impl Pairing {
    /// The indices of pair `j` in a rotary part of width `rotary_dim`.
    pub fn pair_indices(self, j: usize, rotary_dim: usize) -> (usize, usize) {
        match self {
            Pairing::Adjacent => (2 * j, 2 * j + 1),
            Pairing::HalfSplit => (j, j + rotary_dim / 2),
        }
    }
}

/// How a rotary encoding is stretched beyond its training context.
#[derive(Debug, Clone, Copy, PartialEq, Default, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum RotaryScaling {
    /// Angles `p·θ_j`, as in the paper.
    #[default]
    None,
    /// Angles `(p/factor)·θ_j`: linear position interpolation (Chen et al. 2023).
    LinearInterpolation {
        /// The interpolation factor `s > 0`.
        factor: f64,
    },
    /// Angles `p·θ'_j` with `θ'_j` from the base `b·s^(d_rot/(d_rot-2))` (NTK-aware
    /// scaling; Peng et al. 2023, YaRN, Definition 1).
    NtkAware {
        /// The scale factor `s > 0`.
        factor: f64,
    },
}

/// The parameters of a rotary encoding; [`Rotary::new`] validates them.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct RotaryParams {
    /// `d`, the width of one query or key head.
    pub head_dim: usize,
    /// `d_rot`, the rotated leading part of each head (even, `2 <= d_rot <= d`).
    pub rotary_dim: usize,
    /// The base of the frequency progression before any scaling.
    pub base: f64,
    /// Which dimensions form a rotated pair.
    pub pairing: Pairing,
    /// Context-extension scaling.
    pub scaling: RotaryScaling,
}

impl RotaryParams {
    /// The paper's encoding over the whole head: base 10000, no scaling.
    pub fn full(head_dim: usize, pairing: Pairing) -> Self {
        RotaryParams {
            head_dim,
            rotary_dim: head_dim,
            base: DEFAULT_BASE,
            pairing,
            scaling: RotaryScaling::None,
        }
    }
}

/// `b' = base · factor^(rotary_dim/(rotary_dim-2))`, the NTK-aware base (Peng et al.
/// 2023, YaRN, Definition 1, crediting a community post).
///
/// The exponent makes the lowest frequency `θ_{d_rot/2-1}` exactly `factor` times
/// slower while `θ_0 = 1` is unchanged. Errors: `rotary_dim` not even and `> 2`;
/// `base` or `factor` not finite and positive.
pub fn ntk_base(base: f64, factor: f64, rotary_dim: usize) -> Result<f64> {
    if rotary_dim <= 2 || !rotary_dim.is_multiple_of(2) {
        return Err(Error::param(
            "rotary_dim",
            "an even number > 2 for NTK-aware scaling (the exponent is d_rot/(d_rot-2))",
            rotary_dim,
        ));
    }
    check_positive("base", base)?;
    check_positive("scaling.factor", factor)?;
    let d = rotary_dim as f64;
    Ok(base * libm::pow(factor, d / (d - 2.0)))
}

fn check_positive(name: &'static str, x: f64) -> Result<()> {
    if x.is_finite() && x > 0.0 {
        Ok(())
    } else {
        Err(Error::param(name, "a finite number > 0", x))
    }
}

/// A validated rotary encoding with its frequencies precomputed.
#[derive(Debug, Clone, PartialEq)]
pub struct Rotary {
    params: RotaryParams,
    frequencies: Vec<f64>,
    precise: Vec<DoubleDouble>,
    position_divisor: f64,
}

impl Rotary {
    /// Validates `params` and precomputes `θ_j` (after any NTK base change).
    ///
    /// Errors: `head_dim == 0`; `rotary_dim` odd, below 2 or above `head_dim`; `base`
    /// or a scaling factor not finite and positive; NTK-aware scaling with
    /// `rotary_dim == 2`.
    ///
    /// # Example
    ///
    /// Rotating `x = [1, 2, 3, 4]` to position 1 with the paper's pairing; with `d = 4`
    /// and base 10000, `θ = [1, 0.01]` (values from mpmath, vectors/mpmath/quoted_values.py):
    ///
    /// ```
    /// use posconform::rotary::{Pairing, Rotary, RotaryParams};
    ///
    /// let rope = Rotary::new(RotaryParams::full(4, Pairing::Adjacent))?;
    /// let y = rope.rotate(&[1.0, 2.0, 3.0, 4.0], 1)?;
    /// let expected = [-1.14263966374765, 1.92207559654418, 2.95985066791333, 4.02979950166916];
    /// for (got, want) in y.iter().zip(expected) {
    ///     assert!((got - want).abs() < 1e-14);
    /// }
    /// // Rotation preserves the norm, and position 0 is the identity.
    /// let norm = |v: &[f64]| v.iter().map(|x| x * x).sum::<f64>().sqrt();
    /// assert!((norm(&y) - 30f64.sqrt()).abs() < 1e-14);
    /// assert_eq!(rope.rotate(&[1.0, 2.0, 3.0, 4.0], 0)?, vec![1.0, 2.0, 3.0, 4.0]);
    /// # Ok::<(), posconform::Error>(())
    /// ```
    pub fn new(params: RotaryParams) -> Result<Self> {
        let RotaryParams {
            head_dim,
            rotary_dim,
            base,
            scaling,
            ..
        } = params;
        if head_dim == 0 {
            return Err(Error::param("head_dim", "d >= 1", head_dim));
        }
        if rotary_dim < 2 || rotary_dim % 2 != 0 || rotary_dim > head_dim {
            return Err(Error::param(
                "rotary_dim",
                format!("an even number with 2 <= d_rot <= d = {head_dim}"),
                rotary_dim,
            ));
        }
        check_positive("base", base)?;
        let ln_base = DoubleDouble::from_f64(base).ln();
        let (ln_effective_base, position_divisor) = match scaling {
            RotaryScaling::None => (ln_base, 1.0),
            RotaryScaling::LinearInterpolation { factor } => {
                check_positive("scaling.factor", factor)?;
                (ln_base, factor)
            }
            RotaryScaling::NtkAware { factor } => {
                // Validates as ntk_base does; ln b' = ln b + d_rot/(d_rot-2) · ln s.
                ntk_base(base, factor, rotary_dim)?;
                let d = DoubleDouble::from_f64(rotary_dim as f64);
                let exponent = d / (d - DoubleDouble::from_f64(2.0));
                let ln_factor = DoubleDouble::from_f64(factor).ln();
                (ln_base + exponent * ln_factor, 1.0)
            }
        };
        let precise = precise_frequencies(rotary_dim, ln_effective_base);
        Ok(Rotary {
            params,
            frequencies: precise.iter().map(|w| w.to_f64()).collect(),
            precise,
            position_divisor,
        })
    }

    /// The validated parameters.
    pub fn params(&self) -> &RotaryParams {
        &self.params
    }

    /// `θ_j` for `j = 0..d_rot/2`, from the base after any NTK-aware change.
    pub fn frequencies(&self) -> &[f64] {
        &self.frequencies
    }

    /// The rotation angles `p'·θ_j` of one position, where `p' = p` or `p/s` under
    /// linear interpolation (formed in double-double, rounded to f64).
    pub fn angles(&self, position: i64) -> Result<Vec<f64>> {
        let p = self.scaled_position(position)?;
        Ok(self.precise.iter().map(|&w| (p * w).to_f64()).collect())
    }

    /// `p' = p / s` in double-double (`p` itself without linear interpolation).
    fn scaled_position(&self, position: i64) -> Result<DoubleDouble> {
        if position.unsigned_abs() > MAX_POSITION as u64 {
            return Err(Error::PositionOutOfRange {
                name: "rotary",
                position,
                reason: format!("|p| must be <= 2^53 = {MAX_POSITION} to convert to f64 exactly"),
            });
        }
        let p = DoubleDouble::from_f64(position as f64);
        Ok(if self.position_divisor == 1.0 {
            p
        } else {
            p / DoubleDouble::from_f64(self.position_divisor)
        })
    }

    /// `(cos, sin)` of every angle of every position: `[positions.len(), d_rot/2]` each.
    fn rotation_table(&self, positions: &[i64]) -> Result<(Array2<f64>, Array2<f64>)> {
        let pairs = self.precise.len();
        let mut cos = Array2::zeros((positions.len(), pairs));
        let mut sin = Array2::zeros((positions.len(), pairs));
        for (n, &position) in positions.iter().enumerate() {
            let p = self.scaled_position(position)?;
            for (j, &theta) in self.precise.iter().enumerate() {
                let (s, c) = angle::sin_cos(p, theta);
                cos[[n, j]] = c;
                sin[[n, j]] = s;
            }
        }
        Ok((cos, sin))
    }

    fn rotate_with(&self, x: &mut [f64], cos: &[f64], sin: &[f64]) {
        let rotary_dim = self.params.rotary_dim;
        for (j, (c, s)) in cos.iter().zip(sin).enumerate() {
            let (a, b) = self.params.pairing.pair_indices(j, rotary_dim);
            let (xa, xb) = (x[a], x[b]);
            x[a] = xa * c - xb * s;
            x[b] = xa * s + xb * c;
        }
    }

    /// `R_p x` for one head vector `x` of length `d`.
    ///
    /// Errors: wrong length, non-finite entries, `|position| > 2^53`.
    pub fn rotate(&self, x: &[f64], position: i64) -> Result<Vec<f64>> {
        expect_shape("x", &["d"], &[self.params.head_dim], &[x.len()])?;
        expect_finite("x", x)?;
        let (cos, sin) = self.rotation_table(&[position])?;
        let mut out = x.to_vec();
        self.rotate_with(
            &mut out,
            cos.as_slice().expect("fresh array"),
            sin.as_slice().expect("fresh array"),
        );
        Ok(out)
    }

    /// `R_{positions[n]} x[h, n]` for every head `h` and token `n`: `x[H, N, d]` with
    /// one position per token, shared by all heads.
    ///
    /// Each angle is computed once per position, not once per head.
    pub fn apply(&self, x: ArrayView3<'_, f64>, positions: &[i64]) -> Result<Array3<f64>> {
        let (heads, tokens, d) = x.dim();
        expect_shape(
            "x",
            &["H", "N", "d"],
            &[heads, positions.len(), self.params.head_dim],
            &[heads, tokens, d],
        )?;
        expect_finite("x", x.iter())?;
        let (cos, sin) = self.rotation_table(positions)?;
        let mut out = x.as_standard_layout().into_owned();
        for mut head in out.outer_iter_mut() {
            for (n, mut row) in head.outer_iter_mut().enumerate() {
                self.rotate_with(
                    row.as_slice_mut()
                        .expect("standard layout rows are contiguous"),
                    cos.row(n).as_slice().expect("fresh array"),
                    sin.row(n).as_slice().expect("fresh array"),
                );
            }
        }
        Ok(out)
    }
}

/// Absolute positions of docs/conventions.md for `window` starting at `query_start`:
/// queries `p0 + i`, keys `p0 - M + j`; errors if any leaves the `i64` range.
pub fn positions(window: Window, query_start: i64) -> Result<(Vec<i64>, Vec<i64>)> {
    let out_of_range = || Error::PositionOutOfRange {
        name: "query_start",
        position: query_start,
        reason: format!(
            "positions p0 - M .. p0 + L (M = {}, L = {}) must fit in i64",
            window.memory_len(),
            window.query_len()
        ),
    };
    let m = i64::try_from(window.memory_len()).map_err(|_| out_of_range())?;
    let l = i64::try_from(window.query_len()).map_err(|_| out_of_range())?;
    let first_key = query_start.checked_sub(m).ok_or_else(out_of_range)?;
    query_start.checked_add(l).ok_or_else(out_of_range)?;
    let queries = (0..l).map(|i| query_start + i).collect();
    let keys = (0..m + l).map(|j| first_key + j).collect();
    Ok((queries, keys))
}

/// Rotary scores `scale · <R_{p0+i} q[h,i], R_{p0-M+j} k[h,j]>` for visible pairs,
/// `-inf` elsewhere: `[H, L, M+L]`, with the window read off the shapes.
///
/// Shapes (docs/conventions.md): `q[H, L, d]`, `k[H, M+L, d]`, keys unrotated, memory first.
pub fn scores(
    rotary: &Rotary,
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    query_start: i64,
    scale: Scale,
) -> Result<(Array3<f64>, Window)> {
    let window = window_for(q, k)?;
    let (query_positions, key_positions) = positions(window, query_start)?;
    let q_rotated = rotary.apply(q, &query_positions)?;
    let k_rotated = rotary.apply(k, &key_positions)?;
    dot_scores(q_rotated.view(), k_rotated.view(), scale)
}

/// The scores, probabilities and outputs of one attention step.
#[derive(Debug, Clone, PartialEq)]
pub struct RotaryAttention {
    /// Pre-softmax scores `[H, L, M+L]`, `-inf` where hidden.
    pub scores: Array3<f64>,
    /// Softmax probabilities `[H, L, M+L]`, exactly 0 where hidden.
    pub probs: Array3<f64>,
    /// Attention outputs `[H, L, d_v]`.
    pub output: Array3<f64>,
}

/// Full rotary attention over `[memory ; current]`: [`scores`], masked softmax, and the
/// weighted sum of `v[H, M+L, d_v]`.
pub fn attention(
    rotary: &Rotary,
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    v: ArrayView3<'_, f64>,
    query_start: i64,
    scale: Scale,
) -> Result<RotaryAttention> {
    expect_finite("v", v.iter())?;
    let (scores, _) = scores(rotary, q, k, query_start, scale)?;
    let probs = masked_softmax(scores.view())?;
    let output = attend(probs.view(), v)?;
    Ok(RotaryAttention {
        scores,
        probs,
        output,
    })
}

#[cfg(test)]
mod tests {
    //! Malformed shapes and parameters must come back as typed errors, never panics.

    use super::*;
    use ndarray::Array3;

    fn rope(d: usize) -> Rotary {
        Rotary::new(RotaryParams::full(d, Pairing::Adjacent)).unwrap()
    }

    fn parameter_name(error: Error) -> &'static str {
        match error {
            Error::InvalidParameter { name, .. } | Error::Shape { name, .. } => name,
            Error::PositionOutOfRange { name, .. } => name,
            other => panic!("unexpected error {other:?}"),
        }
    }

    #[test]
    fn rotary_width_must_be_even_and_within_the_head() {
        for rotary_dim in [0, 3, 10] {
            let params = RotaryParams {
                rotary_dim,
                ..RotaryParams::full(8, Pairing::HalfSplit)
            };
            let error = Rotary::new(params).unwrap_err();
            assert_eq!(
                error.to_string(),
                format!(
                    "invalid parameter `rotary_dim`: expected an even number with \
                     2 <= d_rot <= d = 8, given {rotary_dim}"
                )
            );
        }
        let zero_head = Rotary::new(RotaryParams::full(0, Pairing::Adjacent)).unwrap_err();
        assert_eq!(parameter_name(zero_head), "head_dim");
    }

    #[test]
    fn bases_and_factors_must_be_finite_and_positive() {
        for base in [0.0, -1.0, f64::NAN, f64::INFINITY] {
            let params = RotaryParams {
                base,
                ..RotaryParams::full(4, Pairing::Adjacent)
            };
            assert_eq!(parameter_name(Rotary::new(params).unwrap_err()), "base");
        }
        for scaling in [
            RotaryScaling::LinearInterpolation { factor: 0.0 },
            RotaryScaling::LinearInterpolation { factor: f64::NAN },
            RotaryScaling::NtkAware { factor: -2.0 },
        ] {
            let params = RotaryParams {
                scaling,
                ..RotaryParams::full(4, Pairing::Adjacent)
            };
            assert_eq!(
                parameter_name(Rotary::new(params).unwrap_err()),
                "scaling.factor"
            );
        }
        let ntk_on_one_pair = RotaryParams {
            scaling: RotaryScaling::NtkAware { factor: 2.0 },
            ..RotaryParams::full(2, Pairing::Adjacent)
        };
        assert_eq!(
            parameter_name(Rotary::new(ntk_on_one_pair).unwrap_err()),
            "rotary_dim"
        );
    }

    #[test]
    fn wrong_lengths_and_non_finite_inputs_are_errors() {
        let rope = rope(4);
        assert_eq!(parameter_name(rope.rotate(&[1.0; 3], 1).unwrap_err()), "x");
        assert_eq!(
            parameter_name(rope.rotate(&[1.0, f64::NAN, 0.0, 0.0], 1).unwrap_err()),
            "x"
        );
        let x = Array3::from_elem((2, 3, 4), 1.0);
        assert_eq!(
            parameter_name(rope.apply(x.view(), &[0, 1]).unwrap_err()),
            "x"
        );
        let wide = Array3::from_elem((2, 3, 5), 1.0);
        assert_eq!(
            parameter_name(rope.apply(wide.view(), &[0, 1, 2]).unwrap_err()),
            "x"
        );
    }

    #[test]
    fn positions_beyond_exact_f64_or_i64_are_errors() {
        let rope = rope(4);
        let far = rope.rotate(&[1.0; 4], MAX_POSITION + 1).unwrap_err();
        assert!(
            matches!(far, Error::PositionOutOfRange { position, .. } if position == MAX_POSITION + 1)
        );
        assert!(rope.rotate(&[1.0; 4], -MAX_POSITION).is_ok());
        let window = Window::new(2, 3).unwrap();
        assert!(positions(window, i64::MIN).is_err());
        assert!(positions(window, i64::MAX - 1).is_err());
    }

    #[test]
    fn attention_rejects_mismatched_shapes_and_non_finite_values() {
        let rope = rope(4);
        let q = Array3::from_elem((2, 3, 4), 0.5);
        let k = Array3::from_elem((2, 5, 4), 0.5);
        let v = Array3::from_elem((2, 5, 3), 0.5);
        assert!(attention(&rope, q.view(), k.view(), v.view(), 7, Scale::default()).is_ok());
        let few_keys = Array3::from_elem((2, 2, 4), 0.5);
        assert_eq!(
            parameter_name(
                scores(&rope, q.view(), few_keys.view(), 0, Scale::default()).unwrap_err()
            ),
            "k"
        );
        let other_heads = Array3::from_elem((1, 5, 4), 0.5);
        assert!(scores(&rope, q.view(), other_heads.view(), 0, Scale::default()).is_err());
        let short_values = Array3::from_elem((2, 4, 3), 0.5);
        assert!(attention(
            &rope,
            q.view(),
            k.view(),
            short_values.view(),
            0,
            Scale::default()
        )
        .is_err());
        let mut bad_v = v.clone();
        bad_v[[1, 4, 2]] = f64::INFINITY;
        assert_eq!(
            parameter_name(
                attention(&rope, q.view(), k.view(), bad_v.view(), 0, Scale::default())
                    .unwrap_err()
            ),
            "v"
        );
        let narrow_q = Array3::from_elem((2, 3, 6), 0.5);
        let narrow_k = Array3::from_elem((2, 5, 6), 0.5);
        assert!(scores(&rope, narrow_q.view(), narrow_k.view(), 0, Scale::default()).is_err());
        assert_eq!(
            parameter_name(
                scores(&rope, q.view(), k.view(), 0, Scale::Fixed(f64::NAN)).unwrap_err()
            ),
            "scale"
        );
    }
}

// ---------------------------------------------------------------------------------
// The scheme in cases: parameters, arrays, reference, bounds, random parameters.

/// A rotary case's parameters (`{"name": "rotary", "rotary_dim": …, "base": …,
/// "pairing": …, "scaling": …, "scale": …}`): queries and keys rotated at their
/// absolute positions, then scaled dot products.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct RotarySpec {
    /// `d_rot`, the rotated leading part of each head.
    pub rotary_dim: usize,
    /// Frequency base.
    pub base: f64,
    /// Pair layout.
    pub pairing: Pairing,
    /// Context-extension scaling.
    pub scaling: RotaryScaling,
    /// Score scale.
    pub scale: Scale,
}

impl RotarySpec {
    /// The rotary encoding of these parameters for heads of width `head_dim`.
    pub fn rotary(&self, head_dim: usize) -> Result<Rotary> {
        Rotary::new(RotaryParams {
            head_dim,
            rotary_dim: self.rotary_dim,
            base: self.base,
            pairing: self.pairing,
            scaling: self.scaling,
        })
    }

    fn angle_scaling(&self) -> AngleScaling {
        match self.scaling {
            RotaryScaling::None => AngleScaling::None,
            RotaryScaling::LinearInterpolation { .. } => AngleScaling::Linear,
            RotaryScaling::NtkAware { .. } => AngleScaling::Ntk,
        }
    }
}

impl SchemeModel for RotarySpec {
    fn scale(&self) -> Scale {
        self.scale
    }

    fn per_head_inputs(&self) -> Option<&'static [&'static str]> {
        Some(&[])
    }

    fn validate(&self, shape: &Shape<'_>) -> Result<()> {
        self.scale.validate()?;
        self.rotary(shape.head_dim).map(drop)
    }

    fn encode_inputs(&self, shape: &Shape<'_>) -> Vec<InputSpec> {
        vec![
            InputSpec::uniform("x", vec![shape.heads, shape.query_len, shape.head_dim], 1.0),
            InputSpec::positions(shape.query_len),
        ]
    }

    fn encode_output(&self, shape: &Shape<'_>) -> (Output, Vec<usize>) {
        (
            Output::Rotated,
            vec![shape.heads, shape.query_len, shape.head_dim],
        )
    }

    fn encode(&self, shape: &Shape<'_>, inputs: &Inputs<'_, '_>) -> Result<ArrayD<f64>> {
        let rotary = self.rotary(shape.head_dim)?;
        Ok(rotary
            .apply(inputs.get3("x")?, &inputs.positions("positions")?)?
            .into_dyn())
    }

    fn window_scores(
        &self,
        shape: &Shape<'_>,
        _inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
    ) -> Result<Array3<f64>> {
        Ok(scores(&self.rotary(shape.head_dim)?, q, k, p0, self.scale)?.0)
    }

    fn pair_scores(
        &self,
        shape: &Shape<'_>,
        _inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        positions: &PairPositions,
        scale: Scale,
    ) -> Result<Array3<f64>> {
        positions.check(q, k)?;
        let rotary = self.rotary(shape.head_dim)?;
        let q = rotary.apply(q, &positions.queries)?;
        let k = rotary.apply(k, &positions.keys)?;
        Ok(head_products(&q, &k, scale.factor(shape.head_dim)))
    }

    /// Per rotated pair `j`, `ρ_q ρ_k (δθ_q + δθ_k + 4e + 4e² + γ')` (a rotation by a
    /// wrong angle moves a pair of norm `ρ` by `ρ·|δθ|`; `e` is the relative error of one
    /// rotated component from cos/sin evaluation, storage, the rotation's products and
    /// the inputs' rounding), plus `(2·input + γ')·Σ|q_c k_c|` over the pass-through
    /// tail; all times the scale.
    fn score_terms(
        &self,
        shape: &Shape<'_>,
        _inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
        contract: &Contract,
    ) -> Result<Array3<f64>> {
        let window = window_for(q, k)?;
        let (qp, kp) = standard_positions(window, p0);
        let rot = self.rotary(shape.head_dim)?;
        let params = *rot.params();
        let pairs = params.rotary_dim / 2;
        let d = shape.head_dim;
        let factor = self.scale.factor(d).abs();
        let gamma = contract.dot_gamma(d);
        let e = contract.rotated_component_error();
        let per_pair = 4.0 * e + 4.0 * e * e + gamma;
        let scaling = self.angle_scaling();
        let angle_errors = |positions: &[i64]| -> Result<Array2<f64>> {
            let mut out = Array2::zeros((positions.len(), pairs));
            for (n, &p) in positions.iter().enumerate() {
                for (j, theta) in rot.angles(p)?.into_iter().enumerate() {
                    out[[n, j]] =
                        contract.angle_error(p as f64, theta, rot.frequencies()[j], scaling);
                }
            }
            Ok(out)
        };
        let (dq, dk) = (angle_errors(&qp)?, angle_errors(&kp)?);
        let norms = |x: ArrayView3<'_, f64>| {
            Array3::from_shape_fn((x.dim().0, x.dim().1, pairs), |(h, n, j)| {
                let (a, b) = params.pairing.pair_indices(j, params.rotary_dim);
                x[[h, n, a]].hypot(x[[h, n, b]])
            })
        };
        let (rq, rk) = (norms(q), norms(k));
        let weighted = |rho: &Array3<f64>, delta: &Array2<f64>| {
            Array3::from_shape_fn(rho.raw_dim(), |(h, n, j)| rho[[h, n, j]] * delta[[n, j]])
        };
        let (rq_dq, rk_dk) = (weighted(&rq, &dq), weighted(&rk, &dk));
        let tail = |x: ArrayView3<'_, f64>| x.slice(s![.., .., params.rotary_dim..]).mapv(f64::abs);
        let (tq, tk) = (tail(q), tail(k));
        let (heads, l, kk) = (shape.heads, q.dim().1, k.dim().1);
        let mut out = Array3::zeros((heads, l, kk));
        for h in 0..heads {
            let mut o = out.index_axis_mut(Axis(0), h);
            let (rq, rk) = (rq.index_axis(Axis(0), h), rk.index_axis(Axis(0), h));
            gemm(factor, &rq_dq.index_axis(Axis(0), h), &rk.t(), 0.0, &mut o);
            gemm(factor, &rq, &rk_dk.index_axis(Axis(0), h).t(), 1.0, &mut o);
            gemm(factor * per_pair, &rq, &rk.t(), 1.0, &mut o);
            if params.rotary_dim < d {
                let tail_coefficient = 2.0 * contract.input + gamma;
                gemm(
                    factor * tail_coefficient,
                    &tq.index_axis(Axis(0), h),
                    &tk.index_axis(Axis(0), h).t(),
                    1.0,
                    &mut o,
                );
            }
        }
        Ok(out)
    }

    fn encode_bounds(
        &self,
        shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        values: &ArrayD<f64>,
        contract: &Contract,
    ) -> Result<ArrayD<f64>> {
        let rot = self.rotary(shape.head_dim)?;
        let params = *rot.params();
        let x = inputs.get3("x")?;
        let positions = inputs.positions("positions")?;
        let e = contract.rotated_component_error();
        let scaling = self.angle_scaling();
        let floor = contract.floor;
        // The pass-through tail: only the inputs' rounding.
        let mut bound = values.mapv(|v| contract.input * v.abs() + floor);
        for (n, &p) in positions.iter().enumerate() {
            let angles = rot.angles(p)?;
            for (j, (&theta, &omega)) in angles.iter().zip(rot.frequencies()).enumerate() {
                let delta = contract.angle_error(p as f64, theta, omega, scaling);
                let (a, b) = params.pairing.pair_indices(j, params.rotary_dim);
                for h in 0..shape.heads {
                    let (xa, xb) = (x[[h, n, a]], x[[h, n, b]]);
                    let pair = xa.hypot(xb) * delta + (xa.abs() + xb.abs()) * e;
                    bound[[h, n, a].as_slice()] = pair + floor;
                    bound[[h, n, b].as_slice()] = pair + floor;
                }
            }
        }
        Ok(bound)
    }

    fn simpler(&self, shape: &Shape<'_>) -> Vec<SchemeSpec> {
        vec![
            SchemeSpec::Rotary(RotarySpec {
                rotary_dim: shape.head_dim,
                ..*self
            }),
            SchemeSpec::Rotary(RotarySpec {
                scaling: RotaryScaling::None,
                ..*self
            }),
        ]
    }

    fn fit_head_dim(&self, head_dim: usize) -> Option<SchemeSpec> {
        Some(SchemeSpec::Rotary(RotarySpec {
            rotary_dim: self.rotary_dim.min(head_dim),
            ..*self
        }))
    }

    fn extras(&self, shape: &Shape<'_>) -> usize {
        (self.rotary_dim != shape.head_dim) as usize
            + (self.scaling != RotaryScaling::None) as usize
    }
}

impl SchemeKind for RotarySpec {
    const SOURCE: &'static str = "Su et al. 2021, RoFormer, eqs. 14-16 and 34";

    const PARAMETERS: &'static [Parameter] = &[
        Parameter::new("rotary_dim", ParameterKind::RotaryDim),
        Parameter::new("base", ParameterKind::Number),
        Parameter::new("pairing", ParameterKind::Names(&["adjacent", "half_split"])),
        Parameter::new("scaling", ParameterKind::Scaling),
        Parameter::SCALE,
    ];

    fn random(stream: &mut Stream, shape: &Shape<'_>) -> Self {
        let head_dim = shape.head_dim;
        let rotary_dim = if stream.below(3) == 0 {
            2 * range(stream, 1, head_dim / 2)
        } else {
            head_dim
        };
        let scaling = match stream.below(4) {
            0 => RotaryScaling::LinearInterpolation {
                factor: range(stream, 2, 8) as f64,
            },
            1 if rotary_dim > 2 => RotaryScaling::NtkAware {
                factor: range(stream, 2, 8) as f64,
            },
            _ => RotaryScaling::None,
        };
        RotarySpec {
            rotary_dim,
            base: DEFAULT_BASE,
            pairing: pick(stream, &[Pairing::Adjacent, Pairing::HalfSplit]),
            scaling,
            scale: Scale::InverseSqrtDim,
        }
    }
}
