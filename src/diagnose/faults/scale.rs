//! Mistakes in the score scale.

use ndarray::{Array3, ArrayView3};

use super::{op_in, scheme_in, ATTENDING};
use crate::attention::Scale;
use crate::case::Case;
use crate::diagnose::{Fault, FaultKind, FaultVariant, Matching};
use crate::error::Result;
use crate::scheme::model::PairPositions;
use crate::scheme::Scheme;
use crate::variant::{Deviation, WindowCtx};

/// The case's score scale factor.
fn factor(case: &Case) -> f64 {
    case.scheme.scale().factor(case.head_dim)
}

/// The scheme's unmasked scores of the window at another scale.
fn scores_at_scale(
    ctx: &WindowCtx<'_, '_>,
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    positions: &PairPositions,
    scale: f64,
) -> Result<Array3<f64>> {
    ctx.case.model().pair_scores(
        &ctx.case.shape(),
        &ctx.inputs,
        q,
        k,
        positions,
        Scale::Fixed(scale),
    )
}

pub(super) struct Missing;

impl Deviation for Missing {
    fn scale(&self, _: &WindowCtx<'_, '_>, _: Scale) -> Scale {
        Scale::Fixed(1.0)
    }
}

impl FaultVariant for Missing {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, ATTENDING) && factor(case) != 1.0
    }
}

pub(super) const SCALE_MISSING: Fault = Fault {
    id: "scale-missing",
    mistake: "The scores are not scaled: q·k is used where scale·q·k is meant (1/sqrt(d) by \
              default).",
    arises: "A kernel written from the score formula without its normalisation, or a scale \
             parameter that silently defaults to 1.",
    exposes: "Every scores, attention, stream and decode case whose scale is not 1.",
    fix: "Multiply the scores by the case's scale (1/sqrt(d) unless the scheme fixes another) \
          before the bias terms that are not scaled and before the softmax.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &Missing,
};

pub(super) struct OneOverD;

impl Deviation for OneOverD {
    fn scale(&self, ctx: &WindowCtx<'_, '_>, _: Scale) -> Scale {
        Scale::Fixed(1.0 / ctx.case.head_dim as f64)
    }
}

impl FaultVariant for OneOverD {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, ATTENDING) && case.scheme.scale() == Scale::InverseSqrtDim && case.head_dim > 1
    }
}

pub(super) const SCALE_ONE_OVER_D: Fault = Fault {
    id: "scale-one-over-d",
    mistake: "The scores are scaled by 1/d instead of 1/sqrt(d).",
    arises: "d ** -1 for d ** -0.5, or a query pre-scaled by 1/sqrt(d) and the product divided \
             by sqrt(d) again.",
    exposes: "Every attending case with the default scale and d > 1.",
    fix: "Scale by 1/sqrt(d), once.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &OneOverD,
};

pub(super) struct Twice;

impl Deviation for Twice {
    fn scale(&self, ctx: &WindowCtx<'_, '_>, _: Scale) -> Scale {
        Scale::Fixed(factor(ctx.case).powi(2))
    }
}

impl FaultVariant for Twice {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, ATTENDING)
            && factor(case) != 1.0
            && case.scheme.scale() != Scale::InverseSqrtDim
    }
}

pub(super) const SCALE_APPLIED_TWICE: Fault = Fault {
    id: "scale-applied-twice",
    mistake: "A fixed score scale is applied twice (scale² · q·k).",
    arises: "The query pre-multiplied by the scale in one place and the scores multiplied by it \
             again in another.",
    exposes: "Attending cases with a fixed scale other than 1 (with the default 1/sqrt(d) the \
              same mistake is scale-one-over-d).",
    fix: "Apply the scale once, either to q or to the scores.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &Twice,
};

pub(super) struct OnBias;

impl Deviation for OnBias {
    fn scores(
        &self,
        ctx: &WindowCtx<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        positions: &PairPositions,
        _scores: Array3<f64>,
    ) -> Result<Array3<f64>> {
        // (q·k + bias) · scale: the unscaled scores, scaled as a whole.
        Ok(scores_at_scale(ctx, q, k, positions, 1.0)? * factor(ctx.case))
    }
}

impl FaultVariant for OnBias {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, ATTENDING)
            && scheme_in(case, &[Scheme::Alibi, Scheme::Bucketed])
            && factor(case) != 1.0
    }
}

pub(super) const SCALE_APPLIED_TO_BIAS: Fault = Fault {
    id: "scale-applied-to-bias",
    mistake: "The score scale is applied to the positional bias as well as to q·k: \
              scale·(q·k + bias) where scale·q·k + bias is meant (ALiBi, bucketed bias).",
    arises: "The bias added before the scaling step of a generic attention function, or the bias \
             folded into the mask that is added before the scale.",
    exposes: "ALiBi and bucketed cases whose scale is not 1.",
    fix: "Add the bias after scaling q·k: softmax(scale · q·kᵀ + bias).",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &OnBias,
};

pub(super) struct SkipsPosition;

impl Deviation for SkipsPosition {
    fn scores(
        &self,
        ctx: &WindowCtx<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        positions: &PairPositions,
        _scores: Array3<f64>,
    ) -> Result<Array3<f64>> {
        // scale · content + position terms, with the content (q + u)·k for
        // Transformer-XL and q·k for clipped.
        let mut queries = q.to_owned();
        if ctx.case.scheme.scheme() == Scheme::XlRelative {
            let u = ctx.inputs.get2("content_bias")?;
            for (mut qh, uh) in queries.outer_iter_mut().zip(u.outer_iter()) {
                for mut row in qh.outer_iter_mut() {
                    row += &uh;
                }
            }
        }
        let content = crate::scheme::model::head_products(&queries, &k.to_owned(), 1.0);
        let whole = scores_at_scale(ctx, q, k, positions, 1.0)?;
        Ok(&content * factor(ctx.case) + (whole - &content))
    }
}

impl FaultVariant for SkipsPosition {
    fn applies(&self, case: &Case) -> bool {
        op_in(case, ATTENDING)
            && scheme_in(case, &[Scheme::XlRelative, Scheme::Clipped])
            && factor(case) != 1.0
    }
}

pub(super) const SCALE_SKIPS_POSITION_TERM: Fault = Fault {
    id: "scale-skips-position-term",
    mistake: "Only the content term is scaled; the relative position terms are added unscaled \
              (Transformer-XL and clipped relative scores scale every term).",
    arises: "Scaling inside the q·k product helper while the position terms are computed and \
             added elsewhere.",
    exposes: "xl_relative and clipped cases whose scale is not 1.",
    fix: "Scale the sum of all terms: scale · (content + position terms).",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &SkipsPosition,
};
