//! Built-in suites of cases.
//!
//! - `core`: small (committed under `vectors/core`, runs in seconds); every scheme with
//!   every operation, every value of every enumerated parameter (docs/protocol.md,
//!   "Capabilities") in an operation that attends, rotary attention with memory in f32
//!   in both pairings, and together every fault class of docs/faults.md, with positions
//!   far from 0, odd L, M = 0, M < L, M > L, L = 1, head widths 64, 80 and 96, scales
//!   other than the default, non-power-of-two head counts and fully masked rows.
//! - `long`: long positions (up to 10^6), L and M up to 2048, half-precision dtypes;
//!   generated on demand by `posconform emit`, never committed.

use crate::attention::Scale;
use crate::case::{Case, Operation, SchemeSpec};
use crate::error::{Error, Result};
use crate::math::precision::Dtype;
use crate::scheme::rotary::{Pairing, RotaryScaling};
use crate::scheme::sinusoidal::SinusoidLayout;

/// The names of the built-in suites.
pub const SUITES: &[&str] = &["core", "long"];

/// The cases of the suite called `name`.
pub fn suite(name: &str) -> Result<Vec<Case>> {
    let cases = match name {
        "core" => core(),
        "long" => long(),
        _ => {
            return Err(Error::param(
                "suite",
                format!("one of {}", SUITES.join(", ")),
                name,
            ))
        }
    };
    for case in &cases {
        case.validate()?;
    }
    Ok(cases)
}

/// A case under construction, with the defaults most cases share.
struct Builder(Case);

impl Builder {
    fn new(id: &str, scheme: SchemeSpec, operation: Operation) -> Self {
        Builder(Case {
            id: id.to_string(),
            scheme,
            operation,
            heads: 2,
            query_len: 5,
            memory_len: 3,
            head_dim: 64,
            query_start: 1000,
            hidden_keys: Vec::new(),
            dtype: Dtype::F64,
            seed: seed_of(id),
            faults: Vec::new(),
            purpose: String::new(),
        })
    }
    fn shape(mut self, heads: usize, query_len: usize, memory_len: usize, head_dim: usize) -> Self {
        (
            self.0.heads,
            self.0.query_len,
            self.0.memory_len,
            self.0.head_dim,
        ) = (heads, query_len, memory_len, head_dim);
        self
    }
    fn start(mut self, p0: i64) -> Self {
        self.0.query_start = p0;
        self
    }
    fn dtype(mut self, dtype: Dtype) -> Self {
        self.0.dtype = dtype;
        self
    }
    fn hide(mut self, keys: &[usize]) -> Self {
        self.0.hidden_keys = keys.to_vec();
        self
    }
    fn faults(mut self, faults: &[u8]) -> Self {
        self.0.faults = faults.to_vec();
        self
    }
    fn purpose(mut self, text: &str) -> Case {
        self.0.purpose = text.to_string();
        self.0
    }
}

/// A stable seed per case id (FNV-1a), so inserting a case never reseeds the others.
fn seed_of(id: &str) -> u64 {
    id.bytes().fold(0xcbf2_9ce4_8422_2325, |h, b| {
        (h ^ b as u64).wrapping_mul(0x0100_0000_01b3)
    })
}

fn sinusoidal(layout: SinusoidLayout) -> SchemeSpec {
    SchemeSpec::Sinusoidal {
        base: 10_000.0,
        layout,
    }
}
fn xl(scale: Scale, clamp_len: Option<usize>) -> SchemeSpec {
    SchemeSpec::XlRelative { scale, clamp_len }
}
fn rotary(rotary_dim: usize, pairing: Pairing, scaling: RotaryScaling, scale: Scale) -> SchemeSpec {
    SchemeSpec::Rotary {
        rotary_dim,
        base: 10_000.0,
        pairing,
        scaling,
        scale,
    }
}
fn alibi() -> SchemeSpec {
    SchemeSpec::Alibi {
        scale: Scale::InverseSqrtDim,
    }
}
fn t5(num_buckets: usize, max_distance: usize, bidirectional: bool) -> SchemeSpec {
    SchemeSpec::Bucketed {
        num_buckets,
        max_distance,
        bidirectional,
        scale: Scale::Fixed(1.0),
    }
}
fn clipped(clip_distance: usize) -> SchemeSpec {
    SchemeSpec::Clipped {
        clip_distance,
        scale: Scale::InverseSqrtDim,
    }
}
fn stream(tokens: usize) -> Operation {
    Operation::Stream { tokens }
}
fn decode(tokens: usize, prefill: usize, chunks: &[usize]) -> Operation {
    Operation::Decode {
        tokens,
        prefill,
        chunks: chunks.to_vec(),
    }
}

use Operation::{Attention, Encode, Scores};
use Pairing::{Adjacent, HalfSplit};
use Scale::{Fixed, InverseSqrtDim};
use SinusoidLayout::{Concatenated, Interleaved};

fn core() -> Vec<Case> {
    let none = RotaryScaling::None;
    vec![
        // Absolute sinusoid.
        Builder::new(
            "sinusoidal.encode.interleaved",
            sinusoidal(Interleaved),
            Encode,
        )
        .shape(1, 9, 0, 64)
        .start(-3)
        .faults(&[15, 16])
        .purpose("paper layout across negative, zero and positive positions"),
        Builder::new(
            "sinusoidal.encode.concatenated_d80",
            sinusoidal(Concatenated),
            Encode,
        )
        .shape(1, 7, 0, 80)
        .start(4093)
        .faults(&[15, 16])
        .purpose("sin||cos layout at width 80"),
        Builder::new("sinusoidal.encode.far_f32", sinusoidal(Interleaved), Encode)
            .shape(1, 5, 0, 96)
            .start(999_990)
            .dtype(Dtype::F32)
            .faults(&[19])
            .purpose("positions near 10^6: angles must be formed in f32 or wider"),
        Builder::new(
            "sinusoidal.attention.offset",
            sinusoidal(Interleaved),
            Attention,
        )
        .shape(2, 5, 3, 64)
        .start(2000)
        .faults(&[8, 14])
        .purpose("absolute encoding added to q and k, memory keys before the segment"),
        Builder::new(
            "sinusoidal.scores.concatenated",
            sinusoidal(Concatenated),
            Scores,
        )
        .shape(2, 6, 4, 64)
        .start(3000)
        .faults(&[8, 15])
        .purpose("sin||cos layout in the scores, with memory"),
        Builder::new(
            "sinusoidal.stream.segments",
            sinusoidal(Interleaved),
            stream(12),
        )
        .shape(2, 4, 4, 64)
        .start(0)
        .faults(&[9, 11])
        .purpose("absolute positions must keep counting across segments"),
        Builder::new(
            "sinusoidal.decode.chunks",
            sinusoidal(Interleaved),
            decode(11, 4, &[1, 3, 3]),
        )
        .shape(2, 5, 0, 64)
        .start(600)
        .faults(&[10])
        .purpose("prefill 4 then chunks 1, 3, 3: each chunk continues at p0 + cache length"),
        // Learned absolute.
        Builder::new(
            "learned.encode.rows",
            SchemeSpec::Learned { max_positions: 64 },
            Encode,
        )
        .shape(1, 16, 0, 64)
        .start(40)
        .faults(&[9])
        .purpose("lookup of positions 40..56, never wrapped"),
        Builder::new(
            "learned.scores.memory",
            SchemeSpec::Learned { max_positions: 48 },
            Scores,
        )
        .shape(2, 5, 6, 64)
        .start(30)
        .faults(&[5, 8])
        .purpose("rows of positions 24..35 added to q and k, memory in front"),
        Builder::new(
            "learned.attention.f32",
            SchemeSpec::Learned { max_positions: 40 },
            Attention,
        )
        .shape(2, 4, 3, 64)
        .start(20)
        .dtype(Dtype::F32)
        .faults(&[5, 8])
        .purpose("learned rows in f32 attention"),
        Builder::new(
            "learned.stream.segments",
            SchemeSpec::Learned { max_positions: 32 },
            stream(15),
        )
        .shape(1, 5, 5, 64)
        .start(0)
        .faults(&[9])
        .purpose("restarting positions per segment aliases tokens t and t+L"),
        Builder::new(
            "learned.decode.chunks",
            SchemeSpec::Learned { max_positions: 24 },
            decode(12, 5, &[2, 1, 4]),
        )
        .shape(1, 5, 0, 64)
        .start(8)
        .faults(&[10])
        .purpose("prefill 5 then chunks 2, 1, 4 at positions 13..20"),
        // Transformer-XL relative.
        Builder::new(
            "xl_relative.encode.projected_sinusoid",
            xl(InverseSqrtDim, None),
            Encode,
        )
        .shape(2, 3, 5, 64)
        .faults(&[13, 15, 16])
        .purpose("r = W_kR R_delta with the concatenated sinusoid"),
        Builder::new(
            "xl_relative.scores.no_memory",
            xl(InverseSqrtDim, None),
            Scores,
        )
        .shape(2, 7, 0, 64)
        .faults(&[1, 3, 4, 6, 7])
        .purpose("M = 0, odd L: the shift without memory"),
        Builder::new(
            "xl_relative.scores.short_memory",
            xl(InverseSqrtDim, None),
            Scores,
        )
        .shape(2, 9, 4, 64)
        .faults(&[1, 2, 3, 4, 12, 14])
        .purpose("M < L, odd L: four terms with both biases"),
        Builder::new(
            "xl_relative.scores.long_memory_d80",
            xl(InverseSqrtDim, None),
            Scores,
        )
        .shape(1, 3, 11, 80)
        .faults(&[1, 5, 8])
        .purpose("M > L at width 80"),
        Builder::new(
            "xl_relative.scores.single_query",
            xl(InverseSqrtDim, None),
            Scores,
        )
        .shape(2, 1, 6, 64)
        .faults(&[5, 6, 8])
        .purpose("L = 1, as in decoding"),
        Builder::new(
            "xl_relative.scores.scaled_clamped_d96",
            xl(Fixed(0.3), Some(5)),
            Scores,
        )
        .shape(2, 6, 6, 96)
        .faults(&[12, 14])
        .purpose("scale 0.3 and clamp length 5 at width 96"),
        Builder::new(
            "xl_relative.attention.f32",
            xl(InverseSqrtDim, None),
            Attention,
        )
        .shape(2, 5, 5, 64)
        .dtype(Dtype::F32)
        .faults(&[2, 5, 7])
        .purpose("probabilities and outputs in f32"),
        Builder::new(
            "xl_relative.attention.padded_rows",
            xl(InverseSqrtDim, None),
            Attention,
        )
        .shape(2, 4, 2, 64)
        .dtype(Dtype::F32)
        .hide(&[0, 1, 2])
        .faults(&[25])
        .purpose("padding hides every key of query 0: a fully masked row must give zeros, not NaN"),
        Builder::new(
            "xl_relative.attention.f16",
            xl(InverseSqrtDim, None),
            Attention,
        )
        .shape(2, 6, 4, 64)
        .dtype(Dtype::F16)
        .faults(&[26])
        .purpose("f16 kernel: the mask sentinel must not overflow"),
        Builder::new(
            "xl_relative.stream.memory_longer_than_segment",
            xl(InverseSqrtDim, None),
            stream(16),
        )
        .shape(2, 4, 6, 64)
        .faults(&[5, 11])
        .purpose("M > L: memory spans two earlier segments, newest rows kept"),
        Builder::new(
            "xl_relative.stream.ragged_tail",
            xl(InverseSqrtDim, None),
            stream(13),
        )
        .shape(1, 5, 3, 64)
        .faults(&[11])
        .purpose("M < L and a shorter last segment"),
        Builder::new(
            "xl_relative.decode.clamped",
            xl(InverseSqrtDim, Some(6)),
            decode(13, 6, &[1, 2, 4]),
        )
        .shape(2, 5, 0, 64)
        .faults(&[10, 12])
        .purpose("prefill 6 then chunks 1, 2, 4 with clamp length 6: r has 7 rows"),
        // Rotary.
        Builder::new(
            "rotary.encode.adjacent",
            rotary(64, Adjacent, none, InverseSqrtDim),
            Encode,
        )
        .shape(2, 5, 0, 64)
        .faults(&[17])
        .purpose("adjacent pairs (RoFormer eq. 34) far from position 0"),
        Builder::new(
            "rotary.encode.half_split_d96",
            rotary(96, HalfSplit, none, InverseSqrtDim),
            Encode,
        )
        .shape(1, 5, 0, 96)
        .start(4000)
        .faults(&[17])
        .purpose("half-split pairs at width 96"),
        Builder::new(
            "rotary.encode.partial_d80",
            rotary(32, HalfSplit, none, InverseSqrtDim),
            Encode,
        )
        .shape(1, 4, 0, 80)
        .start(700)
        .faults(&[18])
        .purpose("rotary width 32 of 80: the tail passes through exactly"),
        Builder::new(
            "rotary.encode.f16_past_2048",
            rotary(64, HalfSplit, none, InverseSqrtDim),
            Encode,
        )
        .shape(1, 4, 0, 64)
        .start(1857)
        .dtype(Dtype::F16)
        .faults(&[19])
        .purpose("f16 kernel at positions 1857..1861: angles formed in f16 drift"),
        Builder::new(
            "rotary.encode.linear_interpolation",
            rotary(
                64,
                HalfSplit,
                RotaryScaling::LinearInterpolation { factor: 4.0 },
                InverseSqrtDim,
            ),
            Encode,
        )
        .shape(1, 4, 0, 64)
        .start(8000)
        .faults(&[20])
        .purpose("positions divided by 4, not the frequencies"),
        Builder::new(
            "rotary.encode.ntk_aware",
            rotary(
                64,
                HalfSplit,
                RotaryScaling::NtkAware { factor: 8.0 },
                InverseSqrtDim,
            ),
            Encode,
        )
        .shape(1, 4, 0, 64)
        .start(3000)
        .faults(&[20])
        .purpose("NTK-aware base b*s^(d/(d-2))"),
        Builder::new(
            "rotary.scores.scaled",
            rotary(64, HalfSplit, none, Fixed(0.2)),
            Scores,
        )
        .shape(2, 7, 5, 64)
        .faults(&[8, 10, 14])
        .purpose("scores over a cache of 5 with scale 0.2"),
        Builder::new(
            "rotary.scores.linear_interpolation",
            rotary(
                64,
                HalfSplit,
                RotaryScaling::LinearInterpolation { factor: 2.0 },
                InverseSqrtDim,
            ),
            Scores,
        )
        .shape(2, 5, 4, 64)
        .start(9000)
        .faults(&[20])
        .purpose("interpolated positions in the scores of both queries and memory keys"),
        Builder::new(
            "rotary.attention.f32",
            rotary(64, Adjacent, none, InverseSqrtDim),
            Attention,
        )
        .shape(2, 5, 9, 64)
        .start(5000)
        .dtype(Dtype::F32)
        .faults(&[5, 8])
        .purpose("M > L in f32"),
        Builder::new(
            "rotary.attention.half_split_f32",
            rotary(64, HalfSplit, none, InverseSqrtDim),
            Attention,
        )
        .shape(2, 5, 7, 64)
        .start(6000)
        .dtype(Dtype::F32)
        .faults(&[5, 8, 17])
        .purpose("M > L in f32 with half-split pairs"),
        Builder::new(
            "rotary.attention.ntk_aware_partial",
            rotary(
                32,
                Adjacent,
                RotaryScaling::NtkAware { factor: 4.0 },
                InverseSqrtDim,
            ),
            Attention,
        )
        .shape(2, 4, 5, 64)
        .start(2500)
        .faults(&[18, 20])
        .purpose("NTK-aware base over rotary width 32 of 64, adjacent pairs, with memory"),
        Builder::new(
            "rotary.attention.bf16",
            rotary(64, HalfSplit, none, InverseSqrtDim),
            Attention,
        )
        .shape(1, 4, 4, 64)
        .start(100)
        .dtype(Dtype::Bf16)
        .faults(&[19])
        .purpose("bf16 kernel at small positions (bf16 integers are exact only to 256)"),
        Builder::new(
            "rotary.decode.chunks",
            rotary(64, HalfSplit, none, InverseSqrtDim),
            decode(14, 5, &[1, 2, 3, 3]),
        )
        .shape(2, 5, 0, 64)
        .start(300)
        .faults(&[10])
        .purpose("prefill 5 then chunks 1, 2, 3, 3: offsets must follow the cache"),
        Builder::new(
            "rotary.stream.segments",
            rotary(64, HalfSplit, none, InverseSqrtDim),
            stream(12),
        )
        .shape(1, 4, 4, 64)
        .start(0)
        .faults(&[9, 11])
        .purpose("positions keep counting across segments"),
        // ALiBi.
        Builder::new("alibi.encode.h8", alibi(), Encode)
            .shape(8, 1, 0, 64)
            .faults(&[22])
            .purpose("slopes 1/2 .. 1/256"),
        Builder::new("alibi.encode.h12", alibi(), Encode)
            .shape(12, 1, 0, 64)
            .faults(&[21])
            .purpose("non-power-of-two rule at 12 heads"),
        Builder::new("alibi.encode.h6", alibi(), Encode)
            .shape(6, 1, 0, 64)
            .faults(&[21])
            .purpose("non-power-of-two rule at 6 heads"),
        Builder::new("alibi.scores.h12", alibi(), Scores)
            .shape(12, 5, 3, 64)
            .start(500)
            .faults(&[3, 14, 21])
            .purpose("12 heads; the bias is not scaled"),
        Builder::new("alibi.attention.h6", alibi(), Attention)
            .shape(6, 4, 6, 64)
            .start(10)
            .faults(&[8, 21])
            .purpose("6 heads, M > L"),
        Builder::new("alibi.decode.chunks", alibi(), decode(10, 3, &[1, 1, 2, 3]))
            .shape(4, 5, 0, 64)
            .start(0)
            .faults(&[10])
            .purpose("prefill 3 then chunks 1, 1, 2, 3"),
        Builder::new(
            "alibi.stream.fixed_scale",
            SchemeSpec::Alibi {
                scale: Fixed(0.125),
            },
            stream(11),
        )
        .shape(3, 4, 3, 64)
        .start(40)
        .faults(&[9, 11, 14])
        .purpose("segments of 4 with memory 3, q·k scaled by 0.125 and the bias unscaled"),
        // T5 buckets.
        Builder::new("bucketed.encode.bidirectional", t5(32, 128, true), Encode)
            .shape(1, 1, 0, 64)
            .faults(&[23, 24])
            .purpose("offsets -256..256 into 32 buckets, both directions"),
        Builder::new("bucketed.encode.causal", t5(32, 128, false), Encode)
            .shape(1, 1, 0, 64)
            .faults(&[23, 24])
            .purpose("offsets -256..256, causal: future keys in bucket 0"),
        Builder::new(
            "bucketed.scores.beyond_max_distance",
            t5(32, 128, false),
            Scores,
        )
        .shape(2, 6, 200, 64)
        .faults(&[23, 24])
        .purpose("distances up to 205 pass the cap at 128"),
        Builder::new(
            "bucketed.attention.small_rule",
            t5(16, 32, false),
            Attention,
        )
        .shape(2, 5, 4, 64)
        .faults(&[23])
        .purpose("16 buckets, max distance 32"),
        Builder::new(
            "bucketed.decode.chunks",
            t5(16, 32, false),
            decode(12, 4, &[1, 2, 5]),
        )
        .shape(2, 5, 0, 64)
        .faults(&[10])
        .purpose("prefill 4 then chunks 1, 2, 5"),
        Builder::new(
            "bucketed.stream.bidirectional",
            SchemeSpec::Bucketed {
                num_buckets: 32,
                max_distance: 64,
                bidirectional: true,
                scale: InverseSqrtDim,
            },
            stream(14),
        )
        .shape(2, 5, 6, 64)
        .faults(&[11, 14, 23])
        .purpose("a bidirectional rule leaves 16 buckets for past keys; q·k scaled by 1/sqrt(d)"),
        // Shaw clipped.
        Builder::new("clipped.encode.k16", clipped(16), Encode)
            .shape(1, 1, 0, 64)
            .faults(&[3])
            .purpose("clip(j-i, -16, 16) + 16 over offsets -34..34"),
        Builder::new("clipped.scores.k4", clipped(4), Scores)
            .shape(2, 6, 7, 64)
            .faults(&[3, 8])
            .purpose("key embeddings, distances past the clip"),
        Builder::new("clipped.attention.k3", clipped(3), Attention)
            .shape(2, 5, 3, 64)
            .faults(&[3])
            .purpose("value embeddings in the output"),
        Builder::new(
            "clipped.decode.chunks",
            clipped(3),
            decode(10, 4, &[1, 2, 3]),
        )
        .shape(2, 5, 0, 64)
        .faults(&[10])
        .purpose("prefill 4 then chunks 1, 2, 3"),
        Builder::new(
            "clipped.stream.fixed_scale",
            SchemeSpec::Clipped {
                clip_distance: 2,
                scale: Fixed(0.2),
            },
            stream(10),
        )
        .shape(2, 3, 4, 64)
        .faults(&[11, 14])
        .purpose("segments of 3 with memory 4, distances past the clip, scale 0.2"),
    ]
}

fn long() -> Vec<Case> {
    let none = RotaryScaling::None;
    vec![
        Builder::new(
            "long.sinusoidal.encode.million",
            sinusoidal(Interleaved),
            Encode,
        )
        .shape(1, 64, 0, 128)
        .start(1_000_000 - 64)
        .dtype(Dtype::F32)
        .faults(&[19])
        .purpose("positions up to 10^6 in f32"),
        Builder::new(
            "long.rotary.encode.million",
            rotary(128, HalfSplit, none, InverseSqrtDim),
            Encode,
        )
        .shape(2, 64, 0, 128)
        .start(1_000_000 - 64)
        .faults(&[19])
        .purpose("rotations up to position 10^6"),
        Builder::new(
            "long.rotary.attention.f16",
            rotary(64, HalfSplit, none, InverseSqrtDim),
            Attention,
        )
        .shape(4, 256, 512, 64)
        .start(4096)
        .dtype(Dtype::F16)
        .faults(&[19, 26])
        .purpose("f16 kernel past the f16 integer limit"),
        Builder::new(
            "long.rotary.attention.bf16",
            rotary(64, Adjacent, none, InverseSqrtDim),
            Attention,
        )
        .shape(4, 256, 256, 64)
        .start(300)
        .dtype(Dtype::Bf16)
        .faults(&[19])
        .purpose("bf16 kernel past 256"),
        Builder::new(
            "long.xl_relative.scores.l2048",
            xl(InverseSqrtDim, None),
            Scores,
        )
        .shape(1, 2048, 2048, 64)
        .faults(&[1, 5, 8])
        .purpose("L = M = 2048"),
        Builder::new(
            "long.xl_relative.stream.t4096",
            xl(InverseSqrtDim, None),
            stream(4096),
        )
        .shape(1, 512, 1024, 64)
        .dtype(Dtype::F32)
        .faults(&[11])
        .purpose("4096 tokens in segments of 512 with memory 1024"),
        Builder::new("long.alibi.attention.h12", alibi(), Attention)
            .shape(12, 512, 1024, 64)
            .start(100_000)
            .dtype(Dtype::F16)
            .faults(&[21, 26])
            .purpose("12 heads in f16 far from 0"),
        Builder::new("long.bucketed.scores.far", t5(32, 128, false), Scores)
            .shape(2, 512, 1536, 64)
            .faults(&[24])
            .purpose("distances to 2047"),
        Builder::new("long.clipped.attention.k16", clipped(16), Attention)
            .shape(2, 512, 512, 64)
            .dtype(Dtype::F32)
            .faults(&[3])
            .purpose("k = 16 over 1024 keys"),
    ]
}
