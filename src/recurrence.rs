//! Segment-level recurrence (Dai et al. 2019, Transformer-XL, §3.2) through a stack of
//! bare relative-attention layers.
//!
//! Convention (docs/conventions.md, "stream"): a sequence of `T` tokens is cut into
//! segments of length `L` (the last may be shorter). Per layer, the memory for segment
//! `τ+1` is the last `M` rows of `[memory_τ ; inputs_τ]` — the newest rows are kept —
//! where `inputs_τ` are that layer's *inputs* for segment `τ`. Queries come from the
//! current segment only; keys and values from `[memory ; current]`.
//!
//! A layer here is deliberately bare: per-head projections, Transformer-XL relative
//! scores ([`crate::scheme::xl_relative::scores`]) with sinusoidal relative embeddings,
//! masked softmax, and an output projection. Residuals, normalisation and feed-forward
//! blocks act per token and never change which keys a query sees, so they are left out.

use ndarray::{concatenate, s, Array2, Array3, ArrayView2, ArrayView3, Axis};

use crate::attention::{attend, masked_softmax, Window};
use crate::error::{expect_finite, expect_shape, Error, Result};
use crate::math::product::{gemm, matmul};
use crate::scheme::sinusoidal::Sinusoid;
use crate::scheme::xl_relative::{
    relative_embeddings, scores, scores_at_positions, RelativeInputs, RelativeParams,
};

/// The weights of one relative-attention layer.
///
/// Shapes: `w_q, w_k, w_v, w_kr[H, d_model, d]`, `u, v[H, d]`, `w_o[H·d, d_model]`.
#[derive(Debug, Clone, PartialEq)]
pub struct LayerWeights {
    /// Query projection per head.
    pub w_q: Array3<f64>,
    /// Key projection per head.
    pub w_k: Array3<f64>,
    /// Value projection per head.
    pub w_v: Array3<f64>,
    /// Relative-position projection per head (`W_{k,R}`).
    pub w_kr: Array3<f64>,
    /// Global content bias.
    pub u: Array2<f64>,
    /// Global position bias.
    pub v: Array2<f64>,
    /// Output projection from the concatenated heads back to `d_model`.
    pub w_o: Array2<f64>,
}

/// One bare relative-attention layer: validated weights plus the relative sinusoid.
#[derive(Debug, Clone, PartialEq)]
pub struct RelativeLayer {
    weights: LayerWeights,
    sinusoid: Sinusoid,
    params: RelativeParams,
}

impl RelativeLayer {
    /// Validates the weights against each other and against `sinusoid` (whose width is
    /// `d_model`).
    pub fn new(weights: LayerWeights, sinusoid: Sinusoid, params: RelativeParams) -> Result<Self> {
        let (heads, d_model, d) = weights.w_q.dim();
        if heads == 0 || d == 0 || d_model != sinusoid.width() {
            return Err(Error::shape(
                "w_q",
                format!(
                    "[H, d_model, d] with d_model = {} (the sinusoid width), H >= 1, d >= 1",
                    sinusoid.width()
                ),
                weights.w_q.shape(),
            ));
        }
        let dims = ["H", "d_model", "d"];
        let projection = [heads, d_model, d];
        expect_shape("w_k", &dims, &projection, weights.w_k.shape())?;
        expect_shape("w_v", &dims, &projection, weights.w_v.shape())?;
        expect_shape("w_kr", &dims, &projection, weights.w_kr.shape())?;
        expect_shape("u", &["H", "d"], &[heads, d], weights.u.shape())?;
        expect_shape("v", &["H", "d"], &[heads, d], weights.v.shape())?;
        expect_shape(
            "w_o",
            &["H*d", "d_model"],
            &[heads * d, d_model],
            weights.w_o.shape(),
        )?;
        for (name, values) in [
            ("w_q", weights.w_q.iter()),
            ("w_k", weights.w_k.iter()),
            ("w_v", weights.w_v.iter()),
            ("w_kr", weights.w_kr.iter()),
        ] {
            expect_finite(name, values)?;
        }
        expect_finite("u", weights.u.iter())?;
        expect_finite("v", weights.v.iter())?;
        expect_finite("w_o", weights.w_o.iter())?;
        params.scale.validate()?;
        Ok(RelativeLayer {
            weights,
            sinusoid,
            params,
        })
    }

    /// `d_model`, the width of the layer's inputs and outputs.
    pub fn model_dim(&self) -> usize {
        self.sinusoid.width()
    }

    /// The layer's weights.
    pub fn weights(&self) -> &LayerWeights {
        &self.weights
    }

    fn check_rows(&self, name: &'static str, x: ArrayView2<'_, f64>) -> Result<()> {
        if x.ncols() != self.model_dim() {
            return Err(Error::shape(
                name,
                format!("[rows, d_model] with d_model = {}", self.model_dim()),
                x.shape(),
            ));
        }
        expect_finite(name, x.iter())
    }

    /// `x[n, d_model]` projected per head: `[H, n, d]`.
    fn project(x: ArrayView2<'_, f64>, w: ArrayView3<'_, f64>) -> Array3<f64> {
        let (heads, _, d) = w.dim();
        let mut out = Array3::zeros((heads, x.nrows(), d));
        for (mut o, wh) in out.outer_iter_mut().zip(w.outer_iter()) {
            gemm(1.0, &x, &wh, 0.0, &mut o);
        }
        out
    }

    /// Softmax, weighted values, heads concatenated and projected: `[L, d_model]`.
    fn finish(&self, scores: Array3<f64>, values: Array3<f64>) -> Result<Array2<f64>> {
        let probs = masked_softmax(scores.view())?;
        let heads_out = attend(probs.view(), values.view())?;
        let (heads, l, d) = heads_out.dim();
        // [H, L, d] -> [L, H*d], head-major within each row.
        let concat = heads_out
            .permuted_axes([1, 0, 2])
            .as_standard_layout()
            .into_owned()
            .into_shape_with_order((l, heads * d))
            .expect("contiguous after as_standard_layout");
        Ok(matmul(&concat.view(), &self.weights.w_o.view()))
    }

    /// One segment: `memory[M, d_model]` and `inputs[L, d_model]` give `[L, d_model]`.
    pub fn forward<'a>(
        &self,
        memory: ArrayView2<'a, f64>,
        inputs: ArrayView2<'a, f64>,
    ) -> Result<Array2<f64>> {
        self.check_rows("memory", memory)?;
        self.check_rows("inputs", inputs)?;
        let window = Window::new(memory.nrows(), inputs.nrows())?;
        let context =
            concatenate(Axis(0), &[memory.view(), inputs.view()]).expect("widths checked");
        let w = &self.weights;
        let q = Self::project(inputs, w.w_q.view());
        let k = Self::project(context.view(), w.w_k.view());
        let values = Self::project(context.view(), w.w_v.view());
        let r = relative_embeddings(&self.sinusoid, w.w_kr.view(), window.key_len())?;
        let inputs = RelativeInputs {
            q: q.view(),
            k: k.view(),
            r: r.view(),
            u: w.u.view(),
            v: w.v.view(),
        };
        self.finish(scores(&inputs, &self.params)?, values)
    }

    /// The whole sequence `x[T, d_model]` at once, positions `0..T`, where key `j` is
    /// visible to query `t` iff `j <= t` and `visible(t, j)`.
    ///
    /// This is the one-shot definition that streaming must reproduce: with
    /// `visible = |_, _| true` it is plain causal relative attention; with
    /// [`recurrence_visibility`] it is the set of keys the recurrence gives each query.
    pub fn forward_one_shot(
        &self,
        x: ArrayView2<'_, f64>,
        visible: &dyn Fn(usize, usize) -> bool,
    ) -> Result<Array2<f64>> {
        self.check_rows("inputs", x)?;
        let t = x.nrows();
        Window::new(0, t)?;
        let w = &self.weights;
        let q = Self::project(x, w.w_q.view());
        let k = Self::project(x, w.w_k.view());
        let values = Self::project(x, w.w_v.view());
        let r = relative_embeddings(&self.sinusoid, w.w_kr.view(), t)?;
        let positions: Vec<i64> = (0..t as i64).collect();
        let inputs = RelativeInputs {
            q: q.view(),
            k: k.view(),
            r: r.view(),
            u: w.u.view(),
            v: w.v.view(),
        };
        let mut scores = scores_at_positions(&inputs, &self.params, &positions, &positions)?;
        for mut head in scores.outer_iter_mut() {
            for (query, mut row) in head.outer_iter_mut().enumerate() {
                for (key, s) in row.iter_mut().enumerate() {
                    if !visible(query, key) {
                        *s = f64::NEG_INFINITY;
                    }
                }
            }
        }
        self.finish(scores, values)
    }
}

/// The memory for the next segment: the newest `memory_len` rows of
/// `[memory ; inputs]` (oldest first).
pub fn update_memory<'a>(
    memory: ArrayView2<'a, f64>,
    inputs: ArrayView2<'a, f64>,
    memory_len: usize,
) -> Result<Array2<f64>> {
    if memory.ncols() != inputs.ncols() {
        return Err(Error::shape(
            "memory",
            format!("[M, d_model] with d_model = {}", inputs.ncols()),
            memory.shape(),
        ));
    }
    let total = memory.nrows() + inputs.nrows();
    let keep = memory_len.min(total);
    let joined = concatenate(Axis(0), &[memory.view(), inputs.view()]).expect("widths checked");
    Ok(joined.slice(s![total - keep.., ..]).to_owned())
}

/// Which keys the recurrence lets query `t` see (absolute indices, 0-based): those in
/// `[max(0, S - M), t]`, where `S` is the start of `t`'s segment of length `L`.
pub fn recurrence_visibility(
    segment_len: usize,
    memory_len: usize,
) -> impl Fn(usize, usize) -> bool {
    move |query, key| {
        let segment_start = query / segment_len * segment_len;
        key <= query && key + memory_len >= segment_start
    }
}

/// One attention step of a stream or a cached decode: queries `start..end` over keys
/// `first_key..end` (the memory, or the cache, then the step's own tokens).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Step {
    /// The first key the step's queries see.
    pub first_key: usize,
    /// The step's first token.
    pub start: usize,
    /// One past its last token.
    pub end: usize,
}

/// The segments of a stream of `tokens` cut into segments of `segment_len`, each
/// seeing the newest `memory_len` earlier tokens as memory (docs/conventions.md,
/// "stream"). The last segment may be shorter. Empty for `segment_len == 0`.
pub fn segments(
    tokens: usize,
    segment_len: usize,
    memory_len: usize,
) -> impl Iterator<Item = Step> {
    let starts = if segment_len == 0 { 0 } else { tokens };
    (0..starts)
        .step_by(segment_len.max(1))
        .map(move |start| Step {
            first_key: start.saturating_sub(memory_len),
            start,
            end: (start + segment_len).min(tokens),
        })
}

/// The steps of a cached decode: the prefill `0..prefill`, then each chunk, every step
/// seeing all earlier tokens (the cache) and itself causally (docs/conventions.md,
/// "decode").
pub fn decode_steps(prefill: usize, chunks: &[usize]) -> impl Iterator<Item = Step> + '_ {
    let prefill_step = (prefill > 0).then_some(Step {
        first_key: 0,
        start: 0,
        end: prefill,
    });
    let chunk_steps = chunks.iter().scan(prefill, |start, &size| {
        let step = Step {
            first_key: 0,
            start: *start,
            end: *start + size,
        };
        *start += size;
        Some(step)
    });
    prefill_step.into_iter().chain(chunk_steps)
}

/// Streams `x[T, d_model]` through `layers` in segments of `segment_len` with
/// `memory_len` rows of memory per layer: `[T, d_model]`.
///
/// Each layer's memory holds the previous segments' *inputs to that layer*.
pub fn stream(
    layers: &[RelativeLayer],
    x: ArrayView2<'_, f64>,
    segment_len: usize,
    memory_len: usize,
) -> Result<Array2<f64>> {
    let d_model = check_stack(layers, x)?;
    if segment_len == 0 {
        return Err(Error::param("segment_len", "L >= 1", segment_len));
    }
    let t = x.nrows();
    let mut memories = vec![Array2::<f64>::zeros((0, d_model)); layers.len()];
    let mut out = Array2::zeros((t, d_model));
    // Each layer keeps its own memory (update_memory), so only the steps' token ranges
    // are taken from the shared driver.
    for step in segments(t, segment_len, memory_len) {
        let mut hidden = x.slice(s![step.start..step.end, ..]).to_owned();
        for (layer, memory) in layers.iter().zip(memories.iter_mut()) {
            let next = layer.forward(memory.view(), hidden.view())?;
            *memory = update_memory(memory.view(), hidden.view(), memory_len)?;
            hidden = next;
        }
        out.slice_mut(s![step.start..step.end, ..]).assign(&hidden);
    }
    Ok(out)
}

/// The one-shot counterpart of [`stream`]: every layer over the whole sequence at once,
/// query `t` seeing key `j` iff `j <= t` and `visible(t, j)`.
pub fn one_shot(
    layers: &[RelativeLayer],
    x: ArrayView2<'_, f64>,
    visible: &dyn Fn(usize, usize) -> bool,
) -> Result<Array2<f64>> {
    check_stack(layers, x)?;
    let mut hidden = x.to_owned();
    for layer in layers {
        hidden = layer.forward_one_shot(hidden.view(), visible)?;
    }
    Ok(hidden)
}

fn check_stack(layers: &[RelativeLayer], x: ArrayView2<'_, f64>) -> Result<usize> {
    let first = layers
        .first()
        .ok_or_else(|| Error::param("layers", "at least one layer", 0))?;
    let d_model = first.model_dim();
    if let Some(bad) = layers.iter().position(|l| l.model_dim() != d_model) {
        return Err(Error::param(
            "layers",
            format!("every layer with d_model = {d_model}"),
            format!("layer {bad} with d_model = {}", layers[bad].model_dim()),
        ));
    }
    if x.nrows() == 0 || x.ncols() != d_model {
        return Err(Error::shape(
            "x",
            format!("[T, d_model] with T >= 1, d_model = {d_model}"),
            x.shape(),
        ));
    }
    Ok(d_model)
}
