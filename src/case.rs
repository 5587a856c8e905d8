//! Cases: one operation of one scheme, with its parameters, shapes, dtype and seed.
//!
//! A case fully determines its inputs (generated from the seed with the portable
//! ChaCha stream of [`crate::math::stream`], already rounded to the case dtype so a kernel
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
//! The scheme's own arrays (encode inputs, tables, biases) come from its
//! [`SchemeModel`]: see each scheme module and docs/conventions.md.

use std::collections::BTreeMap;

use ndarray::{Array1, IxDyn};

use crate::error::{Error, Result};
use crate::math::{Dtype, Stream};
use crate::scheme::{SchemeModel, SchemeSpec};
use crate::tensor::Tensor;

pub use crate::shape::{Fill, InputSpec, Operation, OperationKind, Output, Shape};

/// How many f64 copies of a case's outputs checking it holds at once, at most
/// (measured: see [`Case::memory_needed`] and docs/budgets.md, "Memory").
pub const OUTPUT_COPIES: u64 = 4;

/// Named arrays: a case's inputs, expected outputs, or a kernel's results.
pub type Arrays = BTreeMap<String, Tensor>;

fn unit() -> f64 {
    1.0
}

fn is_unit(x: &f64) -> bool {
    *x == 1.0
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
    /// Amplitude of the queries and keys (`q`, `k`) relative to the default uniform
    /// `[-1, 1)`: large values give scores past the dtype's exponent range, where a
    /// softmax without max-subtraction overflows. Absent means 1.
    #[serde(default = "unit", skip_serializing_if = "is_unit")]
    pub input_scale: f64,
    /// The dtype the case is written for; inputs are exactly representable in it.
    pub dtype: Dtype,
    /// Seed of the input stream.
    pub seed: u64,
    /// Ids of the catalogued faults this case is built to expose (docs/faults.md,
    /// `posconform explain ID`).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub faults: Vec<String>,
    /// Why the case exists, in one sentence.
    pub purpose: String,
}

impl Case {
    /// The sizes and positions of the case, as schemes see them.
    pub fn shape(&self) -> Shape<'_> {
        Shape {
            heads: self.heads,
            query_len: self.query_len,
            memory_len: self.memory_len,
            head_dim: self.head_dim,
            query_start: self.query_start,
            operation: &self.operation,
        }
    }

    /// What the case's scheme contributes, with its parameters.
    pub fn model(&self) -> &dyn SchemeModel {
        self.scheme.model()
    }

    /// `K = M + L` (saturating: [`Case::validate`] refuses cases where it would not fit).
    pub fn key_len(&self) -> usize {
        self.shape().key_len()
    }

    /// Tokens in the sequence for `stream` and `decode`; `L` otherwise.
    pub fn tokens(&self) -> usize {
        self.shape().tokens()
    }

    /// The absolute positions the case touches, `first..last` (exclusive): keys from
    /// `p0 - M` for one window, tokens from `p0` for stream and decode.
    pub fn position_range(&self) -> (i64, i64) {
        self.shape().position_range()
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
        if !(self.input_scale.is_finite() && self.input_scale > 0.0 && self.input_scale <= 1e4) {
            return Err(Error::param(
                "input_scale",
                "a finite number in (0, 10000]",
                self.input_scale,
            ));
        }
        if !self.hidden_keys.is_empty() {
            if !self.operation.kind().is_window() {
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
        self.model().validate(&self.shape())?;
        // Every array the case implies, scheme tables and relative positions included,
        // within the element limit (checked arithmetic, nothing allocated), and all of
        // them together within the machine's memory.
        let shapes = self
            .input_specs()
            .into_iter()
            .map(|spec| (spec.name, spec.shape))
            .chain(
                self.output_shapes()
                    .into_iter()
                    .map(|(output, shape)| (output.name(), shape)),
            );
        for (name, shape) in shapes {
            let elements = shape
                .iter()
                .try_fold(1usize, |acc, &d| acc.checked_mul(d.max(1)));
            if elements.is_none_or(|n| n > max_elements) {
                return Err(Error::param(
                    "shape",
                    format!("at most {max_elements} elements per array"),
                    format!("`{name}` of shape {shape:?}"),
                ));
            }
        }
        let available = crate::tensor::available_memory();
        let needed = self.memory_needed();
        if needed > available.bytes {
            return Err(Error::TooLarge {
                case: self.id.clone(),
                needed,
                available: available.bytes,
                detail: self.memory_detail(),
                source_of: available.source,
            });
        }
        Ok(())
    }

    /// What [`Case::memory_needed`] counts, for the message of a case too large.
    fn memory_detail(&self) -> String {
        let outputs: Vec<String> = self
            .output_shapes()
            .into_iter()
            .map(|(output, shape)| format!("`{output}` {shape:?}"))
            .collect();
        if crate::headwise::compared_by_head(self) {
            format!(
                "outputs {}, compared one head at a time: the answer once and about six f64 copies of one head's outputs",
                outputs.join(", ")
            )
        } else {
            format!(
                "outputs {}, each held as f64 about {OUTPUT_COPIES} times at once",
                outputs.join(", ")
            )
        }
    }

    /// Bytes of memory checking this case needs at its peak, estimated: its inputs
    /// (twice: as generated and as sent) and [`OUTPUT_COPIES`] f64 copies of its outputs
    /// (the expected values, their bounds and the kernel's answer, with the
    /// intermediates of the bounds); for a case compared head by head
    /// ([`crate::headwise::compared_by_head`]), the answer once (counted as f64) and
    /// six f64 copies of one head's outputs. Shapes must have passed the element checks of
    /// [`Case::validate`]; the arithmetic saturates.
    pub fn memory_needed(&self) -> u64 {
        let elements = |shape: &[usize]| {
            shape
                .iter()
                .fold(1u64, |acc, &d| acc.saturating_mul(d as u64))
        };
        let inputs = self
            .input_specs()
            .iter()
            .fold(0u64, |acc, spec| acc.saturating_add(elements(&spec.shape)));
        let outputs = self
            .output_shapes()
            .iter()
            .fold(0u64, |acc, (_, shape)| acc.saturating_add(elements(shape)));
        if crate::headwise::compared_by_head(self) {
            // Compared head by head: the answer (at most f64 wide) and about six f64
            // copies of one head's outputs (expected values, bounds or baseline, their
            // intermediates, the answer's head converted).
            let per_head = outputs / (self.heads.max(1) as u64);
            return inputs
                .saturating_mul(2)
                .saturating_add(outputs)
                .saturating_add(per_head.saturating_mul(6))
                .saturating_mul(8);
        }
        inputs
            .saturating_mul(2)
            .saturating_add(outputs.saturating_mul(OUTPUT_COPIES))
            .saturating_mul(8)
    }

    /// The inputs of this case, in generation order: name, shape and how each is
    /// filled. The order is part of the vector format (it fixes which part of the seed's
    /// stream each array takes), so new arrays go at the end.
    pub fn input_specs(&self) -> Vec<InputSpec> {
        let shape = self.shape();
        if self.operation == Operation::Encode {
            return self.model().encode_inputs(&shape);
        }
        let (h, d) = (self.heads, self.head_dim);
        let (queries, keys) = if self.operation.kind().is_window() {
            (self.query_len, self.key_len())
        } else {
            (self.tokens(), self.tokens())
        };
        let mut specs = vec![
            InputSpec::uniform("q", vec![h, queries, d], 1.0),
            InputSpec::uniform("k", vec![h, keys, d], 1.0),
        ];
        if self.operation != Operation::Scores {
            specs.push(InputSpec::uniform("v", vec![h, keys, d], 1.0));
        }
        specs.extend(self.model().window_inputs(&shape));
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
                    let scale = if matches!(spec.name, "q" | "k") {
                        scale * self.input_scale
                    } else {
                        scale
                    };
                    Tensor::from_f64(self.dtype, stream.array(IxDyn(&spec.shape), scale))
                }
                Fill::Positions => {
                    let p = Array1::from_iter(
                        (0..spec.shape[0] as i64).map(|i| (self.query_start + i) as f64),
                    );
                    Tensor::from_f64(Dtype::I64, p.into_dyn())
                }
                Fill::RelativePositions { reach } => {
                    // validate() bounds the count, so the reach fits an i64.
                    let reach = i64::try_from(reach).unwrap_or(i64::MAX - 1);
                    let rel = Array1::from_iter((-reach..=reach).map(|x| x as f64));
                    Tensor::from_f64(Dtype::I64, rel.into_dyn())
                }
            };
            arrays.insert(spec.name.to_string(), tensor);
        }
        Ok(arrays)
    }

    /// Checks that `inputs` has every input of the case with the right shape, naming
    /// the first array that does not (extra arrays are allowed and ignored).
    pub fn check_inputs(&self, inputs: &Arrays) -> Result<()> {
        for spec in self.input_specs() {
            match inputs.get(spec.name) {
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

    /// The outputs a kernel must return for this case, with their shapes.
    pub fn output_shapes(&self) -> Vec<(Output, Vec<usize>)> {
        let (h, l, k, d) = (self.heads, self.query_len, self.key_len(), self.head_dim);
        match &self.operation {
            Operation::Encode => vec![self.model().encode_output(&self.shape())],
            Operation::Scores => vec![(Output::Scores, vec![h, l, k])],
            Operation::Attention => vec![
                (Output::Probs, vec![h, l, k]),
                (Output::Output, vec![h, l, d]),
            ],
            Operation::Stream { tokens } => vec![(Output::Output, vec![h, *tokens, d])],
            Operation::Decode {
                tokens, prefill, ..
            } => vec![(Output::Output, vec![h, tokens.saturating_sub(*prefill), d])],
        }
    }
}

/// Which entries of the key-indexed outputs (`scores`, `probs` of `scores` and
/// `attention` cases) the case hides: the causal mask over `[memory ; current]` and
/// the hidden keys, as a flat `[L, K]` table.
#[derive(Debug, Clone)]
pub struct Visibility {
    /// `(L, K, visible[i·K + j])` for window operations.
    mask: Option<(usize, usize, Vec<bool>)>,
}

impl Visibility {
    /// The visibility of `case`'s key-indexed entries.
    pub fn of(case: &Case) -> Self {
        let mask = case.operation.kind().is_window().then(|| {
            let (l, k) = (case.query_len, case.key_len());
            let mut visible = vec![false; l * k];
            for i in 0..l {
                for j in 0..k {
                    visible[i * k + j] = j <= case.memory_len + i;
                }
            }
            for &j in &case.hidden_keys {
                for i in 0..l {
                    if j < k {
                        visible[i * k + j] = false;
                    }
                }
            }
            (l, k, visible)
        });
        Visibility { mask }
    }

    /// Whether flat element `n` of a key-indexed `[H, L, K]` output is hidden.
    pub fn hidden(&self, n: usize) -> bool {
        match &self.mask {
            Some((l, k, visible)) => !visible[n % (l * k)],
            None => false,
        }
    }
}

impl Case {
    /// Smaller variants of this case, most aggressive first, all valid (for shrinking a
    /// failing case, and for finding the smallest case a fault shows on).
    pub fn smaller(&self) -> Vec<Case> {
        let case = self;
        let mut out = Vec::new();
        let mut push = |f: &dyn Fn(&mut Case)| {
            let mut c = case.clone();
            f(&mut c);
            if c != *case && c.validate().is_ok() {
                out.push(c);
            }
        };
        let halves = |x: usize| [0, 1, x / 2, x.saturating_sub(1)];
        for v in halves(case.memory_len) {
            push(&|c| c.memory_len = v);
        }
        for v in halves(case.query_len) {
            push(&|c| c.query_len = v.max(1));
        }
        for v in halves(case.heads) {
            push(&|c| c.heads = v.max(1));
        }
        for v in [2, case.head_dim / 2, case.head_dim.saturating_sub(2)] {
            push(&|c| {
                c.head_dim = v.max(2) & !1;
                if let Some(fitted) = c.model().fit_head_dim(c.head_dim) {
                    c.scheme = fitted;
                }
            });
        }
        for v in [
            0,
            case.query_start / 2,
            case.query_start - case.query_start.signum(),
        ] {
            push(&|c| c.query_start = v);
        }
        match &case.operation {
            Operation::Stream { tokens } => {
                for v in halves(*tokens) {
                    push(&|c| c.operation = Operation::Stream { tokens: v.max(1) });
                }
            }
            Operation::Decode {
                tokens,
                prefill,
                chunks,
            } => {
                let (tokens, prefill, chunks) = (*tokens, *prefill, chunks.clone());
                if chunks.len() > 1 {
                    push(&|c| {
                        let mut shorter = chunks.clone();
                        let last = shorter.pop().unwrap_or(0);
                        c.operation = Operation::Decode {
                            tokens: tokens - last,
                            prefill,
                            chunks: shorter,
                        };
                    });
                }
                if prefill > 1 {
                    push(&|c| {
                        c.operation = Operation::Decode {
                            tokens: tokens - prefill + 1,
                            prefill: 1,
                            chunks: chunks.clone(),
                        }
                    });
                }
            }
            _ => {}
        }
        for simpler in case.model().simpler(&case.shape()) {
            push(&|c| c.scheme = simpler.clone());
        }
        out
    }

    /// How far a case is from the simplest one: element count, then distance of the
    /// positions from 0, then how many parameters differ from their plain defaults.
    pub fn complexity(&self) -> (usize, i64, usize) {
        let case = self;
        let elements =
            case.heads * case.tokens().max(case.query_len) * (case.key_len() + case.head_dim);
        let extras = case.model().extras(&case.shape()) + case.hidden_keys.len();
        (elements, case.query_start.abs(), extras)
    }
}
