//! The catalogue, one file per place a mistake sits. Each fault is a unit struct
//! implementing [`Deviation`](crate::variant::Deviation) (only the hooks its mistake
//! touches) and [`FaultVariant`](super::FaultVariant), plus its [`Fault`] entry.

mod alibi;
mod buckets;
mod clipped;
mod masking;
mod memory;
mod positions;
mod precision;
mod rotary;
mod scale;
mod sinusoid;
mod softmax;
mod xl;

use super::Fault;
use crate::case::{Case, OperationKind};
use crate::scheme::Scheme;

/// Every fault, grouped by where the mistake sits.
pub(super) static CATALOGUE: &[Fault] = &[
    // Masking.
    masking::MASK_NOT_OFFSET_BY_MEMORY,
    masking::MEMORY_KEYS_MASKED,
    masking::DIAGONAL_MASKED,
    masking::NO_CAUSAL_MASK,
    masking::MASK_ONE_KEY_TOO_MANY,
    masking::PADDING_MASK_IGNORED,
    masking::MASK_MULTIPLIED_NOT_ADDED,
    masking::MASKED_ROW_NAN,
    masking::MASKED_ROW_UNIFORM,
    masking::MASK_SENTINEL_OVERFLOWS_IN_HALF,
    // The softmax.
    softmax::SOFTMAX_WITHOUT_MAX_SUBTRACTION,
    softmax::SOFTMAX_OVER_QUERIES,
    // The score scale.
    scale::SCALE_MISSING,
    scale::SCALE_ONE_OVER_D,
    scale::SCALE_APPLIED_TWICE,
    scale::SCALE_APPLIED_TO_BIAS,
    scale::SCALE_SKIPS_POSITION_TERM,
    // Absolute positions.
    positions::POSITIONS_RESTART_EACH_SEGMENT,
    positions::DECODE_OFFSET_MISSING,
    positions::QUERY_START_IGNORED,
    positions::POSITIONS_ONE_BASED,
    // Memory and cache.
    memory::MEMORY_KEEPS_OLDEST,
    memory::MEMORY_ORDER_REVERSED,
    memory::MEMORY_PLACED_AFTER_SEGMENT,
    memory::DECODE_CACHE_NOT_APPENDED,
    memory::DECODE_CACHE_NOT_APPENDED_STALE_POSITIONS,
    // Precision.
    precision::ANGLES_IN_HALF_PRECISION,
    precision::COMPUTES_IN_HALF_PRECISION,
    precision::COMPUTES_IN_BFLOAT16,
    // Transformer-XL relative scoring.
    xl::REL_SHIFT_OFF_BY_ONE,
    xl::REL_SHIFT_GARBAGE_UNMASKED,
    xl::RELATIVE_SEQUENCE_ASCENDING,
    xl::XL_BIASES_MISSING,
    xl::XL_CONTENT_BIAS_MISSING,
    xl::XL_POSITION_BIAS_MISSING,
    xl::XL_BIASES_SWAPPED,
    xl::XL_POSITION_TERM_USES_KEYS,
    // Sinusoids.
    sinusoid::SINUSOID_LAYOUT_SWAPPED,
    sinusoid::SINE_COSINE_SWAPPED,
    sinusoid::SINUSOID_EXPONENT_NOT_DOUBLED,
    // Rotary.
    rotary::ROTARY_PAIRING_SWAPPED,
    rotary::ROTARY_TAIL_ROTATED,
    rotary::ROTARY_TAIL_ZEROED,
    rotary::ROTARY_FREQUENCIES_OVER_HEAD_DIM,
    rotary::ROTARY_NTK_EXPONENT_MISSING,
    rotary::ROTARY_SCALING_IGNORED,
    rotary::ROTARY_INTERPOLATION_INVERTED,
    rotary::ROTARY_CACHED_KEYS_ROTATED_AGAIN,
    rotary::ROTARY_DIRECTION_REVERSED,
    // ALiBi.
    alibi::ALIBI_POWER_OF_TWO_RULE_FOR_ALL_HEADS,
    alibi::ALIBI_SLOPE_EXPONENT_OFF_BY_ONE,
    alibi::ALIBI_SLOPES_REVERSED,
    alibi::ALIBI_BIAS_SIGN_FLIPPED,
    alibi::ALIBI_BIAS_FROM_KEY_POSITION,
    // Bucketed relative bias.
    buckets::BUCKET_DIRECTION_FLIPPED,
    buckets::BUCKET_BIDIRECTIONAL_FLAG_WRONG,
    buckets::BUCKET_CAP_MISSING,
    buckets::BUCKET_LOG_ROUNDED,
    buckets::BUCKET_EXACT_RANGE_NOT_HALVED,
    // Clipped relative positions.
    clipped::CLIP_INDEX_SIGN_FLIPPED,
    clipped::CLIPPED_VALUE_EMBEDDINGS_MISSING,
];

/// Whether the case's scheme is one of `schemes`.
fn scheme_in(case: &Case, schemes: &[Scheme]) -> bool {
    schemes.contains(&case.scheme.scheme())
}

/// Whether the case's operation is one of `kinds`.
fn op_in(case: &Case, kinds: &[OperationKind]) -> bool {
    kinds.contains(&case.operation.kind())
}

/// Every operation that attends (all but `encode`).
const ATTENDING: &[OperationKind] = &[
    OperationKind::Scores,
    OperationKind::Attention,
    OperationKind::Stream,
    OperationKind::Decode,
];

/// Operations with probabilities or outputs (a softmax).
const SOFTMAX: &[OperationKind] = &[
    OperationKind::Attention,
    OperationKind::Stream,
    OperationKind::Decode,
];

/// The schemes where absolute positions enter the scores.
const ABSOLUTE: &[Scheme] = &[Scheme::Sinusoidal, Scheme::Learned, Scheme::Rotary];
