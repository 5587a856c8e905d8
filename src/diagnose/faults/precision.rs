//! Mistakes of precision: a kernel computing narrower than the dtype it declares.
//! Matched by the size of the error only ([`Matching::ErrorSize`]): two kernels that
//! round differently make different errors of the same size.

use super::{op_in, scheme_in};
use crate::case::{Case, OperationKind};
use crate::diagnose::{Fault, FaultKind, FaultVariant, Matching};
use crate::math::Dtype;
use crate::scheme::Scheme;
use crate::variant::Deviation;

/// The half-precision dtype a kernel of `dtype` would slip into.
fn half_for(dtype: Dtype) -> Dtype {
    if dtype == Dtype::Bf16 {
        Dtype::Bf16
    } else {
        Dtype::F16
    }
}

pub(super) struct HalfAngles;

impl Deviation for HalfAngles {
    fn angles(&self, _case: &Case, dtype: Dtype) -> Option<Dtype> {
        Some(half_for(dtype))
    }
}

impl FaultVariant for HalfAngles {
    fn deterministic_error(&self) -> bool {
        true
    }

    fn applies(&self, case: &Case) -> bool {
        scheme_in(case, &[Scheme::Sinusoidal, Scheme::Rotary])
            || (scheme_in(case, &[Scheme::XlRelative]) && op_in(case, &[OperationKind::Encode]))
    }
}

pub(super) const ANGLES_IN_HALF_PRECISION: Fault = Fault {
    id: "angles-in-half-precision",
    mistake: "Rotation or sinusoid angles p·ω are formed in f16 (bf16 for a bf16 kernel): the \
              position and the product are rounded to 11 (or 8) significant bits, so the error \
              grows with the position.",
    arises: "position ids and inverse frequencies cast to the model's half dtype before their \
             product (a cos/sin cache built after .half()).",
    exposes:
        "Rotary and sinusoid cases at large positions (the suite's far-position cases; random \
              cases draw positions far from 0).",
    fix: "Form p·ω in f32 or wider (and the cos/sin tables from it); cast only the finished \
          tables to the kernel's dtype.",
    kind: FaultKind::Bug,
    matching: Matching::ErrorSize,
    variant: &HalfAngles,
};

pub(super) struct ComputesIn(Dtype);

impl Deviation for ComputesIn {
    fn stage(&self, _case: &Case, dtype: Dtype) -> Option<Dtype> {
        (self.0.unit_roundoff() > dtype.unit_roundoff()).then_some(self.0)
    }

    fn angles(&self, _case: &Case, dtype: Dtype) -> Option<Dtype> {
        (self.0.unit_roundoff() > dtype.unit_roundoff()).then_some(self.0)
    }
}

impl FaultVariant for ComputesIn {
    fn applies(&self, _case: &Case) -> bool {
        true
    }

    fn computes_in(&self, _case: &Case, dtype: Dtype) -> Option<Dtype> {
        (self.0.unit_roundoff() > dtype.unit_roundoff()).then_some(self.0)
    }
}

pub(super) const COMPUTES_IN_HALF_PRECISION: Fault = Fault {
    id: "computes-in-half-precision",
    mistake: "The kernel computes in f16 (inputs, tables, scores, probabilities and outputs \
              rounded to f16) while it declares a wider dtype.",
    arises:
        "An autocast region or a .half() left in the kernel, or a fused kernel that only has a \
             half-precision path.",
    exposes: "Every case run in f32 or f64: errors of f16 size everywhere.",
    fix: "Compute in the declared dtype, or declare f16 (and be judged by the f16 budget).",
    kind: FaultKind::Bug,
    matching: Matching::ErrorSize,
    variant: &ComputesIn(Dtype::F16),
};

pub(super) const COMPUTES_IN_BFLOAT16: Fault = Fault {
    id: "computes-in-bfloat16",
    mistake: "The kernel computes in bf16 (8 significant bits) while it declares a wider dtype.",
    arises: "An autocast region with bf16 as the default lower precision, or weights kept in bf16 \
             and never upcast.",
    exposes: "Every case run in f16, f32 or f64: errors of bf16 size everywhere.",
    fix: "Compute in the declared dtype, or declare bf16.",
    kind: FaultKind::Bug,
    matching: Matching::ErrorSize,
    variant: &ComputesIn(Dtype::Bf16),
};
