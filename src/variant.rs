//! Faulty variants of the reference: the hooks a [`Deviation`] overrides to make the
//! reference pipeline compute what a kernel with one specific mistake computes.
//!
//! [`crate::reference::variant_outputs`] runs a case through the same pipeline as the
//! reference (the same stream segments, decode steps, softmax and value terms), but
//! scores every pair with [`SchemeModel::pair_scores`] at positions, visibility, scale
//! and keys the deviation may change, and with every other stage open to it. The
//! default of every hook is the reference's own behaviour, so a deviation overrides
//! only its mistake. The fault catalogue ([`crate::diagnose`]) is built from these.

use std::collections::BTreeMap;

use ndarray::{Array3, ArrayD};

use crate::attention::{masked_softmax, Scale, Window};
use crate::case::Case;
use crate::error::Result;
use crate::math::Dtype;
use crate::scheme::model::{Inputs, PairPositions};

/// Which kind of step of a run a window belongs to.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum StepKind {
    /// The one window of a `scores` or `attention` case.
    Window,
    /// A segment of a `stream` case.
    Segment,
    /// The prefill or a chunk of a `decode` case.
    Decode,
}

/// Where one window sits in its case: the step, its first query token and the tokens
/// its keys are (stream and decode; for one window, key `j` is token `j`).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct StepAt {
    /// The kind of step.
    pub kind: StepKind,
    /// The step's index (0 for one window; the prefill is step 0 of a decode).
    pub index: usize,
    /// Token index of the first query (0 for one window).
    pub start: usize,
    /// Token index of every key, in key order.
    pub key_tokens: Vec<usize>,
    /// For decode: the first token of the step each key token was fed in (the key's
    /// own chunk); for a segment, the first token of its segment. Empty for one window.
    pub key_step_starts: Vec<usize>,
}

impl StepAt {
    /// One whole window with no key bookkeeping: what the reference's own paths
    /// (expected outputs, bounds) pass, since no deviation reads it there.
    pub fn whole_window() -> Self {
        StepAt {
            kind: StepKind::Window,
            index: 0,
            start: 0,
            key_tokens: Vec::new(),
            key_step_starts: Vec::new(),
        }
    }
}

/// What a deviation sees of the window being scored.
#[derive(Debug, Clone, Copy)]
pub struct WindowCtx<'a, 'd> {
    /// The case as the faulty kernel reads it (after [`Deviation::case`]).
    pub case: &'a Case,
    /// The dtype the kernel computes in.
    pub dtype: Dtype,
    /// The case's arrays (after [`Deviation::inputs`]).
    pub inputs: Inputs<'a, 'd>,
    /// The window's `M` and `L`.
    pub window: Window,
    /// Where the window sits in the case.
    pub at: &'a StepAt,
}

/// One mistake, as hooks into the reference pipeline. Every hook defaults to what
/// the reference does.
pub trait Deviation: Send + Sync {
    /// The case as the faulty kernel reads it (a parameter it ignores or reads wrong);
    /// `None` keeps it.
    fn case(&self, _case: &Case) -> Option<Case> {
        None
    }

    /// The input arrays as the faulty kernel uses them (by name, f64).
    fn inputs(&self, _case: &Case, _arrays: &mut BTreeMap<String, ArrayD<f64>>) -> Result<()> {
        Ok(())
    }

    /// The `encode` output, from the reference's.
    fn encode(
        &self,
        _case: &Case,
        _inputs: &Inputs<'_, '_>,
        table: ArrayD<f64>,
    ) -> Result<ArrayD<f64>> {
        Ok(table)
    }

    /// The absolute positions the kernel gives the window's queries and keys.
    fn positions(&self, _ctx: &WindowCtx<'_, '_>, _positions: &mut PairPositions) {}

    /// The keys the kernel scores against (e.g. a cache rotated twice).
    fn keys(
        &self,
        _ctx: &WindowCtx<'_, '_>,
        _positions: &PairPositions,
        _keys: &mut Array3<f64>,
    ) -> Result<()> {
        Ok(())
    }

    /// The score scale the kernel uses.
    fn scale(&self, _ctx: &WindowCtx<'_, '_>, scale: Scale) -> Scale {
        scale
    }

    /// The unmasked scores of every pair, from the scheme's (`scores[H, L, K]` for
    /// queries `q` and keys `k` at `positions`).
    fn scores(
        &self,
        _ctx: &WindowCtx<'_, '_>,
        _q: ndarray::ArrayView3<'_, f64>,
        _k: ndarray::ArrayView3<'_, f64>,
        _positions: &PairPositions,
        scores: Array3<f64>,
    ) -> Result<Array3<f64>> {
        Ok(scores)
    }

    /// Whether query `i` sees key `j`: `causal` is the reference's causal rule
    /// (`j <= M + i`), `hidden` whether the case hides the key (padding).
    fn visible(
        &self,
        _ctx: &WindowCtx<'_, '_>,
        _query: usize,
        _key: usize,
        causal: bool,
        hidden: bool,
    ) -> bool {
        causal && !hidden
    }

    /// Probabilities from masked scores (`-inf` = masked).
    fn softmax(&self, _ctx: &WindowCtx<'_, '_>, scores: &Array3<f64>) -> Result<Array3<f64>> {
        masked_softmax(scores.view())
    }

    /// The outputs of one window, from the reference's.
    fn output(&self, _ctx: &WindowCtx<'_, '_>, output: Array3<f64>) -> Result<Array3<f64>> {
        Ok(output)
    }

    /// The tokens a `stream` segment `start..end` attends to, oldest first (the
    /// reference: the newest `M` earlier tokens, then the segment).
    fn segment_keys(&self, _case: &Case, first_key: usize, start: usize, end: usize) -> Vec<usize> {
        let _ = start;
        (first_key..end).collect()
    }

    /// Compute every stage rounded to this dtype (inputs, tables, scores,
    /// probabilities, outputs), as a kernel narrower than it claims does.
    fn stage(&self, _case: &Case, _dtype: Dtype) -> Option<Dtype> {
        None
    }

    /// Form rotation and sinusoid angles in this dtype.
    fn angles(&self, _case: &Case, _dtype: Dtype) -> Option<Dtype> {
        None
    }
}

/// The reference itself as a deviation (every hook at its default): variant outputs
/// computed with it equal the reference's up to rounding.
#[derive(Debug, Clone, Copy, Default)]
pub struct NoDeviation;

impl Deviation for NoDeviation {}

/// Two deviations at once: every hook of the first, then of the second on its result.
/// Where a hook decides rather than transforms (visibility, softmax, the segment's
/// keys, the stage and angle dtypes), the first deviation's choice is kept when it
/// departs from the reference, the second's otherwise.
pub struct Both<'a>(pub &'a dyn Deviation, pub &'a dyn Deviation);

impl Deviation for Both<'_> {
    fn case(&self, case: &Case) -> Option<Case> {
        match self.0.case(case) {
            Some(first) => Some(self.1.case(&first).unwrap_or(first)),
            None => self.1.case(case),
        }
    }

    fn inputs(&self, case: &Case, arrays: &mut BTreeMap<String, ArrayD<f64>>) -> Result<()> {
        self.0.inputs(case, arrays)?;
        self.1.inputs(case, arrays)
    }

    fn encode(
        &self,
        case: &Case,
        inputs: &Inputs<'_, '_>,
        table: ArrayD<f64>,
    ) -> Result<ArrayD<f64>> {
        let table = self.0.encode(case, inputs, table)?;
        self.1.encode(case, inputs, table)
    }

    fn positions(&self, ctx: &WindowCtx<'_, '_>, positions: &mut PairPositions) {
        self.0.positions(ctx, positions);
        self.1.positions(ctx, positions);
    }

    fn keys(
        &self,
        ctx: &WindowCtx<'_, '_>,
        positions: &PairPositions,
        keys: &mut Array3<f64>,
    ) -> Result<()> {
        self.0.keys(ctx, positions, keys)?;
        self.1.keys(ctx, positions, keys)
    }

    fn scale(&self, ctx: &WindowCtx<'_, '_>, scale: Scale) -> Scale {
        self.1.scale(ctx, self.0.scale(ctx, scale))
    }

    fn scores(
        &self,
        ctx: &WindowCtx<'_, '_>,
        q: ndarray::ArrayView3<'_, f64>,
        k: ndarray::ArrayView3<'_, f64>,
        positions: &PairPositions,
        scores: Array3<f64>,
    ) -> Result<Array3<f64>> {
        let scores = self.0.scores(ctx, q, k, positions, scores)?;
        self.1.scores(ctx, q, k, positions, scores)
    }

    fn visible(
        &self,
        ctx: &WindowCtx<'_, '_>,
        query: usize,
        key: usize,
        causal: bool,
        hidden: bool,
    ) -> bool {
        let first = self.0.visible(ctx, query, key, causal, hidden);
        if first != (causal && !hidden) {
            first
        } else {
            self.1.visible(ctx, query, key, causal, hidden)
        }
    }

    fn softmax(&self, ctx: &WindowCtx<'_, '_>, scores: &Array3<f64>) -> Result<Array3<f64>> {
        let first = self.0.softmax(ctx, scores)?;
        let reference = masked_softmax(scores.view())?;
        let same = first
            .iter()
            .zip(reference.iter())
            .all(|(a, b)| a == b || (a.is_nan() && b.is_nan()));
        if same {
            self.1.softmax(ctx, scores)
        } else {
            Ok(first)
        }
    }

    fn output(&self, ctx: &WindowCtx<'_, '_>, output: Array3<f64>) -> Result<Array3<f64>> {
        let output = self.0.output(ctx, output)?;
        self.1.output(ctx, output)
    }

    fn segment_keys(&self, case: &Case, first_key: usize, start: usize, end: usize) -> Vec<usize> {
        let first = self.0.segment_keys(case, first_key, start, end);
        if first != (first_key..end).collect::<Vec<_>>() {
            first
        } else {
            self.1.segment_keys(case, first_key, start, end)
        }
    }

    fn stage(&self, case: &Case, dtype: Dtype) -> Option<Dtype> {
        self.0
            .stage(case, dtype)
            .or_else(|| self.1.stage(case, dtype))
    }

    fn angles(&self, case: &Case, dtype: Dtype) -> Option<Dtype> {
        self.0
            .angles(case, dtype)
            .or_else(|| self.1.angles(case, dtype))
    }
}
