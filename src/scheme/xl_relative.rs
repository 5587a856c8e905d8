//! Transformer-XL relative scoring (Dai et al. 2019, "Transformer-XL: Attentive
//! Language Models Beyond a Fixed-Length Context", §3.3; recurrence in §3.2).
//!
//! Convention (docs/conventions.md, "xl_relative"): for a visible pair `(i, j)` with `Δ = M + i - j >= 0`,
//!
//! ```text
//! S[h,i,j] = scale · ( (q[h,i] + u[h])·k[h,j]  +  (q[h,i] + v[h])·r[h,Δ] )
//!          = scale · ( a: q·k  +  b: q·r  +  c: u·k  +  d: v·r )
//! ```
//!
//! `r[h, δ] = W_{k,R} R_δ` is the projected relative embedding of distance `δ`
//! ([`relative_embeddings`] builds it from sinusoids; a learned table may be passed
//! instead). With a clamp length `c`, distance `δ` uses `r[min(δ, c)]`, as the authors'
//! code clamps its position sequence. Hidden entries are `-inf` in the scores.
//!
//! Two forms compute the same visible entries:
//! - [`scores_naive`] indexes `r[Δ]` per pair: readable, O(L·(M+L)·d) with gathers;
//! - [`scores`] is the efficient form: two matrix products per head,
//!   `AC = (q+u)·kᵀ` and `BD[i,c] = (q_i+v)·r[K-1-c]` over the *descending* relative
//!   sequence, then the relative shift ([`rel_shift`]) applied as an index remap,
//!   fused with the mask so no shifted copy of `BD` is ever built.

use ndarray::{s, Array2, Array3, ArrayD, ArrayView1, ArrayView2, ArrayView3, Axis, Zip};

use crate::attention::{expect_per_head, window_for, Scale, Window};
use crate::error::{expect_finite, expect_shape, Error, Result};
use crate::math::contract::{gamma_of, R64};
use crate::math::product::{gemm, gemm_packed, matmul, pack_columns};
use crate::math::{Contract, Stream};
use crate::scheme::model::{
    finite_or_zero, range, Inputs, PairPositions, Parameter, ParameterKind, SchemeKind, SchemeModel,
};
use crate::scheme::sinusoidal::{self, Sinusoid, SinusoidLayout};
use crate::scheme::SchemeSpec;
use crate::shape::{InputSpec, Operation, Output, Shape};

/// The inputs of one relative-attention scoring step for all heads.
///
/// Shapes (docs/conventions.md): `q[H, L, d]`, `k[H, M+L, d]`, `r[H, R, d]` holding `r[h, δ]`
/// for `δ = 0..R` with `R >= M+L` (or `R >= c+1` under a clamp length `c`),
/// `u[H, d]`, `v[H, d]`. `M` is read off the shapes: `M = k.len_of(1) - L`.
#[derive(Debug, Clone, Copy)]
pub struct RelativeInputs<'a> {
    /// Queries of the current segment.
    pub q: ArrayView3<'a, f64>,
    /// Keys over `[memory ; current]`, memory first, oldest first.
    pub k: ArrayView3<'a, f64>,
    /// Projected relative embeddings, indexed by distance.
    pub r: ArrayView3<'a, f64>,
    /// Global content bias (term c).
    pub u: ArrayView2<'a, f64>,
    /// Global position bias (term d).
    pub v: ArrayView2<'a, f64>,
}

/// Scalar parameters of relative scoring.
#[derive(Debug, Clone, Copy, PartialEq, Default, serde::Serialize, serde::Deserialize)]
pub struct RelativeParams {
    /// Score scale; defaults to `1/sqrt(d)`.
    pub scale: Scale,
    /// Distances above this use `r[clamp_len]`.
    pub clamp_len: Option<usize>,
}

/// The four terms of the relative score, unscaled, each `[H, L, M+L]`.
///
/// Entries a query may not see are 0 in every term (terms b and d are undefined there:
/// the distance is negative).
#[derive(Debug, Clone, PartialEq)]
pub struct RelativeTerms {
    /// (a) content: `q[h,i]·k[h,j]`.
    pub content: Array3<f64>,
    /// (b) content-position: `q[h,i]·r[h,Δ]`.
    pub content_position: Array3<f64>,
    /// (c) global content bias: `u[h]·k[h,j]`.
    pub global_content: Array3<f64>,
    /// (d) global position bias: `v[h]·r[h,Δ]`.
    pub global_position: Array3<f64>,
}

impl RelativeTerms {
    /// `scale · (a + b + c + d)` on visible entries, `-inf` elsewhere.
    pub fn scaled_sum(&self, scale: f64, window: Window) -> Array3<f64> {
        let mut out = &self.content + &self.content_position;
        out += &self.global_content;
        out += &self.global_position;
        out *= scale;
        for mut head in out.outer_iter_mut() {
            for (i, mut row) in head.outer_iter_mut().enumerate() {
                row.slice_mut(s![window.visible_keys(i).end..])
                    .fill(f64::NEG_INFINITY);
            }
        }
        out
    }
}

/// Shapes, window and the number of relative rows each distance needs.
struct Checked {
    window: Window,
    heads: usize,
    head_dim: usize,
    scale: f64,
}

fn check(inputs: &RelativeInputs<'_>, params: &RelativeParams) -> Result<Checked> {
    let checked = check_common(inputs, params)?;
    let needed = rows_needed(checked.window.key_len(), params.clamp_len);
    if inputs.r.len_of(Axis(1)) < needed {
        return Err(Error::shape(
            "r",
            format!(
                "[H, R, d] with R >= {needed} (one row per distance 0..{})",
                needed - 1
            ),
            inputs.r.shape(),
        ));
    }
    Ok(checked)
}

/// Rows of `r` that distances `0..key_len` touch under an optional clamp.
fn rows_needed(key_len: usize, clamp_len: Option<usize>) -> usize {
    match clamp_len {
        Some(c) => key_len.min(c + 1),
        None => key_len,
    }
}

fn clamp(delta: usize, clamp_len: Option<usize>) -> usize {
    clamp_len.map_or(delta, |c| delta.min(c))
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// Naive per-pair relative scores with explicit absolute positions.
///
/// Query `i` sits at `query_positions[i]`, key `j` at `key_positions[j]`; the
/// distance is `Δ = query_positions[i] - key_positions[j]`, the key is visible iff
/// `Δ >= 0`, and `r[min(Δ, clamp)]` is used. With the positions of docs/conventions.md
/// (`p0 + i`, `p0 - M + j`) this equals [`scores_naive`] for every `p0`.
pub fn scores_at_positions(
    inputs: &RelativeInputs<'_>,
    params: &RelativeParams,
    query_positions: &[i64],
    key_positions: &[i64],
) -> Result<Array3<f64>> {
    let window = window_for(inputs.q, inputs.k)?;
    expect_shape(
        "query_positions",
        &["L"],
        &[window.query_len()],
        &[query_positions.len()],
    )?;
    expect_shape(
        "key_positions",
        &["M+L"],
        &[window.key_len()],
        &[key_positions.len()],
    )?;
    let max_distance = query_positions
        .iter()
        .flat_map(|qp| key_positions.iter().map(move |kp| qp.saturating_sub(*kp)))
        .max()
        .unwrap_or(0)
        .max(0) as u64;
    // Rows needed by the largest visible distance (clamped).
    let needed = match params.clamp_len {
        Some(c) => max_distance.min(c as u64) + 1,
        None => max_distance + 1,
    };
    if needed > inputs.r.len_of(Axis(1)) as u64 {
        return Err(Error::shape(
            "r",
            format!("[H, R, d] with R >= {needed} for the largest visible distance"),
            inputs.r.shape(),
        ));
    }
    let Checked {
        heads,
        head_dim,
        scale,
        ..
    } = check_common(inputs, params)?;
    let key_len = window.key_len();
    // Standard layout makes every row a plain slice (a copy only if the caller's views
    // are strided).
    let k = inputs.k.as_standard_layout();
    let r = inputs.r.as_standard_layout();
    let mut out = Array3::from_elem((heads, window.query_len(), key_len), f64::NEG_INFINITY);
    let mut qu = vec![0.0; head_dim];
    let mut qv = vec![0.0; head_dim];
    for h in 0..heads {
        let u = inputs.u.row(h);
        let v = inputs.v.row(h);
        for (i, &qp) in query_positions.iter().enumerate() {
            for c in 0..head_dim {
                let q = inputs.q[[h, i, c]];
                qu[c] = q + u[c];
                qv[c] = q + v[c];
            }
            for (j, &kp) in key_positions.iter().enumerate() {
                let delta = qp.saturating_sub(kp);
                if delta < 0 {
                    continue;
                }
                let rel = clamp(delta as usize, params.clamp_len);
                let key = k.slice(s![h, j, ..]);
                let rel = r.slice(s![h, rel, ..]);
                let content = dot(&qu, key.as_slice().expect("standard layout"));
                let position = dot(&qv, rel.as_slice().expect("standard layout"));
                out[[h, i, j]] = scale * (content + position);
            }
        }
    }
    Ok(out)
}

/// Validation shared by every entry point, without the row-count rule (positions are
/// arbitrary in [`scores_at_positions`], so it counts rows itself).
fn check_common(inputs: &RelativeInputs<'_>, params: &RelativeParams) -> Result<Checked> {
    let window = window_for(inputs.q, inputs.k)?;
    let (heads, _, head_dim) = inputs.q.dim();
    let (rh, rr, rd) = inputs.r.dim();
    expect_shape("r", &["H", "R", "d"], &[heads, rr, head_dim], &[rh, rr, rd])?;
    expect_per_head("u", inputs.u, heads, head_dim)?;
    expect_per_head("v", inputs.v, heads, head_dim)?;
    params.scale.validate()?;
    expect_finite("q", inputs.q.iter())?;
    expect_finite("k", inputs.k.iter())?;
    expect_finite("r", inputs.r.iter())?;
    expect_finite("u", inputs.u.iter())?;
    expect_finite("v", inputs.v.iter())?;
    Ok(Checked {
        window,
        heads,
        head_dim,
        scale: params.scale.factor(head_dim),
    })
}

/// The naive per-pair form: `S[h,i,j]` by direct indexing of `r[Δ(i,j)]`.
pub fn scores_naive(inputs: &RelativeInputs<'_>, params: &RelativeParams) -> Result<Array3<f64>> {
    let window = check(inputs, params)?.window;
    let (queries, keys) = standard_positions(window, 0);
    scores_at_positions(inputs, params, &queries, &keys)
}

/// Absolute positions of docs/conventions.md: queries `p0 + i`, keys `p0 - M + j`.
pub fn standard_positions(window: Window, query_start: i64) -> (Vec<i64>, Vec<i64>) {
    let m = window.memory_len() as i64;
    let queries = (0..window.query_len() as i64)
        .map(|i| query_start + i)
        .collect();
    let keys = (0..window.key_len() as i64)
        .map(|j| query_start - m + j)
        .collect();
    (queries, keys)
}

/// `r_desc[c] = r[min(K-1-c, clamp)]` for `c = 0..K`: the descending relative sequence.
fn descending(r: ArrayView2<'_, f64>, key_len: usize, clamp_len: Option<usize>) -> Array2<f64> {
    let mut out = Array2::zeros((key_len, r.ncols()));
    for (c, mut row) in out.outer_iter_mut().enumerate() {
        row.assign(&r.row(clamp(key_len - 1 - c, clamp_len)));
    }
    out
}

/// `(q + bias)` for one head: `[L, d]`.
fn add_bias(q: ArrayView2<'_, f64>, bias: ArrayView1<'_, f64>) -> Array2<f64> {
    &q + &bias
}

/// The efficient form: two matrix products per head and the relative shift as an
/// index remap, fused with the causal mask.
///
/// Visible entries equal [`scores_naive`] up to floating-point summation order;
/// hidden entries are `-inf`.
pub fn scores(inputs: &RelativeInputs<'_>, params: &RelativeParams) -> Result<Array3<f64>> {
    let checked = check(inputs, params)?;
    let window = checked.window;
    // Zeroed allocation maps pages lazily; every entry is then written exactly once.
    let mut out = Array3::zeros((checked.heads, window.query_len(), window.key_len()));
    fill_scores(inputs, params, &checked, &mut out);
    Ok(out)
}

/// [`scores`] written into `out` (`[H, L, M+L]`), so repeated calls reuse one buffer
/// instead of faulting in a fresh one each time. Every entry of `out` is overwritten.
pub fn scores_into(
    inputs: &RelativeInputs<'_>,
    params: &RelativeParams,
    out: &mut Array3<f64>,
) -> Result<()> {
    let checked = check(inputs, params)?;
    let window = checked.window;
    expect_shape(
        "out",
        &["H", "L", "M+L"],
        &[checked.heads, window.query_len(), window.key_len()],
        out.shape(),
    )?;
    fill_scores(inputs, params, &checked, out);
    Ok(())
}

/// The work of [`scores`]: heads and blocks of query rows run in parallel (each entry
/// is computed the same way whichever thread computes it); each head packs `kᵀ` and
/// the descending `rᵀ` once for all its blocks.
fn fill_scores(
    inputs: &RelativeInputs<'_>,
    params: &RelativeParams,
    checked: &Checked,
    out: &mut Array3<f64>,
) {
    use rayon::prelude::*;
    let window = checked.window;
    let (l, key_len, m) = (window.query_len(), window.key_len(), window.memory_len());
    let scale = checked.scale;
    out.axis_iter_mut(Axis(0))
        .into_par_iter()
        .enumerate()
        .for_each(|(h, mut head)| {
            let q = inputs.q.index_axis(Axis(0), h);
            let qu = add_bias(q, inputs.u.row(h));
            let qv = add_bias(q, inputs.v.row(h));
            let r_desc = descending(inputs.r.index_axis(Axis(0), h), key_len, params.clamp_len);
            let keys = pack_columns(&inputs.k.index_axis(Axis(0), h).t());
            let relative = pack_columns(&r_desc.t());
            // Query rows in blocks: rows i0..i1 see keys 0..M+i1 at most, and their
            // shifted BD reads start at column L-i1, so each block multiplies only the
            // M+i1 columns it can use (3/4 of the full products when M = L).
            head.axis_chunks_iter_mut(Axis(0), QUERY_BLOCK)
                .into_par_iter()
                .enumerate()
                .for_each(|(block, mut rows)| {
                    let i0 = block * QUERY_BLOCK;
                    let i1 = i0 + rows.nrows();
                    let width = m + i1;
                    let (qu, qv) = (qu.slice(s![i0..i1, ..]), qv.slice(s![i0..i1, ..]));
                    gemm_packed(
                        scale,
                        &qu,
                        &keys,
                        0,
                        0.0,
                        &mut rows.slice_mut(s![.., ..width]),
                    );
                    let mut bd = Array2::zeros((i1 - i0, width));
                    gemm_packed(scale, &qv, &relative, l - i1, 0.0, &mut bd);
                    // Shift as a remap (see `rel_shift`): y[i][j] = BD[i][L-1-i+j] for
                    // j <= M+i. `bd` starts at column L-i1, so BD[i][L-1-i+j] is
                    // bd[i-i0][i1-1-i+j].
                    for i in i0..i1 {
                        let visible = m + i + 1;
                        let mut row = rows.row_mut(i - i0);
                        let shifted = bd.slice(s![i - i0, i1 - 1 - i..i1 - 1 - i + visible]);
                        Zip::from(row.slice_mut(s![..visible]))
                            .and(&shifted)
                            .for_each(|a, &b| *a += b);
                        row.slice_mut(s![visible..]).fill(f64::NEG_INFINITY);
                    }
                });
        });
}

/// Query rows per block in [`scores`]: large enough for efficient matrix products,
/// small enough that skipping hidden columns pays off.
const QUERY_BLOCK: usize = 32;

/// The four unscaled terms, each computed with matrix products and the shift remap.
pub fn terms(inputs: &RelativeInputs<'_>, params: &RelativeParams) -> Result<RelativeTerms> {
    let Checked { window, heads, .. } = check(inputs, params)?;
    let (l, key_len) = (window.query_len(), window.key_len());
    let shape = (heads, l, key_len);
    let mut terms = RelativeTerms {
        content: Array3::zeros(shape),
        content_position: Array3::zeros(shape),
        global_content: Array3::zeros(shape),
        global_position: Array3::zeros(shape),
    };
    for h in 0..heads {
        let q = inputs.q.index_axis(Axis(0), h);
        let k = inputs.k.index_axis(Axis(0), h);
        let r_desc = descending(inputs.r.index_axis(Axis(0), h), key_len, params.clamp_len);
        let u_row = inputs.u.row(h).insert_axis(Axis(0));
        let v_row = inputs.v.row(h).insert_axis(Axis(0));
        let a = matmul(&q, &k.t());
        let c = matmul(&u_row, &k.t());
        let b = rel_shift(matmul(&q, &r_desc.t()).view());
        let d_desc = matmul(&v_row, &r_desc.t());
        for i in 0..l {
            for j in window.visible_keys(i) {
                terms.content[[h, i, j]] = a[[i, j]];
                terms.global_content[[h, i, j]] = c[[0, j]];
                terms.content_position[[h, i, j]] = b[[i, j]];
                terms.global_position[[h, i, j]] = d_desc[[0, l - 1 - i + j]];
            }
        }
    }
    Ok(terms)
}

/// The relative shift exactly as the authors' procedure: prepend a zero column to
/// `bd[L, K]` (giving `L×(K+1)`), reshape row-major to `(K+1)×L`, drop the first row,
/// reshape to `L×K`.
///
/// Implemented as the equivalent index remap. With `K = M+L`:
/// `y[i][j] = bd[i][L-1-i+j]` for `j <= M+i`, `y[i][M+i+1] = 0`, and for
/// `j >= M+i+2` the entry holds `bd[i+1][j-M-i-2]` (garbage from the next row, always
/// inside the masked set). Defined (no panic) for every shape; the structure above
/// holds whenever `K >= L`.
pub fn rel_shift(bd: ArrayView2<'_, f64>) -> Array2<f64> {
    let (l, k) = bd.dim();
    Array2::from_shape_fn((l, k), |(i, j)| {
        // Flat index into the padded L×(K+1) matrix after dropping its first L entries.
        let flat = l + i * k + j;
        let (row, col) = (flat / (k + 1), flat % (k + 1));
        if col == 0 {
            0.0
        } else {
            bd[[row, col - 1]]
        }
    })
}

/// Projected sinusoidal relative embeddings `r[h, δ] = R_δ · W_{k,R}[h]` for
/// `δ = 0..count`, from `w_kr[H, d_model, d]` and a sinusoid of width `d_model`.
pub fn relative_embeddings(
    sinusoid: &Sinusoid,
    w_kr: ArrayView3<'_, f64>,
    count: usize,
) -> Result<Array3<f64>> {
    let (heads, d_model, head_dim) = w_kr.dim();
    if heads == 0 || head_dim == 0 || d_model != sinusoid.width() {
        return Err(Error::shape(
            "w_kr",
            format!(
                "[H, d_model, d] with d_model = {} (the sinusoid width), H >= 1, d >= 1",
                sinusoid.width()
            ),
            w_kr.shape(),
        ));
    }
    expect_finite("w_kr", w_kr.iter())?;
    let positions: Vec<i64> = (0..count as i64).collect();
    let table = sinusoid.table(&positions);
    let mut out = Array3::zeros((heads, count, head_dim));
    for (mut o, w) in out.outer_iter_mut().zip(w_kr.outer_iter()) {
        gemm(1.0, &table.view(), &w, 0.0, &mut o);
    }
    Ok(out)
}

// ---------------------------------------------------------------------------------
// The scheme in cases: parameters, arrays, reference, bounds, random parameters.

/// An xl_relative case's parameters (`{"name": "xl_relative", "scale": …, "clamp_len":
/// …}`). The scheme's arrays are inputs: `r[H, R, d]` (rows by distance),
/// `content_bias[H, d]` (u) and `position_bias[H, d]` (v); `encode` builds `r` from
/// `w_kr[H, d, d]` and the concatenated sinusoid.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct XlRelativeSpec {
    /// Score scale.
    pub scale: Scale,
    /// Optional clamp length of the distance.
    pub clamp_len: Option<usize>,
}

impl XlRelativeSpec {
    fn params(&self) -> RelativeParams {
        RelativeParams {
            scale: self.scale,
            clamp_len: self.clamp_len,
        }
    }

    /// Rows of `r` a case needs: `K` for one window, `min(T, M + L)` for `stream`, `T`
    /// for `decode`, and with a clamp `c`, `min(that, c + 1)`.
    pub fn relative_rows(&self, shape: &Shape<'_>) -> usize {
        let rows = match shape.operation {
            Operation::Stream { tokens } => (*tokens).min(shape.key_len()),
            Operation::Decode { tokens, .. } => *tokens,
            _ => shape.key_len(),
        };
        match self.clamp_len {
            Some(c) => rows.min(c.saturating_add(1)),
            None => rows,
        }
    }

    fn sinusoid(shape: &Shape<'_>) -> Result<Sinusoid> {
        Sinusoid::new(
            shape.head_dim,
            sinusoidal::DEFAULT_BASE,
            SinusoidLayout::Concatenated,
        )
    }
}

impl SchemeModel for XlRelativeSpec {
    fn scale(&self) -> Scale {
        self.scale
    }

    fn per_head_inputs(&self) -> Option<&'static [&'static str]> {
        Some(&["r", "content_bias", "position_bias"])
    }

    fn validate(&self, _shape: &Shape<'_>) -> Result<()> {
        self.scale.validate()
    }

    fn encode_inputs(&self, shape: &Shape<'_>) -> Vec<InputSpec> {
        let (h, d) = (shape.heads, shape.head_dim);
        vec![InputSpec::uniform(
            "w_kr",
            vec![h, d, d],
            1.0 / (d as f64).sqrt(),
        )]
    }

    fn window_inputs(&self, shape: &Shape<'_>) -> Vec<InputSpec> {
        let (h, d) = (shape.heads, shape.head_dim);
        vec![
            InputSpec::uniform("r", vec![h, self.relative_rows(shape), d], 1.0),
            InputSpec::uniform("content_bias", vec![h, d], 0.5),
            InputSpec::uniform("position_bias", vec![h, d], 0.5),
        ]
    }

    fn encode_output(&self, shape: &Shape<'_>) -> (Output, Vec<usize>) {
        (
            Output::R,
            vec![shape.heads, shape.key_len(), shape.head_dim],
        )
    }

    fn encode(&self, shape: &Shape<'_>, inputs: &Inputs<'_, '_>) -> Result<ArrayD<f64>> {
        let pe = Self::sinusoid(shape)?;
        Ok(relative_embeddings(&pe, inputs.get3("w_kr")?, shape.key_len())?.into_dyn())
    }

    fn window_scores(
        &self,
        _shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        _p0: i64,
    ) -> Result<Array3<f64>> {
        let (r, u, v) = (
            inputs.get3("r")?,
            inputs.get2("content_bias")?,
            inputs.get2("position_bias")?,
        );
        let relative = RelativeInputs {
            q: q.view(),
            k: k.view(),
            r: r.view(),
            u: u.view(),
            v: v.view(),
        };
        scores(&relative, &self.params())
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
        let (r, u, v) = (
            inputs.get3("r")?,
            inputs.get2("content_bias")?,
            inputs.get2("position_bias")?,
        );
        let factor = scale.factor(shape.head_dim);
        let rows = r.dim().1;
        let (heads, l, _) = q.dim();
        let mut out = Array3::zeros((heads, l, k.dim().1));
        for (h, mut out_h) in out.outer_iter_mut().enumerate() {
            let qh = q.index_axis(Axis(0), h);
            let ac = matmul(&add_bias(qh, u.row(h)), &k.index_axis(Axis(0), h).t());
            let bd = matmul(&add_bias(qh, v.row(h)), &r.index_axis(Axis(0), h).t());
            for ((i, j), s) in out_h.indexed_iter_mut() {
                let delta = positions.distance(i, j);
                *s = match usize::try_from(delta) {
                    Ok(delta) if clamp(delta, self.clamp_len) < rows => {
                        factor * (ac[[i, j]] + bd[[i, clamp(delta, self.clamp_len)]])
                    }
                    _ => f64::NAN,
                };
            }
        }
        Ok(out)
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
        let (r, u, v) = (
            inputs.get3("r")?.mapv(f64::abs),
            inputs.get2("content_bias")?.mapv(f64::abs),
            inputs.get2("position_bias")?.mapv(f64::abs),
        );
        let (qa, ka) = (q.mapv(f64::abs), k.mapv(f64::abs));
        let magnitude_inputs = RelativeInputs {
            q: qa.view(),
            k: ka.view(),
            r: r.view(),
            u: u.view(),
            v: v.view(),
        };
        let params = RelativeParams {
            scale: Scale::Fixed(factor),
            clamp_len: self.clamp_len,
        };
        // Σ(|q|+|u|)|k| + Σ(|q|+|v|)|r_Δ|: the four dot products (or q+u and q+v formed
        // first) and their sum add 3u_s; the inputs' rounding 2·input.
        let mut magnitude = scores(&magnitude_inputs, &params)?;
        magnitude.mapv_inplace(finite_or_zero);
        Ok(magnitude * (gamma + 3.0 * contract.storage + 2.0 * contract.input + 4.0 * R64))
    }

    fn encode_bounds(
        &self,
        shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        values: &ArrayD<f64>,
        contract: &Contract,
    ) -> Result<ArrayD<f64>> {
        // r[h, δ] = R_δ · W[h]: the table's error (angle, evaluation, storage) carried
        // through W linearly, plus the product's rounding.
        let pe = Self::sinusoid(shape)?;
        let w = inputs.get3("w_kr")?.mapv(f64::abs);
        let distances: Vec<i64> = (0..shape.key_len() as i64).collect();
        let table = pe.table(&distances);
        let errors = sinusoidal::table_errors(&pe, table.nrows(), &distances, contract);
        let table = table.mapv(f64::abs);
        let gamma = contract.gamma(shape.head_dim) + gamma_of(R64, shape.head_dim) + contract.input;
        let mut bound = Array3::zeros((shape.heads, shape.key_len(), shape.head_dim));
        for (mut b, wh) in bound.outer_iter_mut().zip(w.outer_iter()) {
            gemm(1.0, &errors, &wh, 0.0, &mut b);
            gemm(gamma, &table, &wh, 1.0, &mut b);
        }
        Ok(bound.into_dyn() + values.mapv(|v| contract.storage * v.abs() + contract.floor))
    }

    fn simpler(&self, _shape: &Shape<'_>) -> Vec<SchemeSpec> {
        vec![
            SchemeSpec::XlRelative(XlRelativeSpec {
                clamp_len: None,
                ..*self
            }),
            SchemeSpec::XlRelative(XlRelativeSpec {
                scale: Scale::InverseSqrtDim,
                ..*self
            }),
        ]
    }

    fn extras(&self, _shape: &Shape<'_>) -> usize {
        (self.scale != Scale::InverseSqrtDim) as usize + self.clamp_len.is_some() as usize
    }
}

impl SchemeKind for XlRelativeSpec {
    const SOURCE: &'static str = "Dai et al. 2019, Transformer-XL, §3.2-3.3";

    const PARAMETERS: &'static [Parameter] = &[
        Parameter::SCALE,
        Parameter::scores_only("clamp_len", ParameterKind::OptionalInteger),
    ];

    fn random(stream: &mut Stream, shape: &Shape<'_>) -> Self {
        XlRelativeSpec {
            scale: if stream.below(3) == 0 {
                Scale::Fixed(0.25)
            } else {
                Scale::InverseSqrtDim
            },
            clamp_len: match (stream.below(3) == 0, shape.operation) {
                // `encode` returns r for every distance whatever the clamp (the clamp
                // acts where r is indexed), so a clamp there would only invite the
                // authors'-code reading that clamps the table itself.
                (true, Operation::Encode) => None,
                (true, _) => Some(range(stream, 0, shape.key_len())),
                (false, _) => None,
            },
        }
    }
}
