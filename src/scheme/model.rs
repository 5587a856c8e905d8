//! What one positional scheme contributes to cases, references, budgets and fuzzing: the
//! [`SchemeModel`] trait each scheme's parameters implement, and the view of a case's
//! input arrays it reads ([`Inputs`]).
//!
//! The suite, the checker, the comparison and the reports are generic over this trait:
//! adding a scheme is one module implementing it plus one line in the registry of
//! [`crate::scheme`].

use std::collections::BTreeMap;
use std::fmt;

use ndarray::{Array3, ArrayD, ArrayView2, ArrayView3, ArrayViewD, CowArray, IxDyn};

use crate::attention::{Scale, Window};
use crate::error::{Error, Result};
use crate::math::{Contract, Stream};
use crate::scheme::SchemeSpec;
use crate::shape::{InputSpec, Output, Shape};

/// A case's input arrays as f64, by name: borrowed from the case's tensors, or owned
/// where the baseline rounded them.
pub type InputArrays<'a> = BTreeMap<String, CowArray<'a, f64, IxDyn>>;

/// A view of a case's input arrays, as schemes read them.
#[derive(Debug, Clone, Copy)]
pub struct Inputs<'a, 'data> {
    case: &'a str,
    arrays: &'a InputArrays<'data>,
}

impl<'a, 'data> Inputs<'a, 'data> {
    /// The arrays of case `case`.
    pub fn new(case: &'a str, arrays: &'a InputArrays<'data>) -> Self {
        Inputs { case, arrays }
    }

    /// The array `name`, as an error naming the case when it is missing.
    pub fn get(&self, name: &str) -> Result<ArrayViewD<'a, f64>> {
        self.arrays.get(name).map(|a| a.view()).ok_or_else(|| {
            Error::format(
                format!("case {}", self.case),
                format!("missing input array `{name}`"),
            )
        })
    }

    fn fixed<D: ndarray::Dimension>(&self, name: &str) -> Result<ndarray::ArrayView<'a, f64, D>> {
        let x = self.get(name)?;
        let rank = x.ndim();
        x.into_dimensionality::<D>().map_err(|_| {
            Error::format(
                format!("case {}, input `{name}`", self.case),
                format!("unexpected rank {rank}"),
            )
        })
    }

    /// A rank-2 array.
    pub fn get2(&self, name: &str) -> Result<ArrayView2<'a, f64>> {
        self.fixed(name)
    }

    /// A rank-3 array.
    pub fn get3(&self, name: &str) -> Result<ArrayView3<'a, f64>> {
        self.fixed(name)
    }

    /// An array of positions (integers held as f64).
    pub fn positions(&self, name: &str) -> Result<Vec<i64>> {
        Ok(self.get(name)?.iter().map(|&p| p as i64).collect())
    }
}

/// The values a scheme parameter takes, which decides the forms a kernel may declare
/// for it (docs/protocol.md, "Capabilities").
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ParameterKind {
    /// One of a few names (`layout`, `pairing`).
    Names(&'static [&'static str]),
    /// `true` or `false` (`bidirectional`).
    Bool,
    /// A number (`base`, `num_buckets`, …): literals and ranges.
    Number,
    /// `null` or a non-negative integer (`clamp_len`): literals and ranges.
    OptionalInteger,
    /// `"inverse_sqrt_dim"` or `{"fixed": x}`.
    Scale,
    /// `"none"`, `{"linear_interpolation": {"factor": s}}` or `{"ntk_aware": {"factor": s}}`.
    Scaling,
    /// `rotary_dim`: integers, ranges, `"full"` and `"partial"`.
    RotaryDim,
}

/// One parameter of a scheme, as named in the case's `scheme` object.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Parameter {
    /// Its name.
    pub name: &'static str,
    /// What values it takes.
    pub kind: ParameterKind,
    /// Whether `encode` depends on it (`scale` and `clamp_len` change scores only, so
    /// they neither restrict nor are exercised by an `encode` case).
    pub encode: bool,
}

impl Parameter {
    /// A parameter `encode` depends on.
    pub const fn new(name: &'static str, kind: ParameterKind) -> Self {
        Parameter {
            name,
            kind,
            encode: true,
        }
    }

    /// A parameter that changes scores only.
    pub const fn scores_only(name: &'static str, kind: ParameterKind) -> Self {
        Parameter {
            name,
            kind,
            encode: false,
        }
    }

    /// The score scale, present in every scheme with a `scale` field.
    pub const SCALE: Parameter = Parameter::scores_only("scale", ParameterKind::Scale);
}

/// What one scheme, with its parameters, contributes. Implemented by each scheme's
/// parameter struct (`RotarySpec`, `AlibiSpec`, …); the conventions every method follows
/// are the shared ones of [`crate::attention`] and docs/conventions.md.
pub trait SchemeModel: fmt::Debug + Send + Sync {
    /// The scale of `q·k`.
    fn scale(&self) -> Scale;

    /// Checks the parameters against the case's shape, naming the field that is wrong.
    fn validate(&self, shape: &Shape<'_>) -> Result<()>;

    /// The inputs of `encode`, in generation order (the order fixes which part of the
    /// seed's stream each array takes: new arrays go at the end).
    fn encode_inputs(&self, shape: &Shape<'_>) -> Vec<InputSpec>;

    /// The scheme's own arrays for every other operation, generated after `q`, `k` and
    /// `v`.
    fn window_inputs(&self, _shape: &Shape<'_>) -> Vec<InputSpec> {
        Vec::new()
    }

    /// The scheme's own window inputs that carry the head on their first axis, when
    /// every output of head `h` depends only on head `h` of `q`, `k`, `v` and of these
    /// (so a case restricted to one head, with these arrays sliced, computes that
    /// head's rows exactly: [`crate::headwise`]); `None` when a head also depends on
    /// the head count (ALiBi's slopes) or on other heads.
    fn per_head_inputs(&self) -> Option<&'static [&'static str]> {
        None
    }

    /// The output of `encode` and its shape.
    fn encode_output(&self, shape: &Shape<'_>) -> (Output, Vec<usize>);

    /// The reference `encode` (f64).
    fn encode(&self, shape: &Shape<'_>, inputs: &Inputs<'_, '_>) -> Result<ArrayD<f64>>;

    /// Reference scores of one window: queries `q[H,L,d]` at `p0..`, keys `k[H,M+L,d]`
    /// at `p0-M..`, `-inf` on keys the causal mask hides.
    fn window_scores(
        &self,
        shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
    ) -> Result<Array3<f64>>;

    /// Scores of every query-key pair of one window with no mask at all: query `i` at
    /// absolute position `positions.queries[i]`, key `j` at `positions.keys[j]`, the
    /// score scale `scale` (where the scheme scales, as in [`SchemeModel::window_scores`]).
    /// Future keys (negative distances) get what the formula gives there; NaN marks a
    /// pair the scheme defines no score for (an xl_relative distance outside `r`).
    ///
    /// The faulty variants of the reference ([`crate::variant`]) are built on this; the
    /// reference's own scores come from [`SchemeModel::window_scores`], and a property
    /// test checks that both agree on every visible pair at the standard positions.
    fn pair_scores(
        &self,
        shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        positions: &PairPositions,
        scale: Scale,
    ) -> Result<Array3<f64>>;

    /// Adds what the scheme puts on the value side to `out[H,L,d]` from `probs[H,L,K]`
    /// (Shaw's value embeddings) for queries and keys at `positions` (the standard ones
    /// for the reference; a faulty variant's own, so that its value side reads the
    /// distances its scores read); with `absolute`, their magnitudes (for error bounds).
    fn add_value_terms(
        &self,
        _inputs: &Inputs<'_, '_>,
        _probs: &Array3<f64>,
        _out: &mut Array3<f64>,
        _positions: &PairPositions,
        _absolute: bool,
    ) -> Result<()> {
        Ok(())
    }

    /// Bound on the error of each visible score of one window that a kernel inside
    /// `contract` may make, before the storage of the score itself and the floor
    /// (docs/budgets.md, "Scores"); 0 where the score is masked.
    fn score_terms(
        &self,
        shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
        contract: &Contract,
    ) -> Result<Array3<f64>>;

    /// Per-element bound on `encode` for a kernel inside `contract`.
    fn encode_bounds(
        &self,
        shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        values: &ArrayD<f64>,
        contract: &Contract,
    ) -> Result<ArrayD<f64>>;

    /// Simpler parameter sets for shrinking a failing case, most aggressive first.
    fn simpler(&self, _shape: &Shape<'_>) -> Vec<SchemeSpec> {
        Vec::new()
    }

    /// These parameters adapted to a narrower head (shrinking); `None` if unchanged.
    fn fit_head_dim(&self, _head_dim: usize) -> Option<SchemeSpec> {
        None
    }

    /// How many parameters differ from their plain defaults (shrinking prefers fewer).
    fn extras(&self, _shape: &Shape<'_>) -> usize {
        0
    }
}

/// Absolute positions of the queries and keys of one window.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct PairPositions {
    /// One per query.
    pub queries: Vec<i64>,
    /// One per key.
    pub keys: Vec<i64>,
}

impl PairPositions {
    /// The positions of docs/conventions.md: queries `p0 + i`, keys `p0 - M + j`.
    pub fn standard(window: Window, query_start: i64) -> Self {
        let m = window.memory_len() as i64;
        PairPositions {
            queries: (0..window.query_len() as i64)
                .map(|i| query_start + i)
                .collect(),
            keys: (0..window.key_len() as i64)
                .map(|j| query_start - m + j)
                .collect(),
        }
    }

    /// `pos_query - pos_key` of one pair (the distance; negative for a future key).
    pub fn distance(&self, query: usize, key: usize) -> i64 {
        self.queries[query] - self.keys[key]
    }

    /// Errors unless there is one position per query of `q[H, L, d]` and per key of
    /// `k[H, K, d]`.
    pub fn check(&self, q: ArrayView3<'_, f64>, k: ArrayView3<'_, f64>) -> Result<()> {
        if self.queries.len() != q.dim().1 || self.keys.len() != k.dim().1 {
            return Err(Error::param(
                "positions",
                format!("{} query and {} key positions", q.dim().1, k.dim().1),
                format!("{} and {}", self.queries.len(), self.keys.len()),
            ));
        }
        Ok(())
    }
}

/// What a scheme is, apart from any one parameter set: the static half of a scheme
/// module, used by the registry.
pub trait SchemeKind: SchemeModel + Sized {
    /// The published source of the scheme.
    const SOURCE: &'static str;

    /// The parameters a kernel may declare, named as in the case's `scheme` object.
    const PARAMETERS: &'static [Parameter];

    /// The most heads a random case draws (ALiBi needs many to reach its
    /// non-power-of-two slope rule).
    const MAX_RANDOM_HEADS: usize = 3;

    /// The largest start position `p0` a random case draws when it draws one far from
    /// 0 (a learned table needs a row for every position up to the last one used).
    const MAX_RANDOM_START: usize = 100_000;

    /// Random parameters for a random case of `shape` (docs/conventions.md, "Random
    /// cases", lists the distributions).
    fn random(stream: &mut Stream, shape: &Shape<'_>) -> Self;
}

/// Picks one of `items` uniformly.
pub(crate) fn pick<T: Clone>(stream: &mut Stream, items: &[T]) -> T {
    items[stream.below(items.len() as u64) as usize].clone()
}

/// A uniform integer in `lo..=hi`.
pub(crate) fn range(stream: &mut Stream, lo: usize, hi: usize) -> usize {
    lo + stream.below((hi - lo + 1) as u64) as usize
}

/// `x` with non-finite entries (masked scores) as 0.
pub(crate) fn finite_or_zero(x: f64) -> f64 {
    if x.is_finite() {
        x
    } else {
        0.0
    }
}

/// `scale · a[h] · b[h]ᵀ` per head: `[H, L, K]` from `a[H, L, n]` and `b[H, K, n]`.
pub(crate) fn head_products(a: &Array3<f64>, b: &Array3<f64>, scale: f64) -> Array3<f64> {
    let (heads, l, _) = a.dim();
    let mut out = Array3::zeros((heads, l, b.dim().1));
    ndarray::Zip::from(out.outer_iter_mut())
        .and(a.outer_iter())
        .and(b.outer_iter())
        .for_each(|mut o, a, b| crate::math::product::gemm(scale, &a, &b.t(), 0.0, &mut o));
    out
}
