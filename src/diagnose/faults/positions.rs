//! Mistakes in the absolute positions given to queries and keys.

use std::collections::BTreeMap;

use ndarray::ArrayD;

use super::{op_in, scheme_in, ABSOLUTE, ATTENDING};
use crate::case::{Case, OperationKind};
use crate::diagnose::{Fault, FaultKind, FaultVariant, Matching};
use crate::error::Result;
use crate::scheme::model::PairPositions;
use crate::variant::{Deviation, StepKind, WindowCtx};

/// Every token at `p0` plus its offset inside its own step (segment or chunk).
fn positions_within_steps(ctx: &WindowCtx<'_, '_>, positions: &mut PairPositions) {
    let p0 = ctx.case.query_start;
    for (i, p) in positions.queries.iter_mut().enumerate() {
        *p = p0 + i as i64;
    }
    for (j, p) in positions.keys.iter_mut().enumerate() {
        *p = p0 + (ctx.at.key_tokens[j] - ctx.at.key_step_starts[j]) as i64;
    }
}

pub(super) struct RestartEachSegment;

impl Deviation for RestartEachSegment {
    fn positions(&self, ctx: &WindowCtx<'_, '_>, positions: &mut PairPositions) {
        if ctx.at.kind == StepKind::Segment {
            positions_within_steps(ctx, positions);
        }
    }
}

impl FaultVariant for RestartEachSegment {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, &[OperationKind::Stream]) && scheme_in(case, ABSOLUTE)
    }
}

pub(super) const POSITIONS_RESTART_EACH_SEGMENT: Fault = Fault {
    id: "positions-restart-each-segment",
    mistake: "Absolute positions restart at p0 in every stream segment, so tokens t and t + L \
              share an encoding (position aliasing) and memory keys carry their old segment's \
              positions.",
    arises: "Positions computed as arange(L) per forward call in a model that carries memory \
             across calls, instead of continuing from the tokens already seen.",
    exposes: "stream cases of absolute schemes (sinusoidal, learned, rotary), from the second \
              segment on.",
    fix: "Keep a running position counter across segments: the segment starting at token s \
          places its queries at p0 + s + i and its memory keys at their own absolute positions.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &RestartEachSegment,
};

pub(super) struct DecodeOffsetMissing;

impl Deviation for DecodeOffsetMissing {
    fn positions(&self, ctx: &WindowCtx<'_, '_>, positions: &mut PairPositions) {
        if ctx.at.kind == StepKind::Decode {
            positions_within_steps(ctx, positions);
        }
    }
}

impl FaultVariant for DecodeOffsetMissing {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, &[OperationKind::Decode]) && scheme_in(case, ABSOLUTE)
    }
}

pub(super) const DECODE_OFFSET_MISSING: Fault = Fault {
    id: "decode-offset-missing",
    mistake: "In cached decoding every chunk is positioned from p0 instead of from p0 + the cache \
              length: new queries and keys get the positions of the prefill's first tokens.",
    arises: "A position (or rotary cache) index taken from the chunk alone, or a start-position \
             argument left at 0 when the cache is non-empty.",
    exposes: "decode cases of absolute schemes (sinusoidal, learned, rotary): every row after \
              the prefill.",
    fix: "Position chunk tokens at p0 + cache_len + i, and keep each cached key at the position \
          it was written with.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &DecodeOffsetMissing,
};

pub(super) struct StartIgnored;

impl Deviation for StartIgnored {
    fn positions(&self, ctx: &WindowCtx<'_, '_>, positions: &mut PairPositions) {
        let p0 = ctx.case.query_start;
        for p in positions
            .queries
            .iter_mut()
            .chain(positions.keys.iter_mut())
        {
            *p -= p0;
        }
    }
}

impl FaultVariant for StartIgnored {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, ATTENDING) && scheme_in(case, ABSOLUTE) && case.query_start != 0
    }
}

pub(super) const QUERY_START_IGNORED: Fault = Fault {
    id: "query-start-ignored",
    mistake: "The case's starting position p0 is ignored: the first query is placed at 0 (and \
              memory keys at negative positions) instead of at p0.",
    arises: "A kernel that derives positions from array indices alone and never reads the start \
             offset (position_ids defaulting to arange).",
    exposes: "Attending cases of absolute schemes with p0 != 0 (the suite's offset cases; random \
              cases draw positions far from 0).",
    fix: "Place query i at p0 + i and key j at p0 - M + j.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &StartIgnored,
};

pub(super) struct OneBased;

impl Deviation for OneBased {
    fn inputs(&self, case: &Case, arrays: &mut BTreeMap<String, ArrayD<f64>>) -> Result<()> {
        if case.operation.kind() == OperationKind::Encode {
            if let Some(p) = arrays.get_mut("positions") {
                p.mapv_inplace(|x| x + 1.0);
            }
        }
        Ok(())
    }

    fn positions(&self, _: &WindowCtx<'_, '_>, positions: &mut PairPositions) {
        for p in positions
            .queries
            .iter_mut()
            .chain(positions.keys.iter_mut())
        {
            *p += 1;
        }
    }
}

impl FaultVariant for OneBased {
    fn applies(&self, case: &Case) -> bool {
        scheme_in(case, ABSOLUTE)
    }
}

pub(super) const POSITIONS_ONE_BASED: Fault = Fault {
    id: "positions-one-based",
    mistake: "Positions are counted from 1: every token sits one position later than it should.",
    arises: "arange(1, L + 1) for position ids, or positions taken from a cumulative sum of a \
             padding mask (which starts at 1).",
    exposes: "Every case of an absolute scheme (sinusoidal, learned, rotary), encode included.",
    fix: "Count positions from 0: the first token of a sequence (p0 = 0) is at position 0.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &OneBased,
};
