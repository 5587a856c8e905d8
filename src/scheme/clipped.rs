//! Clipped relative position representations (Shaw, Uszkoreit, Vaswani 2018,
//! "Self-Attention with Relative Position Representations", eqs. 3–5).
//!
//! Convention (docs/conventions.md, "clipped"; layout and positions as in
//! [`crate::attention`]): query `i` sits at `p0 + i`, key `j` at `p0 - M + j`, so the
//! paper's `j - i` is `pos_key - pos_query = -(M + i - j)`, which does not depend on
//! `p0`. With clip distance `k` and embedding tables `w^K[2k+1, d]`, `w^V[2k+1, d_v]`:
//!
//! ```text
//! a_ij = w[clip(j - i, -k, k) + k]                       (eqs. 3, 4)
//! e_ij = scale · q_i·(k_j + a^K_ij)                      (eq. 5; scale = 1/sqrt(d))
//! z_i  = Σ_j α_ij (v_j + a^V_ij),  α = softmax_j(e)      (eq. 3)
//! ```
//!
//! over visible keys (`j <= M + i`); hidden scores are `-inf`. Under the causal mask
//! only rows `0..=k` of each table (keys at or before the query) are ever read.
//!
//! Tables are passed as `[G, 2k+1, width]` with `G = 1` — one table shared by every
//! head, as the paper does (§3.3) — or `G = H`, one per head, as some implementations
//! do.
//!
//! # Example
//!
//! ```
//! use ndarray::Array3;
//! use posconform::clipped::{embedding_index, scores, ClippedParams};
//! use posconform::Scale;
//!
//! assert_eq!(embedding_index(-20, 16), 0); // clipped
//! assert_eq!(embedding_index(-3, 16), 13);
//!
//! // One head, d = 1, q = 1, k = 0: the score is the key embedding alone.
//! let q = Array3::from_elem((1, 1, 1), 1.0);
//! let k = Array3::zeros((1, 3, 1)); // M = 2 memory keys
//! let w_key = Array3::from_shape_vec((1, 3, 1), vec![10.0, 20.0, 30.0])?; // k = 1
//! let params = ClippedParams { clip_distance: 1, scale: Scale::Fixed(1.0) };
//! let s = scores(q.view(), k.view(), w_key.view(), &params)?;
//! // Distances 2, 1, 0: rows clip(-2)+1 = 0, clip(-1)+1 = 0, 0+1 = 1.
//! assert_eq!(s.into_raw_vec_and_offset().0, vec![10.0, 10.0, 20.0]);
//! # Ok::<(), Box<dyn std::error::Error>>(())
//! ```

use ndarray::{s, Array1, Array2, Array3, ArrayD, ArrayView2, ArrayView3, Axis};

use crate::attention::{masked_softmax, window_for, Scale, Window};
use crate::error::{expect_finite, expect_shape, Error, Result};
use crate::math::{Contract, Stream};
use crate::scheme::alibi::expect_values;
use crate::scheme::model::{
    finite_or_zero, head_products, range, Inputs, PairPositions, Parameter, ParameterKind,
    SchemeKind, SchemeModel,
};
use crate::shape::{InputSpec, Output, Shape};

/// Parameters of clipped relative scoring.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ClippedParams {
    /// `k`: relative positions beyond `±k` share the outermost embedding.
    pub clip_distance: usize,
    /// Score scale; the paper uses `1/sqrt(d)` ([`Scale::InverseSqrtDim`]).
    pub scale: Scale,
}

/// `clip(relative_position, -k, k) + k`: the row of `w^K` and `w^V` used for
/// `relative_position = pos_key - pos_query` (the paper's `j - i`), eq. 3–4.
pub fn embedding_index(relative_position: i64, clip_distance: usize) -> usize {
    let k = clip_distance as i128;
    ((relative_position as i128).clamp(-k, k) + k) as usize
}

/// Clipped relative scores `[H, L, M+L]`: `e_ij` on visible pairs, `-inf` elsewhere.
///
/// Shapes (docs/conventions.md): `q[H, L, d]`, `k[H, M+L, d]`, `w_key[G, 2k+1, d]` with `G` 1
/// (shared) or `H` (per head).
///
/// Errors: shapes that disagree, `2k+1` overflowing, non-finite inputs or scale.
pub fn scores(
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    w_key: ArrayView3<'_, f64>,
    params: &ClippedParams,
) -> Result<Array3<f64>> {
    let window = check_scores(q, k, w_key, params)?;
    Ok(scores_checked(q, k, w_key, params, window))
}

/// Clipped relative attention: `(probabilities[H, L, M+L], outputs[H, L, d_v])`, eq. 3.
///
/// `v[H, M+L, d_v]` and `w_value[G, 2k+1, d_v]` (`G` 1 or `H`, independently of
/// `w_key`).
pub fn attention(
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    v: ArrayView3<'_, f64>,
    w_key: ArrayView3<'_, f64>,
    w_value: ArrayView3<'_, f64>,
    params: &ClippedParams,
) -> Result<(Array3<f64>, Array3<f64>)> {
    let window = check_scores(q, k, w_key, params)?;
    let heads = q.len_of(Axis(0));
    expect_values(v, heads, window.key_len())?;
    let value_dim = v.len_of(Axis(2));
    check_table("w_value", w_value, heads, params.clip_distance, value_dim)?;
    let scores = scores_checked(q, k, w_key, params, window);
    let probs = masked_softmax(scores.view())?;
    let mut out = Array3::zeros((heads, window.query_len(), value_dim));
    let clip = params.clip_distance;
    for (h, mut out_h) in out.outer_iter_mut().enumerate() {
        let p = probs.index_axis(Axis(0), h);
        crate::math::product::gemm(1.0, &p, &v.index_axis(Axis(0), h), 0.0, &mut out_h);
        // Σ_j α_ij a^V_ij = Σ_r (mass of row r) · w^V[r]: many keys share a clipped row.
        let mass = mass_per_embedding(p, window, clip);
        let table = w_value.index_axis(Axis(0), if w_value.dim().0 == 1 { 0 } else { h });
        crate::math::product::gemm(1.0, &mass, &table, 1.0, &mut out_h);
    }
    Ok((probs, out))
}

/// The `2k+1` rows of one table, computed without overflow.
fn table_rows(clip_distance: usize) -> Result<usize> {
    clip_distance
        .checked_mul(2)
        .and_then(|x| x.checked_add(1))
        .ok_or_else(|| Error::param("clip_distance", "2k+1 representable", clip_distance))
}

fn check_table(
    name: &'static str,
    table: ArrayView3<'_, f64>,
    heads: usize,
    clip_distance: usize,
    width: usize,
) -> Result<()> {
    let rows = table_rows(clip_distance)?;
    let (g, r, w) = table.dim();
    let groups = if g == 1 { 1 } else { heads };
    expect_shape(
        name,
        &["G (1 or H)", "2k+1", "width"],
        &[groups, rows, width],
        &[g, r, w],
    )?;
    expect_finite(name, table.iter())
}

fn check_scores(
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    w_key: ArrayView3<'_, f64>,
    params: &ClippedParams,
) -> Result<Window> {
    let window = window_for(q, k)?;
    let (heads, _, d) = q.dim();
    check_table("w_key", w_key, heads, params.clip_distance, d)?;
    params.scale.validate()?;
    expect_finite("q", q.iter())?;
    expect_finite("k", k.iter())?;
    Ok(window)
}

/// The keys of query `i` whose relative position `-(M+i-j)` is inside the clip
/// window: `near_start..=M+i`. Keys before `near_start` all use row 0.
fn near_start(window: Window, query: usize, clip: usize) -> usize {
    (window.memory_len() + query).saturating_sub(clip)
}

fn scores_checked(
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    w_key: ArrayView3<'_, f64>,
    params: &ClippedParams,
    window: Window,
) -> Array3<f64> {
    let (heads, l, d) = q.dim();
    let factor = params.scale.factor(d);
    let clip = params.clip_distance;
    let mut out = Array3::zeros((heads, l, window.key_len()));
    let mut q_dot_table = Array2::zeros((l, 2 * clip + 1));
    for (h, mut out_h) in out.outer_iter_mut().enumerate() {
        let qh = q.index_axis(Axis(0), h);
        let table = w_key.index_axis(Axis(0), if w_key.dim().0 == 1 { 0 } else { h });
        crate::math::product::gemm(factor, &qh, &k.index_axis(Axis(0), h).t(), 0.0, &mut out_h);
        // q_i·a^K_ij takes only 2k+1 values per query: one product with the table.
        crate::math::product::gemm(factor, &qh, &table.t(), 0.0, &mut q_dot_table);
        for (i, mut row) in out_h.outer_iter_mut().enumerate() {
            let visible = window.memory_len() + i + 1;
            let near = near_start(window, i, clip);
            let far_bias = q_dot_table[[i, 0]];
            row.slice_mut(s![..near]).mapv_inplace(|x| x + far_bias);
            // Keys near..visible have relative positions -(visible-1-near)..=0, rows
            // k-(visible-1-near)..=k.
            let first_row = clip - (visible - 1 - near);
            row.slice_mut(s![near..visible])
                .zip_mut_with(&q_dot_table.slice(s![i, first_row..=clip]), |x, &b| *x += b);
            row.slice_mut(s![visible..]).fill(f64::NEG_INFINITY);
        }
    }
    out
}

/// `mass[i, r] = Σ_{j : row(i,j) = r} probs[i, j]`, shape `[L, 2k+1]`.
fn mass_per_embedding(probs: ArrayView2<'_, f64>, window: Window, clip: usize) -> Array2<f64> {
    let mut mass = Array2::zeros((window.query_len(), 2 * clip + 1));
    for (i, p) in probs.outer_iter().enumerate() {
        let visible = window.memory_len() + i + 1;
        let near = near_start(window, i, clip);
        mass[[i, 0]] = p.slice(s![..near]).sum();
        let first_row = clip - (visible - 1 - near);
        mass.slice_mut(s![i, first_row..=clip])
            .zip_mut_with(&p.slice(s![near..visible]), |m, &x| *m += x);
    }
    mass
}

#[cfg(test)]
mod tests {
    use super::*;

    fn params(clip_distance: usize) -> ClippedParams {
        ClippedParams {
            clip_distance,
            scale: Scale::InverseSqrtDim,
        }
    }

    #[test]
    fn table_with_wrong_row_count_names_the_table() {
        let q = Array3::zeros((2, 1, 3));
        let k = Array3::zeros((2, 1, 3));
        let w = Array3::zeros((1, 4, 3));
        let err = scores(q.view(), k.view(), w.view(), &params(2)).unwrap_err();
        let message = err.to_string();
        assert!(
            message.contains("`w_key`") && message.contains("= [1, 5, 3]"),
            "{message}"
        );
    }

    #[test]
    fn per_head_tables_must_match_the_head_count() {
        let q = Array3::zeros((2, 1, 3));
        let k = Array3::zeros((2, 1, 3));
        let w = Array3::zeros((3, 5, 3));
        assert!(scores(q.view(), k.view(), w.view(), &params(2)).is_err());
        let w = Array3::zeros((2, 5, 3));
        assert!(scores(q.view(), k.view(), w.view(), &params(2)).is_ok());
    }

    #[test]
    fn huge_clip_distance_is_an_error_not_an_overflow() {
        let q = Array3::zeros((1, 1, 1));
        let k = Array3::zeros((1, 1, 1));
        let w = Array3::zeros((1, 1, 1));
        let err = scores(q.view(), k.view(), w.view(), &params(usize::MAX)).unwrap_err();
        assert!(err.to_string().contains("`clip_distance`"), "{err}");
    }

    #[test]
    fn non_finite_value_table_is_an_error() {
        let q = Array3::zeros((1, 1, 1));
        let k = Array3::zeros((1, 1, 1));
        let v = Array3::zeros((1, 1, 2));
        let w_key = Array3::zeros((1, 3, 1));
        let w_value = Array3::from_elem((1, 3, 2), f64::NAN);
        let err = attention(
            q.view(),
            k.view(),
            v.view(),
            w_key.view(),
            w_value.view(),
            &params(1),
        )
        .unwrap_err();
        assert!(err.to_string().contains("`w_value`"), "{err}");
    }
}

// ---------------------------------------------------------------------------------
// The scheme in cases: parameters, arrays, reference, bounds, random parameters.

/// A clipped case's parameters (`{"name": "clipped", "clip_distance": …, "scale": …}`);
/// the embedding tables `w_key`, `w_value[H, 2k+1, d]` are inputs.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ClippedSpec {
    /// `k`, the clip distance.
    pub clip_distance: usize,
    /// Score scale.
    pub scale: Scale,
}

/// The largest clip distance a case may ask for (keeps `2k+1` rows sane).
const MAX_CLIP: usize = 1 << 20;

impl ClippedSpec {
    fn params(&self) -> ClippedParams {
        ClippedParams {
            clip_distance: self.clip_distance,
            scale: self.scale,
        }
    }

    /// How far the relative positions of `encode` reach on each side of 0: past the
    /// clip on both sides, or the key length if longer (saturating).
    fn reach(&self, shape: &Shape<'_>) -> u64 {
        let sat = |x: usize| u64::try_from(x).unwrap_or(u64::MAX);
        sat(self.clip_distance)
            .saturating_mul(2)
            .saturating_add(2)
            .max(sat(shape.key_len()))
    }
}

impl SchemeModel for ClippedSpec {
    fn scale(&self) -> Scale {
        self.scale
    }

    fn per_head_inputs(&self) -> Option<&'static [&'static str]> {
        Some(&["w_key", "w_value"])
    }

    fn validate(&self, _shape: &Shape<'_>) -> Result<()> {
        self.scale.validate()?;
        if self.clip_distance > MAX_CLIP {
            return Err(Error::param(
                "scheme.clip_distance",
                "<= 2^20",
                self.clip_distance,
            ));
        }
        Ok(())
    }

    fn encode_inputs(&self, shape: &Shape<'_>) -> Vec<InputSpec> {
        vec![InputSpec::relative_positions(self.reach(shape))]
    }

    fn window_inputs(&self, shape: &Shape<'_>) -> Vec<InputSpec> {
        let rows = 2 * self.clip_distance + 1;
        vec![
            InputSpec::uniform("w_key", vec![shape.heads, rows, shape.head_dim], 0.5),
            InputSpec::uniform("w_value", vec![shape.heads, rows, shape.head_dim], 0.5),
        ]
    }

    fn encode_output(&self, shape: &Shape<'_>) -> (Output, Vec<usize>) {
        let len = InputSpec::relative_positions(self.reach(shape)).shape;
        (Output::Indices, len)
    }

    fn encode(&self, _shape: &Shape<'_>, inputs: &Inputs<'_, '_>) -> Result<ArrayD<f64>> {
        let relative = inputs.positions("relative_positions")?;
        Ok(Array1::from_iter(
            relative
                .iter()
                .map(|&r| embedding_index(r, self.clip_distance) as f64),
        )
        .into_dyn())
    }

    fn window_scores(
        &self,
        _shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        _p0: i64,
    ) -> Result<Array3<f64>> {
        scores(q, k, inputs.get3("w_key")?, &self.params())
    }

    fn pair_scores(
        &self,
        shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        positions: &PairPositions,
        scale: Scale,
    ) -> Result<Array3<f64>> {
        positions.check(q, k)?;
        let w_key = inputs.get3("w_key")?;
        check_table(
            "w_key",
            w_key,
            shape.heads,
            self.clip_distance,
            shape.head_dim,
        )?;
        let factor = scale.factor(shape.head_dim);
        let mut out = head_products(&q.to_owned(), &k.to_owned(), factor);
        for (h, mut out_h) in out.outer_iter_mut().enumerate() {
            let table = w_key.index_axis(Axis(0), if w_key.dim().0 == 1 { 0 } else { h });
            let q_dot_table = crate::math::product::matmul(&q.index_axis(Axis(0), h), &table.t());
            for ((i, j), s) in out_h.indexed_iter_mut() {
                let row = embedding_index(-positions.distance(i, j), self.clip_distance);
                *s += factor * q_dot_table[[i, row]];
            }
        }
        Ok(out)
    }

    fn add_value_terms(
        &self,
        inputs: &Inputs<'_, '_>,
        probs: &Array3<f64>,
        out: &mut Array3<f64>,
        positions: &PairPositions,
        absolute: bool,
    ) -> Result<()> {
        let w_value = inputs.get3("w_value")?;
        let w_value = if absolute {
            w_value.mapv(f64::abs)
        } else {
            w_value.to_owned()
        };
        for ((h, i, j), &p) in probs.indexed_iter() {
            if p != 0.0 {
                let relative = -positions.distance(i, j);
                let row = embedding_index(relative, self.clip_distance);
                let mut o = out.slice_mut(s![h, i, ..]);
                o.scaled_add(p, &w_value.slice(s![h, row, ..]));
            }
        }
        Ok(())
    }

    fn score_terms(
        &self,
        shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        _p0: i64,
        contract: &Contract,
    ) -> Result<Array3<f64>> {
        let d = shape.head_dim;
        let factor = self.scale.factor(d).abs();
        let gamma = contract.dot_gamma(d);
        let w = inputs.get3("w_key")?.mapv(f64::abs);
        let params = ClippedParams {
            clip_distance: self.clip_distance,
            scale: Scale::Fixed(factor),
        };
        let (qa, ka) = (q.mapv(f64::abs), k.mapv(f64::abs));
        let mut magnitude = scores(qa.view(), ka.view(), w.view(), &params)?;
        magnitude.mapv_inplace(finite_or_zero);
        Ok(magnitude * (gamma + contract.storage + 2.0 * contract.input))
    }

    fn encode_bounds(
        &self,
        _shape: &Shape<'_>,
        _inputs: &Inputs<'_, '_>,
        values: &ArrayD<f64>,
        _contract: &Contract,
    ) -> Result<ArrayD<f64>> {
        Ok(ArrayD::zeros(values.raw_dim()))
    }
}

impl SchemeKind for ClippedSpec {
    const SOURCE: &'static str = "Shaw, Uszkoreit, Vaswani 2018, eqs. 3-5";

    const PARAMETERS: &'static [Parameter] = &[
        Parameter::new("clip_distance", ParameterKind::Number),
        Parameter::SCALE,
    ];

    fn random(stream: &mut Stream, _shape: &Shape<'_>) -> Self {
        ClippedSpec {
            clip_distance: range(stream, 1, 8),
            scale: if stream.below(3) == 0 {
                Scale::Fixed(0.25)
            } else {
                Scale::InverseSqrtDim
            },
        }
    }
}
