//! Masked softmax attention over `[memory ; current]` keys.
//!
//! Convention (docs/conventions.md, "Layout and positions" and "Visibility and masking"):
//! - queries `q[H, L, d]`; keys and values `k, v[H, M+L, d]`, memory first, oldest first;
//! - query `i` sits at absolute position `p0 + i`, key `j` at `p0 - M + j`;
//! - distance `Δ(i, j) = M + i - j`; key `j` is visible to query `i` iff `Δ >= 0`,
//!   i.e. `j <= M + i`. Every query sees every memory key;
//! - masked scores are `-inf`; a fully masked row has all-zero probabilities and a zero
//!   output row (defined, never NaN).

use std::ops::Range;

use ndarray::{Array2, Array3, ArrayView2, ArrayView3, Zip};

use crate::error::{expect_shape, Error, Result};
use crate::math::product::gemm;

/// The shape of one causal attention step: `L` current queries over `M` memory keys
/// followed by the `L` current keys (docs/conventions.md).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize, serde::Deserialize)]
pub struct Window {
    memory_len: usize,
    query_len: usize,
}

impl Window {
    /// `M = memory_len >= 0` memory keys and `L = query_len >= 1` queries.
    pub fn new(memory_len: usize, query_len: usize) -> Result<Self> {
        if query_len == 0 {
            return Err(Error::param("query_len", "L >= 1", query_len));
        }
        Ok(Window {
            memory_len,
            query_len,
        })
    }

    /// `M`, the number of memory keys.
    pub fn memory_len(&self) -> usize {
        self.memory_len
    }

    /// `L`, the number of queries (and of current-segment keys).
    pub fn query_len(&self) -> usize {
        self.query_len
    }

    /// `M + L`, the length of the key axis.
    pub fn key_len(&self) -> usize {
        self.memory_len + self.query_len
    }

    /// `Δ(i, j) = M + i - j`, the distance from key `j` to query `i`.
    pub fn distance(&self, query: usize, key: usize) -> i64 {
        (self.memory_len + query) as i64 - key as i64
    }

    /// Whether key `j` is visible to query `i` (`j <= M + i`).
    pub fn is_visible(&self, query: usize, key: usize) -> bool {
        key <= self.memory_len + query
    }

    /// The keys query `i` sees: `0 .. M + i + 1`.
    pub fn visible_keys(&self, query: usize) -> Range<usize> {
        0..(self.memory_len + query + 1).min(self.key_len())
    }

    /// The `[L, M+L]` visibility matrix.
    pub fn mask(&self) -> Array2<bool> {
        Array2::from_shape_fn((self.query_len, self.key_len()), |(i, j)| {
            self.is_visible(i, j)
        })
    }
}

/// How scores are scaled before the softmax.
#[derive(Debug, Clone, Copy, PartialEq, Default, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Scale {
    /// `1 / sqrt(d)`, the default of scaled dot-product attention.
    #[default]
    InverseSqrtDim,
    /// A fixed factor (`1.0` for schemes that use none).
    Fixed(f64),
}

impl Scale {
    /// The factor for head width `d`.
    pub fn factor(self, head_dim: usize) -> f64 {
        match self {
            Scale::InverseSqrtDim => 1.0 / (head_dim as f64).sqrt(),
            Scale::Fixed(x) => x,
        }
    }

    /// Errors unless the factor is finite.
    pub(crate) fn validate(self) -> Result<()> {
        match self {
            Scale::Fixed(x) if !x.is_finite() => Err(Error::param("scale", "a finite factor", x)),
            _ => Ok(()),
        }
    }
}

/// Sets every entry of `scores[H, L, M+L]` that `window` hides to `-inf`.
pub fn apply_causal_mask(scores: &mut Array3<f64>, window: Window) -> Result<()> {
    let (heads, l, k) = scores.dim();
    expect_shape(
        "scores",
        &["H", "L", "M+L"],
        &[heads, window.query_len(), window.key_len()],
        &[heads, l, k],
    )?;
    for mut head in scores.outer_iter_mut() {
        for (i, mut row) in head.outer_iter_mut().enumerate() {
            let visible = window.visible_keys(i).end;
            row.slice_mut(ndarray::s![visible..])
                .fill(f64::NEG_INFINITY);
        }
    }
    Ok(())
}

/// Row-wise softmax over the last axis, where `-inf` marks a masked entry.
///
/// Masked entries get probability exactly 0; a row with every entry masked gets all
/// zeros (defined, never NaN). Errors on NaN or `+inf` scores, naming the coordinate.
pub fn masked_softmax(scores: ArrayView3<'_, f64>) -> Result<Array3<f64>> {
    for (h, head) in scores.outer_iter().enumerate() {
        for (i, row) in head.outer_iter().enumerate() {
            if let Some(j) = row.iter().position(|x| x.is_nan() || *x == f64::INFINITY) {
                return Err(Error::param(
                    "scores",
                    "finite values or -inf (masked)",
                    format!("{} at [head {h}, query {i}, key {j}]", row[j]),
                ));
            }
        }
    }
    let mut probs = scores.as_standard_layout().into_owned();
    // Rows are independent: they run in parallel, each in the same order as alone.
    Zip::from(probs.lanes_mut(ndarray::Axis(2))).par_for_each(|mut row| {
        if let Some(row) = row.as_slice_mut() {
            softmax_row(row);
        }
    });
    Ok(probs)
}

/// In-place masked softmax of one row (`-inf` = masked).
fn softmax_row(row: &mut [f64]) {
    let max = row.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if max == f64::NEG_INFINITY {
        row.fill(0.0);
        return;
    }
    let mut sum = 0.0;
    for x in row.iter_mut() {
        // exp(-inf) is exactly 0, so masked entries carry no weight.
        *x = libm::exp(*x - max);
        sum += *x;
    }
    for x in row.iter_mut() {
        *x /= sum;
    }
}

/// `out[h] = probs[h] · values[h]`: shape `[H, L, d_v]` from `probs[H, L, K]` and
/// `values[H, K, d_v]`.
pub fn attend(probs: ArrayView3<'_, f64>, values: ArrayView3<'_, f64>) -> Result<Array3<f64>> {
    let (heads, l, k) = probs.dim();
    let (vh, vk, dv) = values.dim();
    expect_shape("values", &["H", "K", "d_v"], &[heads, k, dv], &[vh, vk, dv])?;
    let mut out = Array3::zeros((heads, l, dv));
    Zip::from(out.outer_iter_mut())
        .and(probs.outer_iter())
        .and(values.outer_iter())
        .for_each(|mut o, p, v| gemm(1.0, &p, &v, 0.0, &mut o));
    Ok(out)
}

/// Softmax of `scores` then the weighted sum of `values`: `(probs, output)`.
pub fn attention(
    scores: ArrayView3<'_, f64>,
    values: ArrayView3<'_, f64>,
) -> Result<(Array3<f64>, Array3<f64>)> {
    let probs = masked_softmax(scores)?;
    let out = attend(probs.view(), values)?;
    Ok((probs, out))
}

/// Plain scaled dot products `scale · q[h,i]·k[h,j]` with the causal mask of
/// `window`: the no-position baseline other schemes add to.
pub fn dot_scores(
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    scale: Scale,
) -> Result<(Array3<f64>, Window)> {
    let (heads, l, d) = q.dim();
    let window = window_for(q, k)?;
    scale.validate()?;
    let factor = scale.factor(d);
    let mut scores = Array3::zeros((heads, l, window.key_len()));
    Zip::from(scores.outer_iter_mut())
        .and(q.outer_iter())
        .and(k.outer_iter())
        .for_each(|mut s, qh, kh| gemm(factor, &qh, &kh.t(), 0.0, &mut s));
    apply_causal_mask(&mut scores, window)?;
    Ok((scores, window))
}

/// Validates `q[H, L, d]` against `k[H, M+L, d]` and returns their window.
pub(crate) fn window_for(q: ArrayView3<'_, f64>, k: ArrayView3<'_, f64>) -> Result<Window> {
    let (heads, l, d) = q.dim();
    if heads == 0 || l == 0 || d == 0 {
        return Err(Error::shape(
            "q",
            "[H, L, d] with every dimension >= 1",
            q.shape(),
        ));
    }
    let (kh, kk, kd) = k.dim();
    if kk < l {
        return Err(Error::shape(
            "k",
            format!("[H, M+L, d] with M+L >= L = {l}"),
            k.shape(),
        ));
    }
    expect_shape("k", &["H", "M+L", "d"], &[heads, kk, d], &[kh, kk, kd])?;
    Window::new(kk - l, l)
}

/// Checks a per-head vector such as `u[H, d]`.
pub(crate) fn expect_per_head(
    name: &'static str,
    x: ArrayView2<'_, f64>,
    heads: usize,
    d: usize,
) -> Result<()> {
    expect_shape(name, &["H", "d"], &[heads, d], x.shape())
}
