//! Cases: one operation of one scheme, with its parameters, shapes, dtype and seed.
//!
//! A case fully determines its inputs (generated from the seed with the portable
//! ChaCha stream of [`crate::generate`], already rounded to the case dtype so a kernel
//! of that dtype receives them exactly) and its expected outputs (the f64 reference of
//! [`crate::reference`]).
//!
//! Operations and their arrays (docs/conventions.md, "Operations"; `K = M + L`, `T` tokens):
//!
//! | operation | inputs | outputs |
//! |---|---|---|
//! | `encode` | scheme table inputs (below) | the scheme's table |
//! | `scores` | `q[H,L,d]`, `k[H,K,d]` + scheme arrays | `scores[H,L,K]` |
//! | `attention` | `q`, `k`, `v[H,K,d]` + scheme arrays | `probs[H,L,K]`, `output[H,L,d]` |
//! | `stream` | `q`, `k`, `v[H,T,d]` + scheme arrays | `output[H,T,d]` |
//! | `decode` | `q`, `k`, `v[H,T,d]` + scheme arrays | `output[H,T-P,d]` |
//!
//! `stream` cuts the `T` tokens into segments of `L`; each segment's queries attend to
//! the newest `M` earlier tokens (the memory) and to their own segment causally; token
//! `t` sits at absolute position `p0 + t`. `decode` prefills `P` tokens and then feeds
//! the rest in the listed chunk sizes; its output is the rows of full causal attention
//! for tokens `P..T`.
//!
//! Scheme arrays: `learned` a `table[P_max, d]`; `xl_relative` `r[H,R,d]` (projected
//! relative embeddings by distance), `content_bias[H,d]` (u), `position_bias[H,d]` (v);
//! `bucketed` `bias_table[H, nb]`; `clipped` `w_key`, `w_value[H, 2k+1, d]`. Encode
//! inputs: `sinusoidal` `positions[L]`; `learned` `table`, `positions[L]`; `rotary`
//! `x[H,L,d]`, `positions[L]`; `xl_relative` `w_kr[H,d,d]`; `alibi` none; `bucketed`
//! and `clipped` `relative_positions[N]`.

use std::collections::BTreeMap;

use ndarray::{Array1, ArrayD, IxDyn};

use crate::attention::Scale;
use crate::error::{Error, Result};
use crate::math::precision::Dtype;
use crate::math::stream::Stream;
use crate::scheme::rotary::{Pairing, RotaryScaling};
use crate::scheme::sinusoidal::SinusoidLayout;
use crate::scheme::Scheme;
use crate::tensor::Tensor;

/// Named arrays: a case's inputs, expected outputs, or a kernel's results.
pub type Arrays = BTreeMap<String, Tensor>;

/// How an input array is filled.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Fill {
    /// Uniform in `[-scale, scale)` from the seed's stream, rounded to the case dtype.
    Uniform(f64),
    /// Absolute positions `p0, p0 + 1, …` (i64).
    Positions,
    /// The relative positions of [`Case::relative_positions`] (i64).
    RelativePositions,
}

/// One input array of a case.
#[derive(Debug, Clone, PartialEq)]
pub struct InputSpec {
    /// Its name.
    pub name: String,
    /// Its shape.
    pub shape: Vec<usize>,
    /// How it is filled.
    pub fill: Fill,
}

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
    /// The operation's name in files and on the command line.
    pub fn name(&self) -> &'static str {
        match self {
            Operation::Encode => "encode",
            Operation::Scores => "scores",
            Operation::Attention => "attention",
            Operation::Stream { .. } => "stream",
            Operation::Decode { .. } => "decode",
        }
    }
}

/// A scheme with its parameters.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(tag = "name", rename_all = "snake_case")]
pub enum SchemeSpec {
    /// Absolute sinusoid added to queries and keys (Vaswani et al. 2017, §3.5).
    Sinusoidal {
        /// Frequency base.
        base: f64,
        /// Pair layout.
        layout: SinusoidLayout,
    },
    /// Learned absolute table added to queries and keys.
    Learned {
        /// `P_max`, rows in the table.
        max_positions: usize,
    },
    /// Transformer-XL relative scoring (Dai et al. 2019, §3.3).
    XlRelative {
        /// Score scale.
        scale: Scale,
        /// Optional clamp length of the distance.
        clamp_len: Option<usize>,
    },
    /// Rotary embedding (Su et al. 2021).
    Rotary {
        /// `d_rot`, the rotated leading part of each head.
        rotary_dim: usize,
        /// Frequency base.
        base: f64,
        /// Pair layout.
        pairing: Pairing,
        /// Context-extension scaling.
        scaling: RotaryScaling,
        /// Score scale.
        scale: Scale,
    },
    /// ALiBi, distance form, slopes by the published rule (Press et al. 2022, §3).
    Alibi {
        /// Scale of `q·k` (never of the bias).
        scale: Scale,
    },
    /// T5 bucketed relative bias (Raffel et al. 2020, §2.1).
    Bucketed {
        /// Number of buckets.
        num_buckets: usize,
        /// Distance where the logarithmic buckets end.
        max_distance: usize,
        /// Whether keys after the query get their own buckets.
        bidirectional: bool,
        /// Scale of `q·k` (T5 uses 1).
        scale: Scale,
    },
    /// Clipped relative positions (Shaw et al. 2018).
    Clipped {
        /// `k`, the clip distance.
        clip_distance: usize,
        /// Score scale.
        scale: Scale,
    },
}

impl SchemeSpec {
    /// The scheme this spec parameterises.
    pub fn scheme(&self) -> Scheme {
        match self {
            SchemeSpec::Sinusoidal { .. } => Scheme::Sinusoidal,
            SchemeSpec::Learned { .. } => Scheme::Learned,
            SchemeSpec::XlRelative { .. } => Scheme::XlRelative,
            SchemeSpec::Rotary { .. } => Scheme::Rotary,
            SchemeSpec::Alibi { .. } => Scheme::Alibi,
            SchemeSpec::Bucketed { .. } => Scheme::Bucketed,
            SchemeSpec::Clipped { .. } => Scheme::Clipped,
        }
    }

    /// The score scale the scheme uses.
    pub fn scale(&self) -> Scale {
        match self {
            SchemeSpec::Sinusoidal { .. } | SchemeSpec::Learned { .. } => Scale::InverseSqrtDim,
            SchemeSpec::XlRelative { scale, .. }
            | SchemeSpec::Rotary { scale, .. }
            | SchemeSpec::Alibi { scale }
            | SchemeSpec::Bucketed { scale, .. }
            | SchemeSpec::Clipped { scale, .. } => *scale,
        }
    }
}

/// One conformance case.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Case {
    /// Unique, readable identifier; also the vector file's stem.
    pub id: String,
    /// The scheme and its parameters.
    pub scheme: SchemeSpec,
    /// What to compute.
    pub operation: Operation,
    /// `H`.
    pub heads: usize,
    /// `L`: queries per step, segment length for `stream`, rows for `encode`.
    pub query_len: usize,
    /// `M`: memory (or cache) keys before the current segment.
    pub memory_len: usize,
    /// `d`.
    pub head_dim: usize,
    /// `p0`: absolute position of the first query (of token 0 for stream/decode).
    pub query_start: i64,
    /// Keys hidden from every query on top of the causal mask (padding); a row whose
    /// visible keys are all hidden is fully masked. `scores` and `attention` only.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub hidden_keys: Vec<usize>,
    /// The dtype the case is written for; inputs are exactly representable in it.
    pub dtype: Dtype,
    /// Seed of the input stream.
    pub seed: u64,
    /// Fault classes (docs/faults.md) this case is built to expose.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub faults: Vec<u8>,
    /// Why the case exists, in one sentence.
    pub purpose: String,
}

/// Largest number of elements any one array of a case may have (guards memory when a
/// vector file asks for absurd shapes).
pub const MAX_ELEMENTS: usize = 1 << 27;

impl Case {
    /// `K = M + L` (saturating: [`Case::validate`] refuses cases where it would not fit).
    pub fn key_len(&self) -> usize {
        self.memory_len.saturating_add(self.query_len)
    }

    /// Tokens in the sequence for `stream` and `decode`; `L` otherwise.
    pub fn tokens(&self) -> usize {
        match &self.operation {
            Operation::Stream { tokens } | Operation::Decode { tokens, .. } => *tokens,
            _ => self.query_len,
        }
    }

    /// Number of relative-embedding rows `r` the case needs (xl_relative).
    pub fn relative_rows(&self) -> usize {
        let rows = match &self.operation {
            Operation::Stream { tokens } => (*tokens).min(self.key_len()),
            Operation::Decode { tokens, .. } => *tokens,
            _ => self.key_len(),
        };
        match &self.scheme {
            SchemeSpec::XlRelative {
                clamp_len: Some(c), ..
            } => rows.min(c + 1),
            _ => rows,
        }
    }

    /// The absolute positions the case touches, `first..last` (exclusive): keys from
    /// `p0 - M` for one window, tokens from `p0` for stream and decode.
    pub fn position_range(&self) -> (i64, i64) {
        match &self.operation {
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

    /// How far the relative positions of `encode` reach on each side of 0 (saturating).
    fn relative_reach(&self) -> u64 {
        let sat = |x: usize| u64::try_from(x).unwrap_or(u64::MAX);
        match &self.scheme {
            SchemeSpec::Bucketed { max_distance, .. } => sat(*max_distance).saturating_mul(2),
            SchemeSpec::Clipped { clip_distance, .. } => {
                sat(*clip_distance).saturating_mul(2).saturating_add(2)
            }
            _ => 0,
        }
        .max(sat(self.key_len()))
    }

    /// How many relative positions `encode` lists for bucketed and clipped schemes,
    /// without listing them (saturating).
    pub fn relative_positions_len(&self) -> usize {
        let count = self.relative_reach().saturating_mul(2).saturating_add(1);
        usize::try_from(count).unwrap_or(usize::MAX)
    }

    /// Relative positions listed by `encode` for bucketed and clipped schemes. Call it
    /// on a validated case: [`Case::validate`] bounds how many there are.
    pub fn relative_positions(&self) -> Vec<i64> {
        let reach = i64::try_from(self.relative_reach()).unwrap_or(i64::MAX - 1);
        (-reach..=reach).collect()
    }

    /// Checks every parameter, naming the field that is wrong.
    pub fn validate(&self) -> Result<()> {
        let at_least_one = |name: &'static str, x: usize| {
            if x == 0 {
                Err(Error::param(name, ">= 1", x))
            } else {
                Ok(())
            }
        };
        if self.id.is_empty()
            || !self
                .id
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || "._-".contains(c))
        {
            return Err(Error::param(
                "id",
                "a non-empty name of [A-Za-z0-9._-]",
                &self.id,
            ));
        }
        at_least_one("heads", self.heads)?;
        at_least_one("query_len", self.query_len)?;
        at_least_one("head_dim", self.head_dim)?;
        match &self.operation {
            Operation::Stream { tokens } => at_least_one("operation.tokens", *tokens)?,
            Operation::Decode {
                tokens,
                prefill,
                chunks,
            } => {
                at_least_one("operation.tokens", *tokens)?;
                if prefill >= tokens {
                    return Err(Error::param(
                        "operation.prefill",
                        format!("< tokens = {tokens}"),
                        prefill,
                    ));
                }
                let total = chunks.iter().try_fold(0usize, |acc, &c| acc.checked_add(c));
                if chunks.contains(&0) || total != Some(tokens - prefill) {
                    return Err(Error::param(
                        "operation.chunks",
                        format!(
                            "sizes >= 1 summing to tokens - prefill = {}",
                            tokens - prefill
                        ),
                        format!("{chunks:?}"),
                    ));
                }
            }
            _ => {}
        }
        if !self.hidden_keys.is_empty() {
            if !matches!(self.operation, Operation::Scores | Operation::Attention) {
                return Err(Error::param(
                    "hidden_keys",
                    "empty unless the operation is scores or attention",
                    format!("{:?}", self.hidden_keys),
                ));
            }
            if let Some(bad) = self.hidden_keys.iter().find(|&&j| j >= self.key_len()) {
                return Err(Error::param(
                    "hidden_keys",
                    format!("key indices < M+L = {}", self.key_len()),
                    bad,
                ));
            }
        }
        if self.memory_len.checked_add(self.query_len).is_none() {
            return Err(Error::param(
                "memory_len",
                "M + L within the address space",
                self.memory_len,
            ));
        }
        let (first, last) = self.position_range();
        let limit = 1i64 << 53;
        if first < -limit
            || last > limit
            || self.key_len() as i64 > limit
            || self.tokens() as i64 > limit
        {
            return Err(Error::param(
                "query_start",
                "positions p0-M .. p0+T within ±2^53",
                self.query_start,
            ));
        }
        let largest = [
            self.heads
                .saturating_mul(self.tokens().max(self.query_len))
                .saturating_mul(self.key_len().max(self.tokens())),
            self.heads
                .saturating_mul(self.tokens())
                .saturating_mul(self.head_dim),
        ]
        .into_iter()
        .max()
        .unwrap_or(0);
        let max_elements = crate::tensor::max_elements();
        if largest > max_elements {
            return Err(Error::param(
                "shape",
                format!("at most {max_elements} elements per array"),
                largest,
            ));
        }
        match &self.scheme {
            SchemeSpec::Sinusoidal { base, .. } => crate::scheme::sinusoidal::Sinusoid::new(
                self.head_dim,
                *base,
                SinusoidLayout::Interleaved,
            )
            .map(drop)?,
            SchemeSpec::Learned { max_positions } => {
                at_least_one("scheme.max_positions", *max_positions)?;
                if first < 0 || last > *max_positions as i64 {
                    return Err(Error::param(
                        "query_start",
                        format!("positions {first}..{last} inside the table 0..{max_positions}"),
                        self.query_start,
                    ));
                }
            }
            SchemeSpec::XlRelative { scale, .. } => scale.validate()?,
            SchemeSpec::Rotary {
                rotary_dim,
                base,
                pairing,
                scaling,
                scale,
            } => {
                scale.validate()?;
                crate::scheme::rotary::Rotary::new(crate::scheme::rotary::RotaryParams {
                    head_dim: self.head_dim,
                    rotary_dim: *rotary_dim,
                    base: *base,
                    pairing: *pairing,
                    scaling: *scaling,
                })
                .map(drop)?
            }
            SchemeSpec::Alibi { scale } => {
                scale.validate()?;
                crate::scheme::alibi::slopes(self.heads).map(drop)?
            }
            SchemeSpec::Bucketed {
                num_buckets,
                max_distance,
                bidirectional,
                scale,
            } => {
                scale.validate()?;
                crate::scheme::bucketed::Buckets::new(*num_buckets, *max_distance, *bidirectional)
                    .map(drop)?
            }
            SchemeSpec::Clipped {
                clip_distance,
                scale,
            } => {
                scale.validate()?;
                if *clip_distance > 1 << 20 {
                    return Err(Error::param(
                        "scheme.clip_distance",
                        "<= 2^20",
                        clip_distance,
                    ));
                }
            }
        }
        // Every array the case implies, scheme tables and relative positions included,
        // within the element limit (checked arithmetic, nothing allocated).
        let shapes = self
            .input_specs()
            .into_iter()
            .map(|spec| (spec.name, spec.shape))
            .chain(
                self.output_shapes()
                    .into_iter()
                    .map(|(name, shape)| (name.to_string(), shape)),
            );
        for (name, shape) in shapes {
            let elements = shape
                .iter()
                .try_fold(1usize, |acc, &d| acc.checked_mul(d.max(1)));
            if elements.map_or(true, |n| n > max_elements) {
                return Err(Error::param(
                    "shape",
                    format!("at most {max_elements} elements per array"),
                    format!("`{name}` of shape {shape:?}"),
                ));
            }
        }
        Ok(())
    }

    /// The inputs of this case, in generation order: name, shape and how each is
    /// filled. The order is part of the vector format (it fixes which part of the seed's
    /// stream each array takes), so new arrays go at the end of their branch.
    pub fn input_specs(&self) -> Vec<InputSpec> {
        let (h, d, l) = (self.heads, self.head_dim, self.query_len);
        let uniform = |name: &str, shape: Vec<usize>, scale: f64| InputSpec {
            name: name.into(),
            shape,
            fill: Fill::Uniform(scale),
        };
        let positions = |n: usize| InputSpec {
            name: "positions".into(),
            shape: vec![n],
            fill: Fill::Positions,
        };
        let mut specs = Vec::new();
        if self.operation == Operation::Encode {
            match &self.scheme {
                SchemeSpec::Sinusoidal { .. } => specs.push(positions(l)),
                SchemeSpec::Learned { max_positions } => {
                    specs.push(uniform("table", vec![*max_positions, d], 1.0));
                    specs.push(positions(l));
                }
                SchemeSpec::Rotary { .. } => {
                    specs.push(uniform("x", vec![h, l, d], 1.0));
                    specs.push(positions(l));
                }
                SchemeSpec::XlRelative { .. } => {
                    specs.push(uniform("w_kr", vec![h, d, d], 1.0 / (d as f64).sqrt()))
                }
                SchemeSpec::Alibi { .. } => {}
                SchemeSpec::Bucketed { .. } | SchemeSpec::Clipped { .. } => specs.push(InputSpec {
                    name: "relative_positions".into(),
                    shape: vec![self.relative_positions_len()],
                    fill: Fill::RelativePositions,
                }),
            }
            return specs;
        }
        let (queries, keys) = match &self.operation {
            Operation::Scores | Operation::Attention => (l, self.key_len()),
            _ => (self.tokens(), self.tokens()),
        };
        specs.push(uniform("q", vec![h, queries, d], 1.0));
        specs.push(uniform("k", vec![h, keys, d], 1.0));
        if self.operation != Operation::Scores {
            specs.push(uniform("v", vec![h, keys, d], 1.0));
        }
        match &self.scheme {
            SchemeSpec::Sinusoidal { .. }
            | SchemeSpec::Rotary { .. }
            | SchemeSpec::Alibi { .. } => {}
            SchemeSpec::Learned { max_positions } => {
                specs.push(uniform("table", vec![*max_positions, d], 1.0))
            }
            SchemeSpec::XlRelative { .. } => {
                specs.push(uniform("r", vec![h, self.relative_rows(), d], 1.0));
                specs.push(uniform("content_bias", vec![h, d], 0.5));
                specs.push(uniform("position_bias", vec![h, d], 0.5));
            }
            SchemeSpec::Bucketed { num_buckets, .. } => {
                specs.push(uniform("bias_table", vec![h, *num_buckets], 2.0))
            }
            SchemeSpec::Clipped { clip_distance, .. } => {
                specs.push(uniform("w_key", vec![h, 2 * clip_distance + 1, d], 0.5));
                specs.push(uniform("w_value", vec![h, 2 * clip_distance + 1, d], 0.5));
            }
        }
        specs
    }

    /// The seeded inputs of this case, in the case dtype (positions in i64).
    pub fn inputs(&self) -> Result<Arrays> {
        self.validate()?;
        let mut stream = Stream::new(self.seed);
        let mut arrays = Arrays::new();
        for spec in self.input_specs() {
            let tensor = match spec.fill {
                Fill::Uniform(scale) => {
                    Tensor::from_f64(self.dtype, stream.array(IxDyn(&spec.shape), scale))
                }
                Fill::Positions => {
                    let p = Array1::from_iter(
                        (0..spec.shape[0] as i64).map(|i| (self.query_start + i) as f64),
                    );
                    Tensor::from_f64(Dtype::I64, p.into_dyn())
                }
                Fill::RelativePositions => {
                    let rel =
                        Array1::from_iter(self.relative_positions().into_iter().map(|x| x as f64));
                    Tensor::from_f64(Dtype::I64, rel.into_dyn())
                }
            };
            arrays.insert(spec.name, tensor);
        }
        Ok(arrays)
    }

    /// Checks that `inputs` has every input of the case with the right shape, naming
    /// the first array that does not (extra arrays are allowed and ignored).
    pub fn check_inputs(&self, inputs: &Arrays) -> Result<()> {
        for spec in self.input_specs() {
            match inputs.get(&spec.name) {
                None => {
                    return Err(Error::format(
                        format!("case {}", self.id),
                        format!("missing input array `{}`", spec.name),
                    ))
                }
                Some(t) if t.shape() != spec.shape.as_slice() => {
                    return Err(Error::format(
                        format!("case {}, input `{}`", self.id, spec.name),
                        format!("shape {:?}, the case needs {:?}", t.shape(), spec.shape),
                    ))
                }
                Some(_) => {}
            }
        }
        Ok(())
    }

    /// Names and shapes of the outputs a kernel must return for this case.
    pub fn output_shapes(&self) -> Vec<(&'static str, Vec<usize>)> {
        let (h, l, k, d) = (self.heads, self.query_len, self.key_len(), self.head_dim);
        match &self.operation {
            Operation::Encode => match &self.scheme {
                SchemeSpec::Sinusoidal { .. } => vec![("table", vec![l, d])],
                SchemeSpec::Learned { .. } => vec![("rows", vec![l, d])],
                SchemeSpec::Rotary { .. } => vec![("rotated", vec![h, l, d])],
                SchemeSpec::XlRelative { .. } => vec![("r", vec![h, k, d])],
                SchemeSpec::Alibi { .. } => vec![("slopes", vec![h])],
                SchemeSpec::Bucketed { .. } => {
                    vec![("buckets", vec![self.relative_positions_len()])]
                }
                SchemeSpec::Clipped { .. } => {
                    vec![("indices", vec![self.relative_positions_len()])]
                }
            },
            Operation::Scores => vec![("scores", vec![h, l, k])],
            Operation::Attention => vec![("probs", vec![h, l, k]), ("output", vec![h, l, d])],
            Operation::Stream { tokens } => vec![("output", vec![h, *tokens, d])],
            Operation::Decode {
                tokens, prefill, ..
            } => vec![("output", vec![h, tokens.saturating_sub(*prefill), d])],
        }
    }
}

/// Whether an output holds integers (bucket and clip indices), compared exactly.
pub fn is_integer_output(name: &str) -> bool {
    matches!(name, "buckets" | "indices")
}

/// Looks up a named input, as an error naming the case and array when it is missing.
pub(crate) fn input<'a>(arrays: &'a Arrays, case: &Case, name: &str) -> Result<&'a Tensor> {
    arrays.get(name).ok_or_else(|| {
        Error::format(
            format!("case {}", case.id),
            format!("missing input array `{name}`"),
        )
    })
}

/// A dynamic array as a fixed-dimension one, naming the array on mismatch.
pub(crate) fn fixed<D: ndarray::Dimension>(
    name: &str,
    x: ArrayD<f64>,
) -> Result<ndarray::Array<f64, D>> {
    let shape = x.shape().to_vec();
    x.into_dimensionality::<D>().map_err(|_| {
        Error::format(
            format!("array `{name}`"),
            format!("unexpected rank {}", shape.len()),
        )
    })
}
