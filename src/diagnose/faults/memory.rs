//! Mistakes in the memory of a stream and the cache of a decode.

use std::collections::BTreeMap;

use ndarray::{s, ArrayD};

use super::op_in;
use crate::case::{Case, OperationKind};
use crate::diagnose::{Fault, FaultKind, FaultVariant, Matching};
use crate::error::Result;
use crate::scheme::model::PairPositions;
use crate::variant::{Deviation, StepKind, WindowCtx};

pub(super) struct KeepsOldest;

impl Deviation for KeepsOldest {
    fn segment_keys(&self, case: &Case, _first_key: usize, start: usize, end: usize) -> Vec<usize> {
        // The memory after each earlier segment is the *first* M rows of
        // [memory ; segment] instead of the last M.
        let (m, l) = (case.memory_len, case.query_len.max(1));
        let mut memory: Vec<usize> = Vec::new();
        for a in (0..start).step_by(l) {
            let mut buffer = memory.clone();
            buffer.extend(a..(a + l).min(start));
            buffer.truncate(m);
            memory = buffer;
        }
        memory.extend(start..end);
        memory
    }
}

impl FaultVariant for KeepsOldest {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, &[OperationKind::Stream]) && case.memory_len > 0
    }
}

pub(super) const MEMORY_KEEPS_OLDEST: Fault = Fault {
    id: "memory-keeps-oldest",
    mistake: "The memory update keeps the oldest M rows of [memory ; segment] instead of the \
              newest, so the memory stops moving once it is full.",
    arises: "cat([mem, h])[:M] for cat([mem, h])[-M:], or a ring buffer whose write index is \
             never advanced.",
    exposes: "stream cases with memory, once the memory has filled (from the second or third \
              segment on).",
    fix: "After each segment keep the newest M rows: memory = cat([memory, segment])[-M:].",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &KeepsOldest,
};

pub(super) struct OrderReversed;

impl Deviation for OrderReversed {
    fn inputs(&self, case: &Case, arrays: &mut BTreeMap<String, ArrayD<f64>>) -> Result<()> {
        if case.operation.kind().is_window() {
            let m = case.memory_len;
            for name in ["k", "v"] {
                if let Some(x) = arrays.get_mut(name) {
                    let reversed = x.slice(s![.., ..m;-1, ..]).to_owned();
                    x.slice_mut(s![.., ..m, ..]).assign(&reversed);
                }
            }
        }
        Ok(())
    }

    fn segment_keys(&self, _case: &Case, first_key: usize, start: usize, end: usize) -> Vec<usize> {
        (first_key..start).rev().chain(start..end).collect()
    }
}

impl FaultVariant for OrderReversed {
    fn applies(&self, case: &Case) -> bool {
        op_in(
            case,
            &[
                OperationKind::Scores,
                OperationKind::Attention,
                OperationKind::Stream,
            ],
        ) && case.memory_len > 1
    }
}

pub(super) const MEMORY_ORDER_REVERSED: Fault = Fault {
    id: "memory-order-reversed",
    mistake: "The memory is held newest first, while positions and distances assume oldest \
              first: each memory key is scored as if it sat at its mirror position.",
    arises: "A memory built by prepending each new row, or read back from a stack.",
    exposes: "Cases with at least two memory keys (scores, attention, stream).",
    fix: "Keep memory oldest first (key j at position p0 - M + j), or reverse it before \
          attending.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &OrderReversed,
};

pub(super) struct AfterSegment;

impl AfterSegment {
    /// Whether key `j` is read as one of the segment's own tokens (the first `L`).
    fn is_current(ctx: &WindowCtx<'_, '_>, j: usize) -> bool {
        j < ctx.window.query_len()
    }
}

impl Deviation for AfterSegment {
    fn positions(&self, ctx: &WindowCtx<'_, '_>, positions: &mut PairPositions) {
        let (m, l) = (ctx.window.memory_len() as i64, ctx.window.query_len());
        let p0 = positions.queries.first().copied().unwrap_or(0);
        for (j, p) in positions.keys.iter_mut().enumerate() {
            *p = if j < l {
                p0 + j as i64
            } else {
                p0 - m + (j - l) as i64
            };
        }
    }

    fn visible(
        &self,
        ctx: &WindowCtx<'_, '_>,
        i: usize,
        j: usize,
        _causal: bool,
        hidden: bool,
    ) -> bool {
        !hidden && (!Self::is_current(ctx, j) || j <= i)
    }
}

impl FaultVariant for AfterSegment {
    fn applies(&self, case: &Case) -> bool {
        op_in(
            case,
            &[
                OperationKind::Scores,
                OperationKind::Attention,
                OperationKind::Stream,
            ],
        ) && case.memory_len > 0
    }
}

pub(super) const MEMORY_PLACED_AFTER_SEGMENT: Fault = Fault {
    id: "memory-placed-after-segment",
    mistake: "The key axis is read as [segment ; memory] where it is [memory ; segment]: the \
              first L keys are taken for the segment's own tokens and the last M for the memory.",
    arises: "cat([h, mem]) in one place and cat([mem, h]) in another, or a kernel written for a \
             cache appended after the current tokens.",
    exposes: "Cases with memory (M > 0): scores, attention, and stream segments after the first.",
    fix: "Concatenate memory first: keys = [memory ; segment], key j at position p0 - M + j.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &AfterSegment,
};

pub(super) struct CacheNotAppended;

impl Deviation for CacheNotAppended {
    fn visible(
        &self,
        ctx: &WindowCtx<'_, '_>,
        _: usize,
        j: usize,
        causal: bool,
        hidden: bool,
    ) -> bool {
        if ctx.at.kind != StepKind::Decode {
            return causal && !hidden;
        }
        // Only the prefill's keys and the current chunk's own keys were ever cached.
        let from = ctx.at.key_step_starts[j];
        causal && !hidden && (from == 0 || from == ctx.at.start)
    }
}

impl FaultVariant for CacheNotAppended {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, &[OperationKind::Decode])
    }
}

pub(super) const DECODE_CACHE_NOT_APPENDED: Fault = Fault {
    id: "decode-cache-not-appended",
    mistake: "Decoded chunks are never appended to the cache: each chunk sees the prefill and \
              itself, not the chunks decoded before it.",
    arises: "A cache updated on a copy (a functional update whose result is dropped), or only in \
             the prefill path.",
    exposes: "decode cases with at least two chunks after the prefill, from the second chunk on.",
    fix: "Append every step's keys and values to the cache before the next step.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &CacheNotAppended,
};

/// [`CacheNotAppended`] in a kernel that takes positions from the cache's length: the
/// cache never grows past the prefill, so every chunk's tokens sit at the positions
/// right after the prefill.
pub(super) struct CacheNotAppendedStalePositions;

impl Deviation for CacheNotAppendedStalePositions {
    fn positions(&self, ctx: &WindowCtx<'_, '_>, positions: &mut PairPositions) {
        if ctx.at.kind != StepKind::Decode {
            return;
        }
        let crate::case::Operation::Decode { prefill, .. } = ctx.case.operation else {
            return;
        };
        let p0 = ctx.case.query_start;
        // The chunk's tokens at p0 + prefill + (t - start); the prefill's keys where they were.
        for (i, p) in positions.queries.iter_mut().enumerate() {
            *p = p0 + (prefill + i) as i64;
        }
        for (j, p) in positions.keys.iter_mut().enumerate() {
            let token = ctx.at.key_tokens[j];
            *p = if token >= ctx.at.start {
                p0 + (prefill + token - ctx.at.start) as i64
            } else {
                p0 + token as i64
            };
        }
    }

    fn visible(
        &self,
        ctx: &WindowCtx<'_, '_>,
        i: usize,
        j: usize,
        causal: bool,
        hidden: bool,
    ) -> bool {
        CacheNotAppended.visible(ctx, i, j, causal, hidden)
    }
}

impl FaultVariant for CacheNotAppendedStalePositions {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, &[OperationKind::Decode])
    }
}

pub(super) const DECODE_CACHE_NOT_APPENDED_STALE_POSITIONS: Fault = Fault {
    id: "decode-cache-not-appended-stale-positions",
    mistake: "Decoded chunks are never appended to the cache, and positions are taken from the \
              cache's length: each chunk sees the prefill and itself, and every chunk's tokens \
              sit at the positions right after the prefill.",
    arises: "A cache updated on a copy (or only in the prefill path) in a model that derives \
             the next positions from the number of cached tokens, as most decoding loops do.",
    exposes: "decode cases with at least two chunks after the prefill, from the second chunk on \
              (every scheme: the distances to the prefill's keys shrink).",
    fix: "Append every step's keys and values to the cache before the next step; the positions \
          then follow.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &CacheNotAppendedStalePositions,
};
