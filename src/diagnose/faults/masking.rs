//! Mistakes in the mask: which keys a query sees, and what a row with none gives.

use ndarray::{Array3, Axis};

use super::{op_in, scheme_in, ATTENDING, SOFTMAX};
use crate::attention::masked_softmax;
use crate::case::Case;
use crate::diagnose::{Fault, FaultKind, FaultVariant, Matching};
use crate::error::Result;
use crate::math::Dtype;
use crate::scheme::Scheme;
use crate::variant::{Deviation, StepKind, WindowCtx};

/// Whether the case hides key `j` of this window (padding; one-window cases only).
fn hidden(ctx: &WindowCtx<'_, '_>, key: usize) -> bool {
    ctx.at.kind == StepKind::Window && ctx.case.hidden_keys.contains(&key)
}

pub(super) struct MaskNotOffset;

impl Deviation for MaskNotOffset {
    fn visible(
        &self,
        _: &WindowCtx<'_, '_>,
        i: usize,
        j: usize,
        _causal: bool,
        hidden: bool,
    ) -> bool {
        j <= i && !hidden
    }
}

impl FaultVariant for MaskNotOffset {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, ATTENDING)
    }
}

pub(super) const MASK_NOT_OFFSET_BY_MEMORY: Fault = Fault {
    id: "mask-not-offset-by-memory",
    mistake:
        "The causal mask is aligned top-left (key j visible to query i iff j <= i) instead of \
              being offset by the memory (j <= M + i), so queries lose the keys i < j <= M + i.",
    arises:
        "A square lower-triangular mask (torch.tril(ones(L, L)) or a kernel written for M = 0) \
             reused once memory or a KV cache puts M keys in front of the segment.",
    exposes: "Any case with memory or a cache (M > 0): scores and attention with memory, every \
              stream segment after the first, every decode chunk. Cases with M = 0 pass.",
    fix:
        "Build the mask over the whole key axis: key j is visible to query i iff j <= M + i, with \
          M the number of memory (or cached) keys in front of the segment.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &MaskNotOffset,
};

pub(super) struct MemoryMasked;

impl Deviation for MemoryMasked {
    fn visible(
        &self,
        ctx: &WindowCtx<'_, '_>,
        _: usize,
        j: usize,
        causal: bool,
        hidden: bool,
    ) -> bool {
        causal && !hidden && j >= ctx.window.memory_len()
    }
}

impl FaultVariant for MemoryMasked {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, ATTENDING)
    }
}

pub(super) const MEMORY_KEYS_MASKED: Fault = Fault {
    id: "memory-keys-masked",
    mistake: "The memory (or cached) keys j < M are masked out: queries attend to their own \
              segment only.",
    arises: "A mask built for the segment alone and padded with -inf over the memory columns, or \
             a padding mask that marks the memory rows as padding.",
    exposes: "Any case with M > 0; the errors sit in the memory columns, and cases with M = 0 \
              pass.",
    fix: "Every query sees every memory key: only keys after the query (j > M + i) are masked.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &MemoryMasked,
};

pub(super) struct DiagonalMasked;

impl Deviation for DiagonalMasked {
    fn visible(
        &self,
        ctx: &WindowCtx<'_, '_>,
        i: usize,
        j: usize,
        _causal: bool,
        hidden: bool,
    ) -> bool {
        j < ctx.window.memory_len() + i && !hidden
    }
}

impl FaultVariant for DiagonalMasked {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, ATTENDING)
    }
}

pub(super) const DIAGONAL_MASKED: Fault = Fault {
    id: "diagonal-masked",
    mistake: "A query's own key (distance 0) is masked: the mask is strict (j < M + i) where it \
              must include the diagonal (j <= M + i).",
    arises: "torch.triu(..., diagonal=0) instead of diagonal=1 when building the -inf part of the \
             mask, or `<` for `<=` in a hand-written kernel.",
    exposes: "Every attending case; the first query of a case without memory then has no key at \
              all.",
    fix: "Mask only keys strictly after the query: j > M + i (triu with diagonal=1).",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &DiagonalMasked,
};

pub(super) struct NoCausalMask;

impl Deviation for NoCausalMask {
    fn visible(
        &self,
        _: &WindowCtx<'_, '_>,
        _: usize,
        _: usize,
        _causal: bool,
        hidden: bool,
    ) -> bool {
        !hidden
    }
}

impl FaultVariant for NoCausalMask {
    fn applies(&self, case: &Case) -> bool {
        // Transformer-XL has no score for a future key; its unmasked version is
        // rel-shift-garbage-unmasked.
        op_in(case, ATTENDING) && !scheme_in(case, &[Scheme::XlRelative])
    }
}

pub(super) const NO_CAUSAL_MASK: Fault = Fault {
    id: "no-causal-mask",
    mistake: "No causal mask: every query sees the keys after it (the future leaks).",
    arises: "The mask argument left out (is_causal=False, attn_mask=None), or a padding mask \
             passed where the causal one belongs.",
    exposes: "Every attending case with L > 1: masked scores come back finite and masked \
              probabilities are non-zero.",
    fix: "Mask key j for query i whenever j > M + i (on top of any padding mask).",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &NoCausalMask,
};

pub(super) struct OneKeyTooMany;

impl Deviation for OneKeyTooMany {
    fn visible(
        &self,
        ctx: &WindowCtx<'_, '_>,
        i: usize,
        j: usize,
        _causal: bool,
        hidden: bool,
    ) -> bool {
        j <= ctx.window.memory_len() + i + 1 && !hidden
    }
}

impl FaultVariant for OneKeyTooMany {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, ATTENDING) && !scheme_in(case, &[Scheme::XlRelative])
    }
}

pub(super) const MASK_ONE_KEY_TOO_MANY: Fault = Fault {
    id: "mask-one-key-too-many",
    mistake: "The mask is off by one towards the future: each query also sees the key right \
              after it (j <= M + i + 1).",
    arises: "triu(..., diagonal=2) instead of diagonal=1, or a `<=` compared against an \
             end index that is already exclusive.",
    exposes: "Every attending case with L > 1: the first masked entry of each row leaks.",
    fix: "Key j is visible to query i iff j <= M + i.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &OneKeyTooMany,
};

pub(super) struct PaddingIgnored;

impl Deviation for PaddingIgnored {
    fn visible(
        &self,
        _: &WindowCtx<'_, '_>,
        _: usize,
        _: usize,
        causal: bool,
        _hidden: bool,
    ) -> bool {
        causal
    }
}

impl FaultVariant for PaddingIgnored {
    fn applies(&self, case: &Case) -> bool {
        !case.hidden_keys.is_empty()
    }
}

pub(super) const PADDING_MASK_IGNORED: Fault = Fault {
    id: "padding-mask-ignored",
    mistake: "Hidden (padding) keys are not masked: only the causal mask is applied.",
    arises: "A fused kernel that takes is_causal and drops the explicit attention mask, or a \
             padding mask combined with the causal one by the wrong operation.",
    exposes: "Cases with hidden keys (the suite's padded rows; random cases draw them).",
    fix: "Combine both masks: a key is visible only if the causal rule allows it and it is not \
          hidden.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &PaddingIgnored,
};

pub(super) struct MaskMultiplied;

impl Deviation for MaskMultiplied {
    fn scores(
        &self,
        ctx: &WindowCtx<'_, '_>,
        _q: ndarray::ArrayView3<'_, f64>,
        _k: ndarray::ArrayView3<'_, f64>,
        _positions: &crate::scheme::model::PairPositions,
        mut scores: Array3<f64>,
    ) -> Result<Array3<f64>> {
        for ((_, i, j), s) in scores.indexed_iter_mut() {
            if !ctx.window.is_visible(i, j) || hidden(ctx, j) {
                *s = 0.0;
            }
        }
        Ok(scores)
    }

    fn visible(
        &self,
        _: &WindowCtx<'_, '_>,
        _: usize,
        _: usize,
        _causal: bool,
        _hidden: bool,
    ) -> bool {
        true
    }
}

impl FaultVariant for MaskMultiplied {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, ATTENDING)
    }
}

pub(super) const MASK_MULTIPLIED_NOT_ADDED: Fault = Fault {
    id: "mask-multiplied-not-added",
    mistake: "The 0/1 mask multiplies the scores instead of adding -inf: masked scores become 0, \
              and exp(0) still gives them probability.",
    arises: "scores * mask with a boolean or 0/1 mask, a habit from masking losses or values.",
    exposes: "Every attending case with a masked entry: masked scores are 0 instead of -inf, and \
              masked keys carry probability.",
    fix: "Add the mask in log space: scores.masked_fill(~visible, -inf) (or add a large negative \
          sentinel that the dtype can hold), then softmax.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &MaskMultiplied,
};

/// Rows of `scores[H, L, K]` whose every entry is masked.
fn fully_masked_rows(scores: &Array3<f64>) -> Vec<(usize, usize)> {
    let mut rows = Vec::new();
    for (h, head) in scores.outer_iter().enumerate() {
        for (i, row) in head.outer_iter().enumerate() {
            if row.iter().all(|&x| x == f64::NEG_INFINITY) {
                rows.push((h, i));
            }
        }
    }
    rows
}

/// Softmax with every fully masked row set to `fill(K)`.
fn softmax_filling_empty_rows(
    scores: &Array3<f64>,
    fill: impl Fn(usize) -> f64,
) -> Result<Array3<f64>> {
    let mut probs = masked_softmax(scores.view())?;
    let keys = scores.len_of(Axis(2));
    for (h, i) in fully_masked_rows(scores) {
        probs.index_axis_mut(Axis(0), h).row_mut(i).fill(fill(keys));
    }
    Ok(probs)
}

/// Applies to cases that can have a fully masked row: hidden keys in a softmax case.
fn has_empty_rows(case: &Case) -> bool {
    op_in(case, SOFTMAX) && !case.hidden_keys.is_empty()
}

pub(super) struct EmptyRowNan;

impl Deviation for EmptyRowNan {
    fn softmax(&self, _: &WindowCtx<'_, '_>, scores: &Array3<f64>) -> Result<Array3<f64>> {
        softmax_filling_empty_rows(scores, |_| f64::NAN)
    }
}

impl FaultVariant for EmptyRowNan {
    fn applies(&self, case: &Case) -> bool {
        has_empty_rows(case)
    }
}

pub(super) const MASKED_ROW_NAN: Fault = Fault {
    id: "masked-row-nan",
    mistake: "A query whose keys are all masked gets NaN probabilities (and a NaN output row) \
              instead of zeros.",
    arises: "The textbook softmax on a row of -inf: max is -inf, and -inf - (-inf) is NaN.",
    exposes: "Cases with a fully masked row (padding that hides every key a query sees); random \
              cases draw them.",
    fix: "Detect rows with no visible key and return zeros for them (or substitute 0 for a max of \
          -inf before subtracting it).",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &EmptyRowNan,
};

pub(super) struct EmptyRowUniform;

impl Deviation for EmptyRowUniform {
    fn softmax(&self, _: &WindowCtx<'_, '_>, scores: &Array3<f64>) -> Result<Array3<f64>> {
        softmax_filling_empty_rows(scores, |keys| 1.0 / keys as f64)
    }
}

impl FaultVariant for EmptyRowUniform {
    fn applies(&self, case: &Case) -> bool {
        has_empty_rows(case)
    }
}

pub(super) const MASKED_ROW_UNIFORM: Fault = Fault {
    id: "masked-row-uniform",
    mistake: "A query whose keys are all masked spreads its probability evenly over every key \
              (1/K each) instead of giving zeros.",
    arises: "Masking with a finite sentinel (-1e9, finfo.min): a row of equal sentinels softmaxes \
             to a uniform distribution.",
    exposes: "Cases with a fully masked row; random cases draw them.",
    fix: "Zero the probabilities (and the output) of rows with no visible key after the softmax.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &EmptyRowUniform,
};

pub(super) struct SentinelOverflow;

impl Deviation for SentinelOverflow {
    fn softmax(&self, ctx: &WindowCtx<'_, '_>, scores: &Array3<f64>) -> Result<Array3<f64>> {
        if matches!(ctx.dtype, Dtype::F16 | Dtype::Bf16) {
            softmax_filling_empty_rows(scores, |_| f64::NAN)
        } else {
            masked_softmax(scores.view())
        }
    }
}

impl FaultVariant for SentinelOverflow {
    fn applies(&self, case: &Case) -> bool {
        has_empty_rows(case)
    }
}

pub(super) const MASK_SENTINEL_OVERFLOWS_IN_HALF: Fault = Fault {
    id: "mask-sentinel-overflows-in-half",
    mistake: "In f16 (or bf16) the mask's large negative sentinel overflows to -inf, so a row \
              whose keys are all masked becomes -inf - (-inf) = NaN.",
    arises: "A sentinel such as -1e9 chosen for f32 and cast to f16 (largest finite 65504), or \
             finfo(f32).min added in a half-precision kernel.",
    exposes: "f16 and bf16 kernels on cases with a fully masked row; f32 and f64 kernels pass \
              them.",
    fix: "Use a sentinel the dtype can hold (finfo(dtype).min, or -inf with an explicit rule for \
          rows with no visible key) and give such rows zeros.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &SentinelOverflow,
};
