//! Mistakes in clipped relative position representations (Shaw et al. 2018).

use std::collections::BTreeMap;

use ndarray::{s, ArrayD};

use super::{op_in, scheme_in, SOFTMAX};
use crate::case::Case;
use crate::diagnose::{Fault, FaultKind, FaultVariant, Matching};
use crate::error::Result;
use crate::scheme::model::Inputs;
use crate::scheme::{Scheme, SchemeSpec};
use crate::variant::Deviation;

fn is_clipped(case: &Case) -> bool {
    scheme_in(case, &[Scheme::Clipped])
}

pub(super) struct SignFlipped;

impl Deviation for SignFlipped {
    fn inputs(&self, case: &Case, arrays: &mut BTreeMap<String, ArrayD<f64>>) -> Result<()> {
        // clip(i - j) + k = 2k - (clip(j - i) + k): the tables read back to front.
        if is_clipped(case) {
            for name in ["w_key", "w_value"] {
                if let Some(t) = arrays.get_mut(name) {
                    *t = t.slice(s![.., ..;-1, ..]).to_owned().into_dyn();
                }
            }
        }
        Ok(())
    }

    fn encode(&self, case: &Case, _: &Inputs<'_, '_>, table: ArrayD<f64>) -> Result<ArrayD<f64>> {
        let SchemeSpec::Clipped(spec) = &case.scheme else {
            return Ok(table);
        };
        let last = 2.0 * spec.clip_distance as f64;
        Ok(table.mapv(|index| last - index))
    }
}

impl FaultVariant for SignFlipped {
    fn applies(&self, case: &Case) -> bool {
        is_clipped(case)
    }
}

pub(super) const CLIP_INDEX_SIGN_FLIPPED: Fault = Fault {
    id: "clip-index-sign-flipped",
    mistake: "The embedding index uses i - j instead of j - i: clip(i - j, -k, k) + k, so every \
              distance reads the row of its mirror image.",
    arises: "The relative position matrix built as query minus key where the paper's a_ij uses \
             key minus query.",
    exposes: "Every clipped case (encode returns the indices themselves).",
    fix: "index = clip(j - i, -k, k) + k, so earlier keys use rows below k.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &SignFlipped,
};

pub(super) struct ValuesMissing;

impl Deviation for ValuesMissing {
    fn inputs(&self, case: &Case, arrays: &mut BTreeMap<String, ArrayD<f64>>) -> Result<()> {
        if is_clipped(case) {
            if let Some(t) = arrays.get_mut("w_value") {
                t.fill(0.0);
            }
        }
        Ok(())
    }
}

impl FaultVariant for ValuesMissing {
    fn applies(&self, case: &Case) -> bool {
        is_clipped(case) && op_in(case, SOFTMAX)
    }
}

pub(super) const CLIPPED_VALUE_EMBEDDINGS_MISSING: Fault = Fault {
    id: "clipped-value-embeddings-missing",
    mistake: "The value-side relative embeddings a^V are left out: outputs are Σ p·v instead of \
              Σ p·(v + a^V).",
    arises: "Only the key-side term (eq. 5) implemented; many later variants drop eq. 3's value \
             term on purpose, and a port keeps that habit.",
    exposes: "Clipped attention, stream and decode cases.",
    fix: "Add Σ_j p_ij · w_value[clip(j - i, -k, k) + k] to each output row.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &ValuesMissing,
};
