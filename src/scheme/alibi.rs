//! Attention with linear biases, ALiBi (Press, Smith, Lewis 2022, "Train Short, Test
//! Long: Attention with Linear Biases Enables Input Length Extrapolation", §3).
//!
//! Convention (docs/conventions.md, "alibi"; layout and positions as in [`crate::attention`]):
//! query `i` sits at absolute position `p0 + i`, key `j` at `p0 - M + j`, and for a
//! visible pair
//!
//! ```text
//! S[h,i,j] = scale · q[h,i]·k[h,j]  +  bias[h,i,j],   bias[h,i,j] = -m_h · (pos_i - pos_j)
//! ```
//!
//! The bias is added *after* the scale: it is not multiplied by `1/sqrt(d)`. Hidden
//! entries (`j > M + i`) are `-inf`. `m_h` are the head slopes of [`slopes`].
//!
//! Some implementations add `m_h · pos_j` instead ([`BiasForm::KeyOnly`]). That differs
//! from the distance form by `m_h · pos_i`, a constant along each score row, so the two
//! give the same probabilities and outputs but different scores: compare probabilities,
//! or pin one convention, when checking a kernel.
//!
//! # Example
//!
//! ```
//! use ndarray::Array3;
//! use posconform::alibi::{scores, slopes, AlibiParams};
//!
//! let m = slopes(8)?;
//! assert_eq!((m[0], m[7]), (0.5, 1.0 / 256.0));
//!
//! // One head, zero queries and keys: the scores are the bias alone.
//! let q = Array3::zeros((1, 2, 4));
//! let k = Array3::zeros((1, 3, 4)); // M = 1 memory key
//! let s = scores(q.view(), k.view(), &[0.5], &AlibiParams::default())?;
//! // Query 0 (distances 1, 0 and a hidden future key), then query 1 (distances 2, 1, 0).
//! assert_eq!(s.into_raw_vec_and_offset().0, vec![-0.5, 0.0, f64::NEG_INFINITY, -1.0, -0.5, 0.0]);
//! # Ok::<(), posconform::Error>(())
//! ```

use ndarray::{s, Array1, Array3, ArrayD, ArrayView3, ArrayViewMut2, Axis, Zip};

use crate::attention::{attend, masked_softmax, window_for, Scale, Window};
use crate::error::{expect_finite, expect_shape, Error, Result};
use crate::math::contract::R64;
use crate::math::{Contract, Stream};
use crate::scheme::model::{
    finite_or_zero, head_products, Inputs, PairPositions, Parameter, SchemeKind, SchemeModel,
};
use crate::shape::{InputSpec, Output, Shape};

/// The largest head count [`slopes`] accepts; far above any published model, and it
/// keeps the doubled block count of the non-power-of-two rule from overflowing.
pub const MAX_HEADS: usize = 1 << 16;

/// Positions beyond `±2^53` are not exactly representable in `f64`, so the bias of
/// distant tokens would silently round.
const MAX_EXACT_POSITION: i128 = 1 << 53;

/// The head slopes `m_0 > m_1 > …` for `heads` heads, by the rule of Press et al. 2022,
/// §3 (docs/conventions.md, "alibi").
///
/// For a power of two `n`, the geometric sequence `m_h = 2^(-8(h+1)/n)`. Otherwise, with
/// `c = 2^floor(log2 n)`: the `c` slopes for `c` heads, followed by the first `n - c`
/// of every other slope (`0, 2, 4, …`) for `2c` heads.
///
/// Errors: `heads == 0` or `heads >` [`MAX_HEADS`].
pub fn slopes(heads: usize) -> Result<Vec<f64>> {
    if heads == 0 || heads > MAX_HEADS {
        return Err(Error::param(
            "heads",
            format!("1 <= heads <= {MAX_HEADS}"),
            heads,
        ));
    }
    if heads.is_power_of_two() {
        return Ok(power_of_two_slopes(heads));
    }
    let block = 1usize << heads.ilog2();
    let mut out = power_of_two_slopes(block);
    out.extend(
        power_of_two_slopes(2 * block)
            .into_iter()
            .step_by(2)
            .take(heads - block),
    );
    Ok(out)
}

/// `2^(-8(h+1)/n)` as one `exp2` per slope rather than the running product
/// `start · ratio^h`, so no rounding accumulates along the heads.
fn power_of_two_slopes(n: usize) -> Vec<f64> {
    (1..=n)
        .map(|h| libm::exp2(-8.0 * h as f64 / n as f64))
        .collect()
}

/// How the linear bias is written; both give the same probabilities.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum BiasForm {
    /// `-m_h · (pos_i - pos_j)`, the paper's form: 0 on the diagonal, independent of `p0`.
    #[default]
    Distance,
    /// `m_h · pos_j`: the distance form shifted by `m_h · pos_i` along each row.
    KeyOnly,
}

/// Scalar parameters of ALiBi scoring.
#[derive(Debug, Clone, Copy, PartialEq, Default, serde::Serialize, serde::Deserialize)]
pub struct AlibiParams {
    /// Scale of `q·k` (never applied to the bias); defaults to `1/sqrt(d)`.
    pub scale: Scale,
    /// Which form of the bias to add.
    pub form: BiasForm,
    /// `p0`, the absolute position of query 0. Only [`BiasForm::KeyOnly`] depends on it.
    pub query_start: i64,
}

/// The bias alone, `[H, L, M+L]`: `bias[h,i,j]` for visible pairs, `-inf` elsewhere.
///
/// `slopes` gives one slope per head (`H = slopes.len()`).
///
/// Errors: no slopes, non-finite slopes, or positions `p0 - M .. p0 + L` beyond
/// `±2^53`.
pub fn bias(
    slopes: &[f64],
    window: Window,
    form: BiasForm,
    query_start: i64,
) -> Result<Array3<f64>> {
    if slopes.is_empty() {
        return Err(Error::param("slopes", "one slope per head, H >= 1", 0));
    }
    expect_finite("slopes", slopes)?;
    check_positions(window, query_start)?;
    let mut out = Array3::zeros((slopes.len(), window.query_len(), window.key_len()));
    for (head, &slope) in out.outer_iter_mut().zip(slopes) {
        add_bias_and_mask(head, window, slope, form, query_start);
    }
    Ok(out)
}

/// ALiBi scores `[H, L, M+L]`: `scale · q·k + bias` on visible pairs, `-inf` elsewhere.
///
/// Shapes (docs/conventions.md): `q[H, L, d]`, `k[H, M+L, d]`, `slopes[H]`.
///
/// Errors: shapes that disagree, non-finite inputs or scale, positions beyond `±2^53`.
pub fn scores(
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    slopes: &[f64],
    params: &AlibiParams,
) -> Result<Array3<f64>> {
    let window = check(q, k, slopes, params)?;
    let (heads, l, d) = q.dim();
    let factor = params.scale.factor(d);
    let mut out = Array3::zeros((heads, l, window.key_len()));
    Zip::from(out.outer_iter_mut())
        .and(q.outer_iter())
        .and(k.outer_iter())
        .and(slopes)
        .for_each(|mut head, qh, kh, &slope| {
            crate::math::product::gemm(factor, &qh, &kh.t(), 0.0, &mut head);
            add_bias_and_mask(head, window, slope, params.form, params.query_start);
        });
    Ok(out)
}

/// ALiBi attention: `(probabilities[H, L, M+L], outputs[H, L, d_v])`.
///
/// `v[H, M+L, d_v]` holds the values over the same keys as `k`. A fully masked row
/// cannot occur (every query sees itself), so every probability row sums to 1.
pub fn attention(
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    v: ArrayView3<'_, f64>,
    slopes: &[f64],
    params: &AlibiParams,
) -> Result<(Array3<f64>, Array3<f64>)> {
    let scores = scores(q, k, slopes, params)?;
    expect_values(v, q.len_of(Axis(0)), k.len_of(Axis(1)))?;
    let probs = masked_softmax(scores.view())?;
    let out = attend(probs.view(), v)?;
    Ok((probs, out))
}

/// Checks `v[H, M+L, d_v]` against the heads and key length, and that it is finite.
pub(crate) fn expect_values(v: ArrayView3<'_, f64>, heads: usize, key_len: usize) -> Result<()> {
    let (vh, vk, dv) = v.dim();
    expect_shape(
        "v",
        &["H", "M+L", "d_v"],
        &[heads, key_len, dv],
        &[vh, vk, dv],
    )?;
    expect_finite("v", v.iter())
}

fn check(
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    slopes: &[f64],
    params: &AlibiParams,
) -> Result<Window> {
    let window = window_for(q, k)?;
    expect_shape("slopes", &["H"], &[q.len_of(Axis(0))], &[slopes.len()])?;
    params.scale.validate()?;
    expect_finite("slopes", slopes)?;
    expect_finite("q", q.iter())?;
    expect_finite("k", k.iter())?;
    check_positions(window, params.query_start)?;
    Ok(window)
}

fn check_positions(window: Window, query_start: i64) -> Result<()> {
    let first = query_start as i128 - window.memory_len() as i128;
    let last = query_start as i128 + window.query_len() as i128 - 1;
    if first < -MAX_EXACT_POSITION || last > MAX_EXACT_POSITION {
        return Err(Error::param(
            "query_start",
            format!(
                "key and query positions p0-M..p0+L within ±2^53 (M = {}, L = {})",
                window.memory_len(),
                window.query_len()
            ),
            query_start,
        ));
    }
    Ok(())
}

/// Adds the bias of one head to its `[L, M+L]` scores and masks the hidden keys, in
/// one pass over each row.
///
/// The bias is tabulated once per head over the key axis and each row adds a slice of
/// that table: `-slope·δ` is rounded once per distance rather than per pair, and the
/// pass stays as cheap as the mask alone.
fn add_bias_and_mask(
    mut scores: ArrayViewMut2<'_, f64>,
    window: Window,
    slope: f64,
    form: BiasForm,
    query_start: i64,
) {
    let (l, key_len, m) = (window.query_len(), window.key_len(), window.memory_len());
    // Distance form: table[c] is the bias at distance K-1-c (descending), so query i,
    // whose distances over keys 0..=M+i run M+i down to 0, reads table[L-1-i..].
    // Key-only form: table[j] = slope·pos_j, and every row reads table[..].
    let table: Vec<f64> = match form {
        BiasForm::Distance => (0..key_len)
            .map(|c| -slope * (key_len - 1 - c) as f64)
            .collect(),
        BiasForm::KeyOnly => (0..key_len)
            .map(|j| slope * (query_start - m as i64 + j as i64) as f64)
            .collect(),
    };
    for (i, mut row) in scores.outer_iter_mut().enumerate() {
        let visible = m + i + 1;
        let start = match form {
            BiasForm::Distance => l - 1 - i,
            BiasForm::KeyOnly => 0,
        };
        Zip::from(row.slice_mut(s![..visible]))
            .and(&table[start..start + visible])
            .for_each(|x, &b| *x += b);
        row.slice_mut(s![visible..]).fill(f64::NEG_INFINITY);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn zero_heads_is_an_error_naming_the_parameter() {
        let err = slopes(0).unwrap_err().to_string();
        assert!(err.contains("`heads`") && err.contains("given 0"), "{err}");
    }

    #[test]
    fn slope_count_must_match_heads() {
        let q = Array3::zeros((2, 1, 2));
        let k = Array3::zeros((2, 1, 2));
        let err = scores(q.view(), k.view(), &[0.5], &AlibiParams::default()).unwrap_err();
        assert!(err.to_string().contains("`slopes`"), "{err}");
    }

    #[test]
    fn non_finite_inputs_are_errors() {
        let mut q = Array3::zeros((1, 1, 2));
        let k = Array3::zeros((1, 1, 2));
        let params = AlibiParams::default();
        assert!(scores(q.view(), k.view(), &[f64::NAN], &params).is_err());
        q[[0, 0, 1]] = f64::INFINITY;
        let err = scores(q.view(), k.view(), &[0.5], &params).unwrap_err();
        assert!(err.to_string().contains("`q`"), "{err}");
        let v = Array3::from_elem((1, 1, 2), f64::NAN);
        let q = Array3::zeros((1, 1, 2));
        let err = attention(q.view(), k.view(), v.view(), &[0.5], &params).unwrap_err();
        assert!(err.to_string().contains("`v`"), "{err}");
    }

    #[test]
    fn positions_beyond_f64_exactness_are_errors() {
        let q = Array3::zeros((1, 1, 2));
        let k = Array3::zeros((1, 1, 2));
        let params = AlibiParams {
            query_start: i64::MAX,
            ..AlibiParams::default()
        };
        let err = scores(q.view(), k.view(), &[0.5], &params).unwrap_err();
        assert!(err.to_string().contains("`query_start`"), "{err}");
    }
}

// ---------------------------------------------------------------------------------
// The scheme in cases: parameters, arrays, reference, bounds, random parameters.

/// An ALiBi case's parameters (`{"name": "alibi", "scale": …}`): the distance form of
/// the bias with the published slopes for the case's head count.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct AlibiSpec {
    /// Scale of `q·k` (never of the bias).
    pub scale: Scale,
}

impl SchemeModel for AlibiSpec {
    fn scale(&self) -> Scale {
        self.scale
    }

    fn validate(&self, shape: &Shape<'_>) -> Result<()> {
        self.scale.validate()?;
        slopes(shape.heads).map(drop)
    }

    fn encode_inputs(&self, _shape: &Shape<'_>) -> Vec<InputSpec> {
        Vec::new()
    }

    fn encode_output(&self, shape: &Shape<'_>) -> (Output, Vec<usize>) {
        (Output::Slopes, vec![shape.heads])
    }

    fn encode(&self, shape: &Shape<'_>, _inputs: &Inputs<'_, '_>) -> Result<ArrayD<f64>> {
        Ok(Array1::from(slopes(shape.heads)?).into_dyn())
    }

    fn window_scores(
        &self,
        shape: &Shape<'_>,
        _inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
    ) -> Result<Array3<f64>> {
        let params = AlibiParams {
            scale: self.scale,
            form: BiasForm::Distance,
            query_start: p0,
        };
        scores(q, k, &slopes(shape.heads)?, &params)
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
        let slopes = slopes(shape.heads)?;
        let mut out = head_products(&q.to_owned(), &k.to_owned(), scale.factor(shape.head_dim));
        for ((h, i, j), s) in out.indexed_iter_mut() {
            *s -= slopes[h] * positions.distance(i, j) as f64;
        }
        Ok(out)
    }

    fn score_terms(
        &self,
        shape: &Shape<'_>,
        _inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
        contract: &Contract,
    ) -> Result<Array3<f64>> {
        let d = shape.head_dim;
        let factor = self.scale.factor(d).abs();
        let gamma = contract.dot_gamma(d);
        let window = window_for(q, k)?;
        let bias = bias(&slopes(shape.heads)?, window, BiasForm::Distance, p0)?;
        let (qa, ka) = (q.mapv(f64::abs), k.mapv(f64::abs));
        // The slope formed at the angle precision, the product m·Δ and the bias stored
        // in the dtype.
        Ok(
            head_products(&qa, &ka, factor) * (gamma + contract.storage + 2.0 * contract.input)
                + bias.mapv(|b| finite_or_zero(b).abs())
                    * (contract.angle + contract.storage + R64),
        )
    }

    fn encode_bounds(
        &self,
        _shape: &Shape<'_>,
        _inputs: &Inputs<'_, '_>,
        values: &ArrayD<f64>,
        contract: &Contract,
    ) -> Result<ArrayD<f64>> {
        // Slopes formed at the angle precision and stored in the dtype.
        Ok(values.mapv(|m| (contract.angle + contract.storage + R64) * m.abs() + contract.floor))
    }
}

impl SchemeKind for AlibiSpec {
    const SOURCE: &'static str = "Press, Smith, Lewis 2022, Train Short, Test Long (ALiBi), §3";

    const PARAMETERS: &'static [Parameter] = &[Parameter::SCALE];

    const MAX_RANDOM_HEADS: usize = 12;

    fn random(stream: &mut Stream, _shape: &Shape<'_>) -> Self {
        AlibiSpec {
            // A fixed scale one case in three: the scale multiplies q·k only, never the
            // bias, which only a scale other than 1/√d of an unscaled kernel shows.
            scale: if stream.below(3) == 0 {
                Scale::Fixed(0.25)
            } else {
                Scale::InverseSqrtDim
            },
        }
    }
}
