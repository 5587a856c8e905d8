//! Mistakes in rotary position embedding (Su et al. 2021): pairing, the partial-rotary
//! tail, frequencies and context-extension scaling, caches and direction.

use std::collections::BTreeMap;

use ndarray::{s, Array3, ArrayD, Axis};

use super::{op_in, scheme_in};
use crate::case::{Case, OperationKind};
use crate::diagnose::{Fault, FaultKind, FaultVariant, Matching};
use crate::error::Result;
use crate::scheme::model::PairPositions;
use crate::scheme::rotary::{Pairing, RotaryScaling, RotarySpec};
use crate::scheme::{Scheme, SchemeSpec};
use crate::variant::{Deviation, StepKind, WindowCtx};

fn spec(case: &Case) -> Option<&RotarySpec> {
    match &case.scheme {
        SchemeSpec::Rotary(spec) => Some(spec),
        _ => None,
    }
}

/// The case with its rotary parameters changed by `f`.
fn with_spec(case: &Case, f: impl FnOnce(&mut RotarySpec)) -> Option<Case> {
    let mut spec = *spec(case)?;
    f(&mut spec);
    let mut case = case.clone();
    case.scheme = SchemeSpec::Rotary(spec);
    Some(case)
}

fn is_rotary(case: &Case) -> bool {
    scheme_in(case, &[Scheme::Rotary])
}

fn is_partial(case: &Case) -> bool {
    spec(case).is_some_and(|s| s.rotary_dim < case.head_dim)
}

pub(super) struct PairingSwapped;

impl Deviation for PairingSwapped {
    fn case(&self, case: &Case) -> Option<Case> {
        with_spec(case, |s| {
            s.pairing = match s.pairing {
                Pairing::Adjacent => Pairing::HalfSplit,
                Pairing::HalfSplit => Pairing::Adjacent,
            }
        })
    }
}

impl FaultVariant for PairingSwapped {
    fn applies(&self, case: &Case) -> bool {
        is_rotary(case)
    }
}

pub(super) const ROTARY_PAIRING_SWAPPED: Fault = Fault {
    id: "rotary-pairing-swapped",
    mistake: "The rotated pairs are adjacent dimensions (2j, 2j+1) where they are half-split (j, \
              j + d_rot/2), or the reverse.",
    arises: "A rotate_half implementation (GPT-NeoX, Llama) applied to weights trained with \
             interleaved pairs (GPT-J, RoFormer), or the reverse, typically in a model port.",
    exposes: "Every rotary case: golden values are wrong while relative properties still hold.",
    fix: "Use the pairing the case names (`pairing`): adjacent for RoFormer/GPT-J layouts, \
          half_split for rotate_half layouts.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &PairingSwapped,
};

pub(super) struct TailRotated;

impl Deviation for TailRotated {
    fn case(&self, case: &Case) -> Option<Case> {
        let d = case.head_dim;
        with_spec(case, |s| s.rotary_dim = d)
    }
}

impl FaultVariant for TailRotated {
    fn applies(&self, case: &Case) -> bool {
        is_partial(case)
    }
}

pub(super) const ROTARY_TAIL_ROTATED: Fault = Fault {
    id: "rotary-tail-rotated",
    mistake: "Partial rotary: the whole head is rotated where only the first d_rot dimensions \
              should be; the tail d_rot..d must pass through unchanged.",
    arises: "rotary_dim (or partial_rotary_factor) ignored, so the cos/sin tables are built for d.",
    exposes: "Rotary cases with rotary_dim < d.",
    fix: "Rotate x[..., :d_rot] with frequencies base^(-2j/d_rot) and concatenate x[..., d_rot:] \
          unchanged.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &TailRotated,
};

pub(super) struct TailZeroed;

impl Deviation for TailZeroed {
    fn inputs(&self, case: &Case, arrays: &mut BTreeMap<String, ArrayD<f64>>) -> Result<()> {
        let Some(spec) = spec(case) else {
            return Ok(());
        };
        for name in ["q", "k", "x"] {
            if let Some(a) = arrays.get_mut(name) {
                a.slice_mut(s![.., .., spec.rotary_dim..]).fill(0.0);
            }
        }
        Ok(())
    }
}

impl FaultVariant for TailZeroed {
    fn applies(&self, case: &Case) -> bool {
        is_partial(case)
    }
}

pub(super) const ROTARY_TAIL_ZEROED: Fault = Fault {
    id: "rotary-tail-zeroed",
    mistake: "Partial rotary: the tail d_rot..d is dropped (zeroed) instead of passed through.",
    arises: "Only the rotated slice written to the output buffer, or the concatenation with the \
             pass-through part forgotten.",
    exposes: "Rotary cases with rotary_dim < d.",
    fix: "Concatenate the unrotated tail: out = cat([rotate(x[..., :d_rot]), x[..., d_rot:]]).",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &TailZeroed,
};

pub(super) struct FrequenciesOverHeadDim;

impl Deviation for FrequenciesOverHeadDim {
    fn case(&self, case: &Case) -> Option<Case> {
        // base^(-2j/d) = (base^(d_rot/d))^(-2j/d_rot).
        let d = case.head_dim as f64;
        with_spec(case, |s| s.base = s.base.powf(s.rotary_dim as f64 / d))
    }
}

impl FaultVariant for FrequenciesOverHeadDim {
    fn applies(&self, case: &Case) -> bool {
        is_partial(case)
    }
}

pub(super) const ROTARY_FREQUENCIES_OVER_HEAD_DIM: Fault = Fault {
    id: "rotary-frequencies-over-head-dim",
    mistake: "Partial rotary: the frequencies are base^(-2j/d) over the whole head width instead \
              of base^(-2j/d_rot) over the rotated part.",
    arises: "inv_freq computed with head_dim where rotary_dim belongs.",
    exposes: "Rotary cases with rotary_dim < d.",
    fix: "θ_j = base^(-2j/d_rot) for j = 0 .. d_rot/2 - 1.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &FrequenciesOverHeadDim,
};

pub(super) struct NtkExponentMissing;

impl Deviation for NtkExponentMissing {
    fn case(&self, case: &Case) -> Option<Case> {
        with_spec(case, |s| {
            if let RotaryScaling::NtkAware { factor } = s.scaling {
                s.base *= factor;
                s.scaling = RotaryScaling::None;
            }
        })
    }
}

impl FaultVariant for NtkExponentMissing {
    fn applies(&self, case: &Case) -> bool {
        spec(case).is_some_and(|s| matches!(s.scaling, RotaryScaling::NtkAware { .. }))
    }
}

pub(super) const ROTARY_NTK_EXPONENT_MISSING: Fault = Fault {
    id: "rotary-ntk-exponent-missing",
    mistake: "NTK-aware scaling multiplies the base by s instead of s^(d_rot/(d_rot-2)).",
    arises: "base * factor written from a summary of the method instead of its formula.",
    exposes: "Rotary cases with ntk_aware scaling.",
    fix: "b' = b · s^(d_rot/(d_rot-2)), so that the slowest frequency is exactly s times slower.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &NtkExponentMissing,
};

pub(super) struct ScalingIgnored;

impl Deviation for ScalingIgnored {
    fn case(&self, case: &Case) -> Option<Case> {
        with_spec(case, |s| s.scaling = RotaryScaling::None)
    }
}

impl FaultVariant for ScalingIgnored {
    fn applies(&self, case: &Case) -> bool {
        spec(case).is_some_and(|s| s.scaling != RotaryScaling::None)
    }
}

pub(super) const ROTARY_SCALING_IGNORED: Fault = Fault {
    id: "rotary-scaling-ignored",
    mistake: "The context-extension scaling is not applied: angles are p·θ_j as without scaling.",
    arises: "A cos/sin cache built once at load time and not rebuilt after the scaling setting \
             changed, or a scaling config key the kernel does not read.",
    exposes: "Rotary cases with linear_interpolation or ntk_aware scaling.",
    fix: "Rebuild the angles with the scaling: p/s for linear interpolation, the NTK-aware base \
          for ntk_aware.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &ScalingIgnored,
};

pub(super) struct InterpolationInverted;

impl Deviation for InterpolationInverted {
    fn case(&self, case: &Case) -> Option<Case> {
        with_spec(case, |s| {
            if let RotaryScaling::LinearInterpolation { factor } = s.scaling {
                s.scaling = RotaryScaling::LinearInterpolation {
                    factor: 1.0 / factor,
                };
            }
        })
    }
}

impl FaultVariant for InterpolationInverted {
    fn applies(&self, case: &Case) -> bool {
        spec(case).is_some_and(
            |s| matches!(s.scaling, RotaryScaling::LinearInterpolation { factor } if factor != 1.0),
        )
    }
}

pub(super) const ROTARY_INTERPOLATION_INVERTED: Fault = Fault {
    id: "rotary-interpolation-inverted",
    mistake: "Linear position interpolation multiplies the positions by s instead of dividing \
              them.",
    arises: "t * scale for t / scale, or a factor given as 1/s read as s.",
    exposes: "Rotary cases with linear_interpolation scaling.",
    fix: "Angles (p / s)·θ_j: positions are compressed into the trained range.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &InterpolationInverted,
};

pub(super) struct CachedKeysRotatedAgain;

impl Deviation for CachedKeysRotatedAgain {
    fn keys(
        &self,
        ctx: &WindowCtx<'_, '_>,
        positions: &PairPositions,
        keys: &mut Array3<f64>,
    ) -> Result<()> {
        let Some(spec) = spec(ctx.case) else {
            return Ok(());
        };
        if !matches!(ctx.at.kind, StepKind::Decode | StepKind::Segment) {
            return Ok(());
        }
        // Keys from earlier steps come out of the cache already rotated, and are
        // rotated again with the rest.
        let cached: Vec<usize> = (0..keys.dim().1)
            .filter(|&j| ctx.at.key_step_starts[j] < ctx.at.start)
            .collect();
        if cached.is_empty() {
            return Ok(());
        }
        let rotary = spec.rotary(ctx.case.head_dim)?;
        let at: Vec<i64> = cached.iter().map(|&j| positions.keys[j]).collect();
        let once = rotary.apply(keys.select(Axis(1), &cached).view(), &at)?;
        for (n, &j) in cached.iter().enumerate() {
            keys.slice_mut(s![.., j, ..])
                .assign(&once.slice(s![.., n, ..]));
        }
        Ok(())
    }
}

impl FaultVariant for CachedKeysRotatedAgain {
    fn applies(&self, case: &Case) -> bool {
        is_rotary(case) && op_in(case, &[OperationKind::Decode, OperationKind::Stream])
    }
}

pub(super) const ROTARY_CACHED_KEYS_ROTATED_AGAIN: Fault = Fault {
    id: "rotary-cached-keys-rotated-again",
    mistake: "Keys are stored in the cache (or memory) already rotated and rotated again when \
              they are read back, so an old key at position p is rotated by 2p.",
    arises: "Rotary applied to the concatenation [cache ; new keys] after the cache was filled \
             with rotated keys.",
    exposes: "Rotary decode cases (every chunk after the prefill) and stream cases with memory.",
    fix: "Rotate each key once, when it is written; read cached keys as they are.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &CachedKeysRotatedAgain,
};

pub(super) struct DirectionReversed;

impl Deviation for DirectionReversed {
    fn inputs(&self, case: &Case, arrays: &mut BTreeMap<String, ArrayD<f64>>) -> Result<()> {
        if is_rotary(case) && case.operation.kind() == OperationKind::Encode {
            if let Some(p) = arrays.get_mut("positions") {
                p.mapv_inplace(|x| -x);
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
            *p = -*p;
        }
    }
}

impl FaultVariant for DirectionReversed {
    fn applies(&self, case: &Case) -> bool {
        is_rotary(case)
    }
}

pub(super) const ROTARY_DIRECTION_REVERSED: Fault = Fault {
    id: "rotary-direction-reversed",
    mistake: "Queries and keys are both rotated in the opposite direction (the sine's sign \
              flipped). Scores still depend only on the distance, so every relative property \
              holds; the values differ from the published convention.",
    arises: "rotate_half written as cat([x2, -x1]) instead of cat([-x2, x1]), or sin negated in \
             the cache.",
    exposes: "Golden values of every rotary case (encode, scores, attention); checks of relative \
              properties alone cannot see it.",
    fix: "Rotate by +p·θ: x_a' = x_a cos - x_b sin, x_b' = x_a sin + x_b cos. A model trained \
          from scratch either way is self-consistent, but weights trained with the published \
          convention do not transfer.",
    kind: FaultKind::Convention,
    matching: Matching::Values,
    variant: &DirectionReversed,
};
