//! Mistakes in sinusoid tables: the absolute sinusoidal scheme, and the sinusoid a
//! Transformer-XL kernel projects into its relative embeddings (`encode`).

use ndarray::{Array2, Array3, ArrayD, ArrayView3};

use super::{op_in, scheme_in};
use crate::case::{Case, OperationKind};
use crate::diagnose::{Fault, FaultKind, FaultVariant, Matching};
use crate::error::Result;
use crate::scheme::model::{head_products, Inputs, PairPositions};
use crate::scheme::sinusoidal::{Sinusoid, SinusoidLayout, DEFAULT_BASE};
use crate::scheme::xl_relative::relative_embeddings;
use crate::scheme::{Scheme, SchemeSpec};
use crate::variant::{Deviation, WindowCtx};

/// The sinusoid a case uses: the sinusoidal scheme's own, or Transformer-XL's
/// concatenated one of width `d`.
fn sinusoid_of(case: &Case) -> Result<Sinusoid> {
    match &case.scheme {
        SchemeSpec::Sinusoidal(spec) => Sinusoid::new(case.head_dim, spec.base, spec.layout),
        _ => Sinusoid::new(case.head_dim, DEFAULT_BASE, SinusoidLayout::Concatenated),
    }
}

fn is_xl_encode(case: &Case) -> bool {
    scheme_in(case, &[Scheme::XlRelative]) && op_in(case, &[OperationKind::Encode])
}

/// The `encode` output of a case built from a (faulty) sinusoid table function.
fn encode_with(
    case: &Case,
    inputs: &Inputs<'_, '_>,
    table: &dyn Fn(&[i64]) -> Array2<f64>,
) -> Result<ArrayD<f64>> {
    if scheme_in(case, &[Scheme::XlRelative]) {
        let positions: Vec<i64> = (0..case.key_len() as i64).collect();
        let t = table(&positions);
        let w = inputs.get3("w_kr")?;
        let mut out = Array3::zeros((case.heads, positions.len(), case.head_dim));
        for (mut o, wh) in out.outer_iter_mut().zip(w.outer_iter()) {
            o.assign(&crate::math::product::matmul(&t, &wh));
        }
        Ok(out.into_dyn())
    } else {
        Ok(table(&inputs.positions("positions")?).into_dyn())
    }
}

/// Scores of the sinusoidal scheme with a (faulty) table function.
fn scores_with(
    ctx: &WindowCtx<'_, '_>,
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    positions: &PairPositions,
    table: &dyn Fn(&[i64]) -> Array2<f64>,
) -> Array3<f64> {
    let q = &q + &table(&positions.queries);
    let k = &k + &table(&positions.keys);
    let factor = ctx.case.scheme.scale().factor(ctx.case.head_dim);
    head_products(&q, &k, factor)
}

pub(super) struct LayoutSwapped;

impl LayoutSwapped {
    fn other(layout: SinusoidLayout) -> SinusoidLayout {
        match layout {
            SinusoidLayout::Interleaved => SinusoidLayout::Concatenated,
            SinusoidLayout::Concatenated => SinusoidLayout::Interleaved,
        }
    }
}

impl Deviation for LayoutSwapped {
    fn case(&self, case: &Case) -> Option<Case> {
        let SchemeSpec::Sinusoidal(spec) = &case.scheme else {
            return None;
        };
        let mut case = case.clone();
        let mut spec = *spec;
        spec.layout = Self::other(spec.layout);
        case.scheme = SchemeSpec::Sinusoidal(spec);
        Some(case)
    }

    fn encode(
        &self,
        case: &Case,
        inputs: &Inputs<'_, '_>,
        table: ArrayD<f64>,
    ) -> Result<ArrayD<f64>> {
        if !is_xl_encode(case) {
            return Ok(table);
        }
        let pe = Sinusoid::new(case.head_dim, DEFAULT_BASE, SinusoidLayout::Interleaved)?;
        Ok(relative_embeddings(&pe, inputs.get3("w_kr")?, case.key_len())?.into_dyn())
    }
}

impl FaultVariant for LayoutSwapped {
    fn applies(&self, case: &Case) -> bool {
        scheme_in(case, &[Scheme::Sinusoidal]) || is_xl_encode(case)
    }
}

pub(super) const SINUSOID_LAYOUT_SWAPPED: Fault = Fault {
    id: "sinusoid-layout-swapped",
    mistake: "The sinusoid's layout is swapped: sines and cosines interleaved [sin ω0, cos ω0, \
              …] where they are concatenated [sin …, cos …] (or the reverse).",
    arises: "torch.stack(..., -1).flatten() against torch.cat(..., -1): both appear in published \
             code (the original Transformer interleaves, Transformer-XL concatenates).",
    exposes: "sinusoidal cases of every operation, and xl_relative encode.",
    fix: "Use the layout the case names (the scheme's `layout`; concatenated for \
          Transformer-XL's relative embeddings).",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &LayoutSwapped,
};

pub(super) struct SineCosineSwapped;

impl SineCosineSwapped {
    fn table(pe: &Sinusoid, positions: &[i64]) -> Array2<f64> {
        let mut t = pe.table(positions);
        let width = pe.width();
        for i in 0..width / 2 {
            let (a, b) = pe.layout().pair_indices(i, width);
            for mut row in t.rows_mut() {
                row.swap(a, b);
            }
        }
        t
    }
}

impl Deviation for SineCosineSwapped {
    fn encode(
        &self,
        case: &Case,
        inputs: &Inputs<'_, '_>,
        _table: ArrayD<f64>,
    ) -> Result<ArrayD<f64>> {
        let pe = sinusoid_of(case)?;
        encode_with(case, inputs, &|p| Self::table(&pe, p))
    }

    fn scores(
        &self,
        ctx: &WindowCtx<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        positions: &PairPositions,
        _: Array3<f64>,
    ) -> Result<Array3<f64>> {
        let pe = sinusoid_of(ctx.case)?;
        Ok(scores_with(ctx, q, k, positions, &|p| Self::table(&pe, p)))
    }
}

impl FaultVariant for SineCosineSwapped {
    fn applies(&self, case: &Case) -> bool {
        scheme_in(case, &[Scheme::Sinusoidal]) || is_xl_encode(case)
    }
}

pub(super) const SINE_COSINE_SWAPPED: Fault = Fault {
    id: "sine-cosine-swapped",
    mistake: "Sine and cosine are swapped in the sinusoid: cos(p·ω) sits where sin(p·ω) belongs \
              and the reverse.",
    arises: "pe[:, 0::2] = cos and pe[:, 1::2] = sin (or cat([cos, sin])) in a hand-written \
             table.",
    exposes: "sinusoidal cases of every operation (position 0 gives [1, 0, …] for [0, 1, …]), and \
              xl_relative encode.",
    fix: "Sine first: PE(p, 2i) = sin(p·ω_i), PE(p, 2i+1) = cos(p·ω_i) in the interleaved layout.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &SineCosineSwapped,
};

pub(super) struct ExponentNotDoubled;

impl Deviation for ExponentNotDoubled {
    fn case(&self, case: &Case) -> Option<Case> {
        // base^(-i/d) = (sqrt base)^(-2i/d).
        let SchemeSpec::Sinusoidal(spec) = &case.scheme else {
            return None;
        };
        let mut case = case.clone();
        let mut spec = *spec;
        spec.base = spec.base.sqrt();
        case.scheme = SchemeSpec::Sinusoidal(spec);
        Some(case)
    }

    fn encode(
        &self,
        case: &Case,
        inputs: &Inputs<'_, '_>,
        table: ArrayD<f64>,
    ) -> Result<ArrayD<f64>> {
        if !is_xl_encode(case) {
            return Ok(table);
        }
        let pe = Sinusoid::new(
            case.head_dim,
            DEFAULT_BASE.sqrt(),
            SinusoidLayout::Concatenated,
        )?;
        Ok(relative_embeddings(&pe, inputs.get3("w_kr")?, case.key_len())?.into_dyn())
    }
}

impl FaultVariant for ExponentNotDoubled {
    fn applies(&self, case: &Case) -> bool {
        scheme_in(case, &[Scheme::Sinusoidal]) || is_xl_encode(case)
    }
}

pub(super) const SINUSOID_EXPONENT_NOT_DOUBLED: Fault = Fault {
    id: "sinusoid-exponent-not-doubled",
    mistake: "The sinusoid's frequencies are base^(-i/d) instead of base^(-2i/d): the exponent \
              runs over every dimension instead of every pair, so the slowest frequency is far \
              too fast.",
    arises: "arange(d) / d for arange(0, d, 2) / d in the inverse-frequency formula.",
    exposes: "sinusoidal cases of every operation, and xl_relative encode.",
    fix: "ω_i = base^(-2i/d) for pair i = 0 .. d/2 - 1.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &ExponentNotDoubled,
};
