//! What a case asks of a kernel, apart from the scheme: the operation, the sizes and
//! positions, the arrays that go in and come out (docs/conventions.md, "Operations").
//!
//! Schemes read a case through [`Shape`]; [`crate::case::Case`] is built on top.

use std::fmt;
use std::str::FromStr;

use crate::error::{Error, Result};

/// What the kernel is asked to compute.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Operation {
    /// The scheme's encoding table (sinusoid rows, learned rows, rotated vectors,
    /// relative embeddings, slopes, bucket or clip indices).
    Encode,
    /// Pre-softmax scores over `[memory ; current]`.
    Scores,
    /// Probabilities and attention outputs over `[memory ; current]`.
    Attention,
    /// A whole sequence through attention in segments of `L` with memory `M`.
    Stream {
        /// `T`, the number of tokens.
        tokens: usize,
    },
    /// A prefill of `prefill` tokens, then cached decoding in `chunks`.
    Decode {
        /// `T`, the number of tokens.
        tokens: usize,
        /// `P`, the tokens given at once before decoding starts.
        prefill: usize,
        /// The sizes of the decoding steps; they sum to `T - P`.
        chunks: Vec<usize>,
    },
}

impl Operation {
    /// The operation's kind, without its sizes.
    pub fn kind(&self) -> OperationKind {
        match self {
            Operation::Encode => OperationKind::Encode,
            Operation::Scores => OperationKind::Scores,
            Operation::Attention => OperationKind::Attention,
            Operation::Stream { .. } => OperationKind::Stream,
            Operation::Decode { .. } => OperationKind::Decode,
        }
    }

    /// The operation's name in files and on the command line.
    pub fn name(&self) -> &'static str {
        self.kind().name()
    }
}

/// The kinds of operation, as kernels list them in the handshake.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, serde::Serialize, serde::Deserialize,
)]
#[serde(rename_all = "snake_case")]
pub enum OperationKind {
    /// See [`Operation::Encode`].
    Encode,
    /// See [`Operation::Scores`].
    Scores,
    /// See [`Operation::Attention`].
    Attention,
    /// See [`Operation::Stream`].
    Stream,
    /// See [`Operation::Decode`].
    Decode,
}

impl OperationKind {
    /// Every kind, in the order of docs/conventions.md.
    pub const ALL: [OperationKind; 5] = [
        OperationKind::Encode,
        OperationKind::Scores,
        OperationKind::Attention,
        OperationKind::Stream,
        OperationKind::Decode,
    ];

    /// The name used in files, the protocol and on the command line.
    pub fn name(self) -> &'static str {
        match self {
            OperationKind::Encode => "encode",
            OperationKind::Scores => "scores",
            OperationKind::Attention => "attention",
            OperationKind::Stream => "stream",
            OperationKind::Decode => "decode",
        }
    }

    /// Whether the operation works on one attention window (`scores`, `attention`),
    /// where keys are `[memory ; current]` and hidden keys apply.
    pub fn is_window(self) -> bool {
        matches!(self, OperationKind::Scores | OperationKind::Attention)
    }
}

impl fmt::Display for OperationKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl FromStr for OperationKind {
    type Err = Error;

    fn from_str(s: &str) -> Result<Self> {
        OperationKind::ALL
            .into_iter()
            .find(|k| k.name() == s)
            .ok_or_else(|| {
                Error::param(
                    "operation",
                    "one of encode, scores, attention, stream, decode",
                    s,
                )
            })
    }
}

/// The arrays a kernel returns, by name.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, serde::Serialize, serde::Deserialize,
)]
#[serde(rename_all = "snake_case")]
pub enum Output {
    /// Sinusoid rows (`sinusoidal` encode).
    Table,
    /// Learned rows (`learned` encode).
    Rows,
    /// Rotated vectors (`rotary` encode).
    Rotated,
    /// Relative embeddings by distance (`xl_relative` encode).
    R,
    /// Per-head slopes (`alibi` encode).
    Slopes,
    /// Bucket indices (`bucketed` encode), integers.
    Buckets,
    /// Embedding indices (`clipped` encode), integers.
    Indices,
    /// Pre-softmax scores `[H, L, K]`.
    Scores,
    /// Probabilities `[H, L, K]`.
    Probs,
    /// Attention outputs `[H, L or T, d]`.
    Output,
}

impl Output {
    /// Every output.
    pub const ALL: [Output; 10] = [
        Output::Table,
        Output::Rows,
        Output::Rotated,
        Output::R,
        Output::Slopes,
        Output::Buckets,
        Output::Indices,
        Output::Scores,
        Output::Probs,
        Output::Output,
    ];

    /// The name used in files and the protocol.
    pub fn name(self) -> &'static str {
        match self {
            Output::Table => "table",
            Output::Rows => "rows",
            Output::Rotated => "rotated",
            Output::R => "r",
            Output::Slopes => "slopes",
            Output::Buckets => "buckets",
            Output::Indices => "indices",
            Output::Scores => "scores",
            Output::Probs => "probs",
            Output::Output => "output",
        }
    }

    /// Whether it holds integers (bucket and clip indices), compared exactly.
    pub fn is_integer(self) -> bool {
        matches!(self, Output::Buckets | Output::Indices)
    }

    /// Whether its last axis runs over keys `[memory ; current]` (masking applies).
    pub fn is_key_indexed(self) -> bool {
        matches!(self, Output::Scores | Output::Probs)
    }
}

impl fmt::Display for Output {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl FromStr for Output {
    type Err = Error;

    fn from_str(s: &str) -> Result<Self> {
        Output::ALL
            .into_iter()
            .find(|o| o.name() == s)
            .ok_or_else(|| Error::param("output", "an output name of docs/conventions.md", s))
    }
}

/// The sizes and positions of a case, as schemes see them (docs/conventions.md,
/// "Shapes and positions").
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Shape<'a> {
    /// `H`.
    pub heads: usize,
    /// `L`: queries per step, segment length for `stream`, rows for `encode`.
    pub query_len: usize,
    /// `M`: memory keys before the current segment.
    pub memory_len: usize,
    /// `d`.
    pub head_dim: usize,
    /// `p0`: absolute position of the first query (of token 0 for stream and decode).
    pub query_start: i64,
    /// The operation.
    pub operation: &'a Operation,
}

impl Shape<'_> {
    /// `K = M + L` (saturating: cases where it would not fit are refused).
    pub fn key_len(&self) -> usize {
        self.memory_len.saturating_add(self.query_len)
    }

    /// Tokens in the sequence for `stream` and `decode`; `L` otherwise.
    pub fn tokens(&self) -> usize {
        match self.operation {
            Operation::Stream { tokens } | Operation::Decode { tokens, .. } => *tokens,
            _ => self.query_len,
        }
    }

    /// The absolute positions the case touches, `first..last` (exclusive): keys from
    /// `p0 - M` for one window, tokens from `p0` for stream and decode.
    pub fn position_range(&self) -> (i64, i64) {
        match self.operation {
            Operation::Stream { tokens } | Operation::Decode { tokens, .. } => (
                self.query_start,
                self.query_start.saturating_add(*tokens as i64),
            ),
            _ => (
                self.query_start.saturating_sub(self.memory_len as i64),
                self.query_start.saturating_add(self.query_len as i64),
            ),
        }
    }
}

/// How an input array is filled.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Fill {
    /// Uniform in `[-scale, scale)` from the seed's stream, rounded to the case dtype.
    Uniform(f64),
    /// Absolute positions `p0, p0 + 1, …` (i64).
    Positions,
    /// The relative positions the scheme lists for `encode` (i64), from `-reach` to
    /// `reach`.
    RelativePositions {
        /// How far they reach on each side of 0.
        reach: u64,
    },
}

/// One input array of a case.
#[derive(Debug, Clone, PartialEq)]
pub struct InputSpec {
    /// Its name.
    pub name: &'static str,
    /// Its shape.
    pub shape: Vec<usize>,
    /// How it is filled.
    pub fill: Fill,
}

impl InputSpec {
    /// A uniform array in `[-scale, scale)`.
    pub fn uniform(name: &'static str, shape: Vec<usize>, scale: f64) -> Self {
        InputSpec {
            name,
            shape,
            fill: Fill::Uniform(scale),
        }
    }

    /// `positions[n]`: `p0, p0 + 1, …`.
    pub fn positions(n: usize) -> Self {
        InputSpec {
            name: "positions",
            shape: vec![n],
            fill: Fill::Positions,
        }
    }

    /// `relative_positions[2·reach + 1]`: `-reach ..= reach` (saturating length).
    pub fn relative_positions(reach: u64) -> Self {
        let count = reach.saturating_mul(2).saturating_add(1);
        InputSpec {
            name: "relative_positions",
            shape: vec![usize::try_from(count).unwrap_or(usize::MAX)],
            fill: Fill::RelativePositions { reach },
        }
    }
}
