//! Mistakes in ALiBi (Press et al. 2022): the head slopes and the form of the bias.

use ndarray::{Array1, Array3, ArrayD, ArrayView3};

use super::{op_in, scheme_in, ATTENDING};
use crate::case::{Case, OperationKind};
use crate::diagnose::{Fault, FaultKind, FaultVariant, Matching};
use crate::error::Result;
use crate::scheme::alibi::slopes;
use crate::scheme::model::{Inputs, PairPositions};
use crate::scheme::Scheme;
use crate::variant::{Deviation, WindowCtx};

fn is_alibi(case: &Case) -> bool {
    scheme_in(case, &[Scheme::Alibi])
}

/// A wrong slope rule: `wrong(h, H)` from the published slopes.
pub(super) struct Slopes {
    wrong: fn(&[f64], usize) -> f64,
}

impl Slopes {
    fn slopes(&self, heads: usize) -> Result<Vec<f64>> {
        let right = slopes(heads)?;
        Ok((0..heads).map(|h| (self.wrong)(&right, h)).collect())
    }
}

impl Deviation for Slopes {
    fn encode(&self, case: &Case, _: &Inputs<'_, '_>, _table: ArrayD<f64>) -> Result<ArrayD<f64>> {
        Ok(Array1::from(self.slopes(case.heads)?).into_dyn())
    }

    fn scores(
        &self,
        ctx: &WindowCtx<'_, '_>,
        _q: ArrayView3<'_, f64>,
        _k: ArrayView3<'_, f64>,
        positions: &PairPositions,
        mut scores: Array3<f64>,
    ) -> Result<Array3<f64>> {
        let right = slopes(ctx.case.heads)?;
        let wrong = self.slopes(ctx.case.heads)?;
        for ((h, i, j), s) in scores.indexed_iter_mut() {
            *s += (right[h] - wrong[h]) * positions.distance(i, j) as f64;
        }
        Ok(scores)
    }
}

impl FaultVariant for Slopes {
    fn applies(&self, case: &Case) -> bool {
        is_alibi(case)
    }
}

/// `2^(-8(h+1)/H)` for every head count.
fn geometric(_: &[f64], h: usize, heads: usize) -> f64 {
    libm::exp2(-8.0 * (h + 1) as f64 / heads as f64)
}

pub(super) const ALIBI_POWER_OF_TWO_RULE_FOR_ALL_HEADS: Fault = Fault {
    id: "alibi-power-of-two-rule-for-all-heads",
    mistake: "The geometric slopes 2^(-8(h+1)/H) are used for a head count that is not a power of \
              two, where the paper takes the slopes of the next lower power of two and fills in \
              every other slope of the next higher one.",
    arises: "Only the power-of-two branch of the slope function implemented (it is the one in \
             the paper's main text).",
    exposes: "ALiBi cases whose head count is not a power of two (6, 12, …), encode included.",
    fix: "For H not a power of two, with c = 2^floor(log2 H): the c slopes for c heads, then the \
          first H - c of the slopes for 2c heads taken at even indices.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &Slopes {
        wrong: |right, h| geometric(right, h, right.len()),
    },
};

pub(super) const ALIBI_SLOPE_EXPONENT_OFF_BY_ONE: Fault = Fault {
    id: "alibi-slope-exponent-off-by-one",
    mistake: "The slope exponent starts from h = 0: 2^(-8h/H) instead of 2^(-8(h+1)/H), so the \
              first head gets slope 1 and every slope is 2^(8/H) too large.",
    arises: "range(H) for range(1, H + 1) in the slope formula.",
    exposes: "Every ALiBi case (encode returns the slopes themselves).",
    fix: "m_h = 2^(-8(h+1)/H) for h = 0 .. H-1 (for a power-of-two H).",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &Slopes {
        wrong: |right, h| right[h] * libm::exp2(8.0 / right.len() as f64),
    },
};

pub(super) const ALIBI_SLOPES_REVERSED: Fault = Fault {
    id: "alibi-slopes-reversed",
    mistake: "The slopes are assigned to the heads in reverse order (the smallest slope on head \
              0).",
    arises: "Slopes generated in ascending order, or a head axis flipped between the slope table \
             and the scores.",
    exposes: "Every ALiBi case with more than one head.",
    fix: "Head 0 gets the largest slope: m_0 > m_1 > … > m_{H-1}.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &Slopes {
        wrong: |right, h| right[right.len() - 1 - h],
    },
};

pub(super) struct SignFlipped;

impl Deviation for SignFlipped {
    fn scores(
        &self,
        ctx: &WindowCtx<'_, '_>,
        _q: ArrayView3<'_, f64>,
        _k: ArrayView3<'_, f64>,
        positions: &PairPositions,
        mut scores: Array3<f64>,
    ) -> Result<Array3<f64>> {
        let m = slopes(ctx.case.heads)?;
        for ((h, i, j), s) in scores.indexed_iter_mut() {
            *s += 2.0 * m[h] * positions.distance(i, j) as f64;
        }
        Ok(scores)
    }
}

impl FaultVariant for SignFlipped {
    fn applies(&self, case: &Case) -> bool {
        is_alibi(case) && op_in(case, ATTENDING)
    }
}

pub(super) const ALIBI_BIAS_SIGN_FLIPPED: Fault = Fault {
    id: "alibi-bias-sign-flipped",
    mistake: "The ALiBi distance has the wrong sign: +m·(i - j) is added where -m·(i - j) is \
              meant, so distant keys are favoured instead of penalised.",
    arises: "A distance matrix built as i - j where j - i was meant (or the reverse) before \
             multiplying by the slope.",
    exposes: "ALiBi scores, attention, stream and decode cases.",
    fix: "bias[h, i, j] = -m_h · (pos_i - pos_j), which is 0 on the diagonal and negative for \
          earlier keys.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &SignFlipped,
};

pub(super) struct KeyPosition;

impl Deviation for KeyPosition {
    fn scores(
        &self,
        ctx: &WindowCtx<'_, '_>,
        _q: ArrayView3<'_, f64>,
        _k: ArrayView3<'_, f64>,
        positions: &PairPositions,
        mut scores: Array3<f64>,
    ) -> Result<Array3<f64>> {
        // m·pos_j = -m·(pos_i - pos_j) + m·pos_i: a constant per query row.
        let m = slopes(ctx.case.heads)?;
        for ((h, i, _), s) in scores.indexed_iter_mut() {
            *s += m[h] * positions.queries[i] as f64;
        }
        Ok(scores)
    }
}

impl FaultVariant for KeyPosition {
    fn applies(&self, case: &Case) -> bool {
        is_alibi(case) && op_in(case, &[OperationKind::Scores])
    }
}

pub(super) const ALIBI_BIAS_FROM_KEY_POSITION: Fault = Fault {
    id: "alibi-bias-from-key-position",
    mistake: "The bias is written m·pos_j (the key's position alone) instead of -m·(pos_i - \
              pos_j). The two differ by m·pos_i, a constant along each query row, so \
              probabilities and outputs agree; only the scores differ.",
    arises: "The form used by several ALiBi implementations (a bias that broadcasts over \
             queries), valid because softmax ignores per-row constants.",
    exposes: "ALiBi scores cases only: attention, stream and decode cases pass.",
    fix: "If the kernel reports scores, add -m_h·(pos_i - pos_j); if it only reports \
          probabilities or outputs, nothing is wrong.",
    kind: FaultKind::Convention,
    matching: Matching::Values,
    variant: &KeyPosition,
};
