//! The buggy kernels and the answer each report should give.
//!
//! Each specimen is the kernel of `kernel.rs` with one mistake, declaring the schemes a
//! user with that mistake would ship (the scheme the mistake lives in) and the dtypes
//! it computes in. The expected answer was written down from the one-line mistakes of
//! `posconform explain` before any specimen was run: the fault id whose mistake is this
//! mistake, or `None` when no catalogued fault describes it (the report should then say
//! that no catalogued fault explains the failures, not name one).

use posconform::math::Dtype;
use posconform::Scheme;

use crate::kernel::{BuggyKernel, Mistake};

/// The answer a report should give.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Expected {
    /// This catalogued fault (an id of `posconform explain`).
    Fault(&'static str),
    /// No catalogued fault is this mistake.
    None,
}

impl Expected {
    /// The id, or `none`.
    pub fn label(self) -> &'static str {
        match self {
            Expected::Fault(id) => id,
            Expected::None => "none",
        }
    }
}

/// One buggy kernel.
#[derive(Debug, Clone, Copy)]
pub struct Specimen {
    /// Its name in the table.
    pub name: &'static str,
    /// The mistake.
    pub mistake: Mistake,
    /// The schemes it declares (every operation of each).
    pub schemes: &'static [Scheme],
    /// The dtypes it declares, preferred first.
    pub dtypes: &'static [Dtype],
    /// What a report should name.
    pub expected: Expected,
}

impl Specimen {
    /// Its kernel.
    pub fn kernel(&self) -> BuggyKernel {
        BuggyKernel {
            name: self.name.to_string(),
            mistake: self.mistake,
            schemes: self.schemes.to_vec(),
            dtypes: self.dtypes.to_vec(),
        }
    }
}

const F64: &[Dtype] = &[Dtype::F64];
const F16: &[Dtype] = &[Dtype::F16];
const F32: &[Dtype] = &[Dtype::F32];
const F32_F16: &[Dtype] = &[Dtype::F32, Dtype::F16];

use Expected::{Fault, None as Unnamed};
use Scheme::{Alibi, Bucketed, Clipped, Learned, Rotary, Sinusoidal, XlRelative};

const fn s(
    name: &'static str,
    mistake: Mistake,
    schemes: &'static [Scheme],
    dtypes: &'static [Dtype],
    expected: Expected,
) -> Specimen {
    Specimen {
        name,
        mistake,
        schemes,
        dtypes,
        expected,
    }
}

/// Every specimen.
pub fn all() -> Vec<Specimen> {
    use Mistake as M;
    vec![
        // ---- Transformer-XL
        s(
            "xl-shift-pads-right",
            M::RelShiftPadRight,
            &[XlRelative],
            F64,
            Fault("rel-shift-off-by-one"),
        ),
        s(
            "xl-sequence-ascending",
            M::RelativeSequenceAscending,
            &[XlRelative],
            F64,
            Fault("relative-sequence-ascending"),
        ),
        s(
            "xl-shift-garbage-unmasked",
            M::RelShiftGarbageUnmasked,
            &[XlRelative],
            F64,
            Fault("rel-shift-garbage-unmasked"),
        ),
        s(
            "xl-memory-masked",
            M::MemoryKeysMasked,
            &[XlRelative],
            F64,
            Fault("memory-keys-masked"),
        ),
        s(
            "xl-mask-not-offset",
            M::MaskNotOffsetByMemory,
            &[XlRelative],
            F64,
            Fault("mask-not-offset-by-memory"),
        ),
        s(
            "xl-u-v-swapped",
            M::XlBiasesSwapped,
            &[XlRelative],
            F64,
            Fault("xl-biases-swapped"),
        ),
        s(
            "xl-content-bias-missing",
            M::XlContentBiasMissing,
            &[XlRelative],
            F64,
            Fault("xl-content-bias-missing"),
        ),
        s(
            "xl-memory-keeps-oldest",
            M::MemoryKeepsOldest,
            &[XlRelative],
            F64,
            Fault("memory-keeps-oldest"),
        ),
        s(
            "xl-scale-content-only",
            M::XlScaleOnlyContent,
            &[XlRelative],
            F64,
            Fault("scale-skips-position-term"),
        ),
        s(
            "xl-f16-only-mask-sentinel",
            M::MaskSentinelSoftmax,
            &[XlRelative],
            F16,
            Fault("mask-sentinel-overflows-in-half"),
        ),
        // The distance read as j - i wraps around r like a ring buffer: no catalogued
        // fault reads r[(-Δ) mod R].
        s(
            "xl-distance-sign-wraps",
            M::XlDistanceSignWraps,
            &[XlRelative],
            F64,
            Unnamed,
        ),
        // clamp_len taken as a count of rows (clamped to c - 1): not catalogued.
        s(
            "xl-clamp-one-short",
            M::XlClampOneShort,
            &[XlRelative],
            F64,
            Unnamed,
        ),
        // The memory keeps M - 1 rows: not catalogued (memory-keys-masked drops all of
        // them, memory-keeps-oldest keeps the wrong ones).
        s(
            "xl-memory-one-short",
            M::MemoryOneShort,
            &[XlRelative],
            F64,
            Unnamed,
        ),
        // ---- masks, softmax, scale
        s(
            "sinusoid-diagonal-masked",
            M::DiagonalMasked,
            &[Sinusoidal],
            F64,
            Fault("diagonal-masked"),
        ),
        s(
            "alibi-padding-ignored",
            M::PaddingIgnored,
            &[Alibi],
            F64,
            Fault("padding-mask-ignored"),
        ),
        s(
            "alibi-empty-row-nan",
            M::MaskedRowNan,
            &[Alibi],
            F64,
            Fault("masked-row-nan"),
        ),
        s(
            "alibi-mask-sentinel",
            M::MaskSentinelSoftmax,
            &[Alibi],
            F32_F16,
            Fault("mask-sentinel-overflows-in-half"),
        ),
        s(
            "rotary-f32-softmax-no-max",
            M::SoftmaxWithoutMax,
            &[Rotary],
            F32,
            Fault("softmax-without-max-subtraction"),
        ),
        s(
            "learned-scale-1-over-d",
            M::ScaleOneOverD,
            &[Learned],
            F64,
            Fault("scale-one-over-d"),
        ),
        s(
            "bucketed-scale-on-bias",
            M::ScaleAppliedToBias,
            &[Bucketed],
            F64,
            Fault("scale-applied-to-bias"),
        ),
        // 1/sqrt(H·d): the model width where the head width belongs; not catalogued
        // (right for one head).
        s(
            "rotary-scale-model-width",
            M::ScaleModelWidth,
            &[Rotary],
            F64,
            Unnamed,
        ),
        // Only inside a decode chunk do queries see later keys; scores, attention and
        // stream are masked. No catalogued fault is confined to decode chunks
        // (no-causal-mask leaks the future everywhere).
        s(
            "clipped-decode-chunk-unmasked",
            M::DecodeChunkNotCausal,
            &[Clipped],
            F64,
            Unnamed,
        ),
        s(
            "rotary-computes-in-f16",
            M::ComputesInF16,
            &[Rotary],
            F32,
            Fault("computes-in-half-precision"),
        ),
        // ---- positions
        s(
            "learned-positions-restart",
            M::PositionsRestartEachSegment,
            &[Learned],
            F64,
            Fault("positions-restart-each-segment"),
        ),
        s(
            "rotary-positions-one-based",
            M::PositionsOneBased,
            &[Rotary],
            F64,
            Fault("positions-one-based"),
        ),
        s(
            "rotary-decode-offset-missing",
            M::DecodeOffsetMissing,
            &[Rotary],
            F64,
            Fault("decode-offset-missing"),
        ),
        s(
            "rotary-cache-rotated-twice",
            M::CachedKeysRotatedAgain,
            &[Rotary],
            F64,
            Fault("rotary-cached-keys-rotated-again"),
        ),
        s(
            "sinusoid-query-start-ignored",
            M::QueryStartIgnored,
            &[Sinusoidal],
            F64,
            Fault("query-start-ignored"),
        ),
        // Positions follow the cache's length here, so the chunks sit right after the
        // prefill. Labelled decode-cache-not-appended when first scored (then a known
        // miss: that fault's variant tracks positions apart from the cache); the
        // catalogue has since gained the form this kernel has.
        s(
            "bucketed-cache-not-appended",
            M::DecodeCacheNotAppended,
            &[Bucketed],
            F64,
            Fault("decode-cache-not-appended-stale-positions"),
        ),
        s(
            "bucketed-cache-not-appended-tracked",
            M::DecodeCacheNotAppendedPositionsTracked,
            &[Bucketed],
            F64,
            Fault("decode-cache-not-appended"),
        ),
        // Keys positioned from the first query, as if there were no memory: not
        // catalogued (memory-placed-after-segment reorders the key axis instead).
        s(
            "rotary-keys-not-offset",
            M::KeyPositionsNotOffsetByMemory,
            &[Rotary],
            F64,
            Unnamed,
        ),
        // ---- sinusoids
        s(
            "sinusoid-sin-cos-swapped",
            M::SineCosineSwapped,
            &[Sinusoidal],
            F64,
            Fault("sine-cosine-swapped"),
        ),
        s(
            "sinusoid-exponent-not-doubled",
            M::SinusoidExponentNotDoubled,
            &[Sinusoidal],
            F64,
            Fault("sinusoid-exponent-not-doubled"),
        ),
        // base^(-2n/(d-2)): not catalogued.
        s(
            "sinusoid-frequencies-d-minus-2",
            M::SinusoidFrequenciesOverDMinus2,
            &[Sinusoidal],
            F64,
            Unnamed,
        ),
        // √d·x + PE: not catalogued.
        s(
            "sinusoid-inputs-scaled",
            M::InputsScaledBeforeEncoding,
            &[Sinusoidal],
            F64,
            Unnamed,
        ),
        // ---- rotary
        s(
            "rotary-always-rotate-half",
            M::RotaryAlwaysHalfSplit,
            &[Rotary],
            F64,
            Fault("rotary-pairing-swapped"),
        ),
        s(
            "rotary-f16-angles",
            M::AnglesInF16,
            &[Rotary],
            F16,
            Fault("angles-in-half-precision"),
        ),
        s(
            "rotary-interpolation-inverted",
            M::InterpolationInverted,
            &[Rotary],
            F64,
            Fault("rotary-interpolation-inverted"),
        ),
        s(
            "rotary-partial-frequencies-over-d",
            M::RotaryFrequenciesOverHeadDim,
            &[Rotary],
            F64,
            Fault("rotary-frequencies-over-head-dim"),
        ),
        s(
            "rotary-ntk-base-times-s",
            M::NtkBaseTimesFactor,
            &[Rotary],
            F64,
            Fault("rotary-ntk-exponent-missing"),
        ),
        // NTK exponent d/(d-2) with the head width instead of the rotary width: not
        // catalogued (differs only with partial rotary).
        s(
            "rotary-ntk-head-width",
            M::NtkExponentFromHeadDim,
            &[Rotary],
            F64,
            Unnamed,
        ),
        // ---- ALiBi
        s(
            "alibi-geometric-any-heads",
            M::AlibiGeometricForAllHeads,
            &[Alibi],
            F64,
            Fault("alibi-power-of-two-rule-for-all-heads"),
        ),
        s(
            "alibi-slopes-reversed",
            M::AlibiSlopesReversed,
            &[Alibi],
            F64,
            Fault("alibi-slopes-reversed"),
        ),
        s(
            "alibi-bias-sign-flipped",
            M::AlibiSignFlipped,
            &[Alibi],
            F64,
            Fault("alibi-bias-sign-flipped"),
        ),
        // The odd slopes of the 2c-head sequence fill the extra heads: not catalogued.
        s(
            "alibi-odd-fill-slopes",
            M::AlibiOddFillSlopes,
            &[Alibi],
            F64,
            Unnamed,
        ),
        // ---- T5 buckets
        s(
            "bucketed-bidirectional-on-causal",
            M::BucketAlwaysBidirectional,
            &[Bucketed],
            F64,
            Fault("bucket-bidirectional-flag-wrong"),
        ),
        s(
            "bucketed-direction-flipped",
            M::BucketDirectionFlipped,
            &[Bucketed],
            F64,
            Fault("bucket-direction-flipped"),
        ),
        // Hoisted constant factor lands one bucket low at an exact integer: not
        // catalogued (bucket-log-rounded lands one bucket high).
        s(
            "bucketed-factor-hoisted",
            M::BucketFactorHoisted,
            &[Bucketed],
            F64,
            Unnamed,
        ),
        // ---- clipped
        s(
            "clipped-index-sign-flipped",
            M::ClipIndexSignFlipped,
            &[Clipped],
            F64,
            Fault("clip-index-sign-flipped"),
        ),
        s(
            "clipped-value-embeddings-missing",
            M::ClipValueEmbeddingsMissing,
            &[Clipped],
            F64,
            Fault("clipped-value-embeddings-missing"),
        ),
        // Clipped at k - 1: not catalogued.
        s(
            "clipped-clip-one-short",
            M::ClipOneShort,
            &[Clipped],
            F64,
            Unnamed,
        ),
        // ---- formerly coverage gaps
        // Once a coverage gap (fully masked rows came only from two core cases); random
        // cases now draw hidden keys, fully masked rows among them.
        s(
            "rotary-empty-row-nan",
            M::MaskedRowNan,
            &[Rotary],
            F64,
            Fault("masked-row-nan"),
        ),
        // Once a coverage gap: exp overflows f16 past ln(65504) = 11.09 (65504: the largest
        // finite binary16, IEEE 754-2008) and no case reached it; random cases now draw
        // large input amplitudes per dtype.
        s(
            "alibi-f16-softmax-no-max",
            M::SoftmaxWithoutMax,
            &[Alibi],
            F16,
            Fault("softmax-without-max-subtraction"),
        ),
        // Once a coverage gap: a kernel computing in f32 and f16 whose -1e9 sentinel
        // overflows in f16 needs a fully masked row in f16, which random cases now draw.
        s(
            "xl-mask-sentinel-f32-f16",
            M::MaskSentinelSoftmax,
            &[XlRelative],
            F32_F16,
            Fault("mask-sentinel-overflows-in-half"),
        ),
    ]
}

/// Mistakes in a scheme no case of `core` or of the fuzzer exposes (see `naming.rs`).
pub fn gaps() -> Vec<Specimen> {
    Vec::new()
}

/// The kernel without a mistake on every scheme, declaring `dtypes`.
pub fn control(dtypes: &'static [Dtype]) -> Specimen {
    s("control", Mistake::None, Scheme::ALL, dtypes, Unnamed)
}
