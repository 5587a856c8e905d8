//! Mistakes in Transformer-XL relative scoring (Dai et al. 2019, §3.3): the relative
//! shift, the order of the relative sequence, the global biases u and v, and the
//! position term.
//!
//! The shift faults are computed the way a kernel makes them: the efficient form, one
//! product `(q + v)·r_seqᵀ` over the whole key axis, then the pad-and-reshape shift
//! (with its garbage in the entries the mask normally hides).

use std::collections::BTreeMap;

use ndarray::{Array2, Array3, ArrayD, ArrayView3, Axis};

use super::{op_in, scheme_in, ATTENDING};
use crate::case::Case;
use crate::diagnose::{Fault, FaultKind, FaultVariant, Matching};
use crate::error::{Error, Result};
use crate::math::product::matmul;
use crate::scheme::model::PairPositions;
use crate::scheme::Scheme;
use crate::scheme::SchemeSpec;
use crate::variant::{Deviation, WindowCtx};

fn is_xl(case: &Case) -> bool {
    scheme_in(case, &[Scheme::XlRelative])
}

/// The order in which a kernel lays out the relative sequence before the shift.
#[derive(Clone, Copy, PartialEq)]
enum Order {
    /// Distances `K-1, …, 0` (the published layout).
    Descending,
    /// Distances `0, …, K-1`.
    Ascending,
}

/// The side the zero column is padded on in the shift.
#[derive(Clone, Copy, PartialEq)]
enum Pad {
    /// Left (the published shift, [`crate::xl_relative::rel_shift`]).
    Left,
    /// Right: every entry reads one distance too short.
    Right,
}

/// `(q + bias)` per head, `[L, d]`.
fn biased(q: ArrayView3<'_, f64>, bias: ndarray::ArrayView2<'_, f64>, h: usize) -> Array2<f64> {
    &q.index_axis(Axis(0), h) + &bias.row(h)
}

/// The pad-and-reshape shift of `bd[L, K]` with the zero column on `pad`'s side.
fn shift(bd: &Array2<f64>, pad: Pad) -> Array2<f64> {
    let (l, k) = bd.dim();
    Array2::from_shape_fn((l, k), |(i, j)| {
        let flat = l + i * k + j;
        let (row, col) = (flat / (k + 1), flat % (k + 1));
        match pad {
            Pad::Left if col == 0 => 0.0,
            Pad::Left => bd[[row, col - 1]],
            Pad::Right if col == k => 0.0,
            Pad::Right => bd[[row, col]],
        }
    })
}

/// Transformer-XL scores of one window in the efficient form, every entry (no mask):
/// `scale · ((q + u)·kᵀ + shift((q + v)·r_seqᵀ))`.
fn efficient(
    ctx: &WindowCtx<'_, '_>,
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    order: Order,
    pad: Pad,
) -> Result<Array3<f64>> {
    let SchemeSpec::XlRelative(spec) = &ctx.case.scheme else {
        return Err(Error::param(
            "scheme",
            "xl_relative",
            ctx.case.scheme.scheme().name(),
        ));
    };
    let (r, u, v) = (
        ctx.inputs.get3("r")?,
        ctx.inputs.get2("content_bias")?,
        ctx.inputs.get2("position_bias")?,
    );
    let factor = spec.scale.factor(ctx.case.head_dim);
    let (heads, l, _) = q.dim();
    let key_len = k.dim().1;
    let rows = r.dim().1;
    let mut out = Array3::zeros((heads, l, key_len));
    for h in 0..heads {
        let sequence = Array2::from_shape_fn((key_len, r.dim().2), |(c, x)| {
            let distance = match order {
                Order::Descending => key_len - 1 - c,
                Order::Ascending => c,
            };
            let row = spec.clamp_len.map_or(distance, |clamp| distance.min(clamp));
            if row < rows {
                r[[h, row, x]]
            } else {
                f64::NAN
            }
        });
        let ac = matmul(&biased(q, u, h), &k.index_axis(Axis(0), h).t());
        let bd = shift(&matmul(&biased(q, v, h), &sequence.t()), pad);
        out.index_axis_mut(Axis(0), h).assign(&((ac + bd) * factor));
    }
    Ok(out)
}

/// A kernel with its own pad-and-reshape relative shift: the sequence laid out in
/// `order`, the zero column on `pad`'s side, and (with `unmasked`) no causal mask over
/// the entries the shift fills with garbage.
pub(super) struct EfficientShift {
    order: Order,
    pad: Pad,
    unmasked: bool,
}

impl Deviation for EfficientShift {
    fn scores(
        &self,
        ctx: &WindowCtx<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        _: &PairPositions,
        _: Array3<f64>,
    ) -> Result<Array3<f64>> {
        efficient(ctx, q, k, self.order, self.pad)
    }

    fn visible(
        &self,
        _: &WindowCtx<'_, '_>,
        _: usize,
        _: usize,
        causal: bool,
        hidden: bool,
    ) -> bool {
        (causal || self.unmasked) && !hidden
    }
}

impl FaultVariant for EfficientShift {
    fn applies(&self, case: &Case) -> bool {
        is_xl(case) && op_in(case, ATTENDING)
    }
}

pub(super) const REL_SHIFT_OFF_BY_ONE: Fault = Fault {
    id: "rel-shift-off-by-one",
    mistake: "The relative shift is off by one: the zero column is padded on the right instead of \
              the left, so every score reads the embedding of distance Δ - 1 (and distance 0 reads \
              a zero).",
    arises: "F.pad(x, (0, 1)) for F.pad(x, (1, 0)) in the pad-and-reshape shift, or a slice that \
             drops the wrong row after the reshape.",
    exposes: "Every xl_relative scores, attention, stream and decode case: the position terms \
              are wrong along whole distance diagonals.",
    fix: "Pad the zero column on the left, reshape to [K+1, L], drop the first row, reshape back \
          (or index r by Δ = M + i - j directly).",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &EfficientShift {
        order: Order::Descending,
        pad: Pad::Right,
        unmasked: false,
    },
};

pub(super) const REL_SHIFT_GARBAGE_UNMASKED: Fault = Fault {
    id: "rel-shift-garbage-unmasked",
    mistake: "The entries the relative shift fills with garbage (keys after the query, which \
              read the next row's values and a zero) are not masked, so they take probability.",
    arises: "The causal mask dropped in a Transformer-XL kernel on the reasoning that relative \
             scores make it unnecessary.",
    exposes: "Every xl_relative case with L > 1: masked scores come back finite.",
    fix: "Apply the causal mask over [memory ; segment] after the shift: key j is visible to \
          query i iff j <= M + i.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &EfficientShift {
        order: Order::Descending,
        pad: Pad::Left,
        unmasked: true,
    },
};

pub(super) const RELATIVE_SEQUENCE_ASCENDING: Fault = Fault {
    id: "relative-sequence-ascending",
    mistake: "The relative sequence is built ascending (distances 0 .. K-1) instead of descending \
              before the shift, so distance Δ reads the embedding of K-1-Δ: the position terms \
              are mirrored.",
    arises: "arange(0, K) for arange(K - 1, -1, -1) when building pos_seq, or the embedding \
             table flipped on load.",
    exposes: "Every xl_relative scores, attention, stream and decode case with K > 1.",
    fix: "Build the sequence descending, K-1 down to 0, so that after the shift query i and key j \
          read distance M + i - j.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &EfficientShift {
        order: Order::Ascending,
        pad: Pad::Left,
        unmasked: false,
    },
};

/// Replaces the named bias arrays.
fn set_biases(
    arrays: &mut BTreeMap<String, ArrayD<f64>>,
    content: Option<ArrayD<f64>>,
    position: Option<ArrayD<f64>>,
) {
    if let Some(c) = content {
        arrays.insert("content_bias".into(), c);
    }
    if let Some(p) = position {
        arrays.insert("position_bias".into(), p);
    }
}

pub(super) struct BiasesMissing {
    content: bool,
    position: bool,
}

impl Deviation for BiasesMissing {
    fn inputs(&self, case: &Case, arrays: &mut BTreeMap<String, ArrayD<f64>>) -> Result<()> {
        if !is_xl(case) {
            return Ok(());
        }
        let zeros = |name: &str| arrays.get(name).map(|a| ArrayD::zeros(a.raw_dim()));
        let content = if self.content {
            zeros("content_bias")
        } else {
            None
        };
        let position = if self.position {
            zeros("position_bias")
        } else {
            None
        };
        set_biases(arrays, content, position);
        Ok(())
    }
}

impl FaultVariant for BiasesMissing {
    fn applies(&self, case: &Case) -> bool {
        is_xl(case) && op_in(case, ATTENDING)
    }
}

pub(super) const XL_BIASES_MISSING: Fault = Fault {
    id: "xl-biases-missing",
    mistake: "The global biases u and v are left out: the score is q·k + q·r instead of \
              (q + u)·k + (q + v)·r (terms c and d missing).",
    arises: "A port from a relative-attention variant without global biases, or u and v never \
             passed to the kernel.",
    exposes: "xl_relative scores, attention, stream and decode cases.",
    fix: "Add u to the query for the content term and v for the position term (r_w_bias and \
          r_r_bias in the authors' code).",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &BiasesMissing {
        content: true,
        position: true,
    },
};

pub(super) const XL_POSITION_BIAS_MISSING: Fault = Fault {
    id: "xl-position-bias-missing",
    mistake: "The global position bias v is left out: the position term is q·r instead of \
              (q + v)·r (term d missing).",
    arises: "Only the content bias wired in, the position bias parameter created but unused.",
    exposes: "xl_relative scores, attention, stream and decode cases.",
    fix: "Add v to the query before the product with r.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &BiasesMissing {
        content: false,
        position: true,
    },
};

pub(super) const XL_CONTENT_BIAS_MISSING: Fault = Fault {
    id: "xl-content-bias-missing",
    mistake: "The global content bias u is left out: the content term is q·k instead of \
              (q + u)·k (term c missing).",
    arises: "Only the position bias wired in, or u folded into a query projection that the \
             kernel does not apply.",
    exposes: "xl_relative scores, attention, stream and decode cases.",
    fix: "Add u to the query before the product with the keys.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &BiasesMissing {
        content: true,
        position: false,
    },
};

pub(super) struct BiasesSwapped;

impl Deviation for BiasesSwapped {
    fn inputs(&self, case: &Case, arrays: &mut BTreeMap<String, ArrayD<f64>>) -> Result<()> {
        if is_xl(case) {
            let content = arrays.remove("content_bias");
            let position = arrays.remove("position_bias");
            set_biases(arrays, position, content);
        }
        Ok(())
    }
}

impl FaultVariant for BiasesSwapped {
    fn applies(&self, case: &Case) -> bool {
        is_xl(case) && op_in(case, ATTENDING)
    }
}

pub(super) const XL_BIASES_SWAPPED: Fault = Fault {
    id: "xl-biases-swapped",
    mistake: "The global biases are swapped: v is added for the content term and u for the \
              position term.",
    arises: "Two bias parameters with similar names (r_w_bias, r_r_bias) passed in the wrong \
             order.",
    exposes: "xl_relative scores, attention, stream and decode cases.",
    fix: "The content term uses u: (q + u)·k; the position term uses v: (q + v)·r.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &BiasesSwapped,
};

pub(super) struct PositionUsesKeys;

impl Deviation for PositionUsesKeys {
    fn scores(
        &self,
        ctx: &WindowCtx<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        _: &PairPositions,
        _: Array3<f64>,
    ) -> Result<Array3<f64>> {
        let SchemeSpec::XlRelative(spec) = &ctx.case.scheme else {
            return Err(Error::param(
                "scheme",
                "xl_relative",
                ctx.case.scheme.scheme().name(),
            ));
        };
        let (u, v) = (
            ctx.inputs.get2("content_bias")?,
            ctx.inputs.get2("position_bias")?,
        );
        let factor = spec.scale.factor(ctx.case.head_dim);
        // (q + u)·k + (q + v)·k: the position term projected like a key.
        let mut queries = Array3::zeros(q.raw_dim());
        for h in 0..q.dim().0 {
            let sum = &biased(q, u, h) + &biased(q, v, h);
            queries.index_axis_mut(Axis(0), h).assign(&sum);
        }
        Ok(crate::scheme::model::head_products(
            &queries,
            &k.to_owned(),
            factor,
        ))
    }
}

impl FaultVariant for PositionUsesKeys {
    fn applies(&self, case: &Case) -> bool {
        is_xl(case) && op_in(case, ATTENDING)
    }
}

pub(super) const XL_POSITION_TERM_USES_KEYS: Fault = Fault {
    id: "xl-position-term-uses-keys",
    mistake: "The position term uses the keys (the key projection) where it must use the \
              projected relative embeddings r = W_kR·R_Δ: (q + v)·k_j instead of (q + v)·r_Δ.",
    arises: "The key projection reused for the relative embeddings, or the wrong tensor passed \
             to the position-term product.",
    exposes: "xl_relative scores, attention, stream and decode cases.",
    fix: "Project the sinusoid with its own weight W_kR and index the result by distance.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &PositionUsesKeys,
};
