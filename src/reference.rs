//! The reference pipeline: a case's expected outputs, the same-precision baseline, and
//! the analytic per-element error bounds (docs/budgets.md), generic over the scheme.
//!
//! - [`expected`]: the f64 oracle from the case's inputs, with angles formed in
//!   double-double ([`crate::math::angle`]) and every product in one fixed order, so the
//!   values are within a few units in the last place of the truth and the same on every
//!   machine.
//! - [`baseline`]: what a plain kernel at the edge of the numerical contract computes:
//!   inputs and every stage tensor (tables, scores, probabilities, outputs) rounded to the
//!   dtype, angles formed in f32 for narrower dtypes. The budget accepts `c ×` its error.
//! - [`analytic_bounds`]: per element, a bound on the error of *any* kernel inside the
//!   contract for a dtype ([`Contract`]): the scheme's score or table terms
//!   ([`SchemeModel::score_terms`], [`SchemeModel::encode_bounds`]) plus the score's own
//!   storage, carried through the softmax into probabilities and outputs here.
//!
//! `stream` and `decode` run window by window through the drivers of
//! [`crate::recurrence`] ([`segments`], [`decode_steps`]): the same code whose
//! equivalence to one-shot attention the property tests check.

use std::borrow::Cow;
use std::collections::BTreeMap;

use ndarray::{s, Array3, ArrayD, ArrayView3, Axis, CowArray, Zip};

use crate::attention::{attend, masked_softmax, window_for, Window};
use crate::case::{Arrays, Case, Operation, Output};
use crate::error::{Error, Result};
use crate::math::contract::{gamma_of, R64};
use crate::math::{Contract, Dtype};
use crate::recurrence::{decode_steps, segments};
use crate::scheme::model::{finite_or_zero, InputArrays, Inputs, PairPositions};
use crate::scheme::SchemeModel;
use crate::variant::{Deviation, StepAt, StepKind, WindowCtx};

/// Output arrays by name, in f64.
pub type Outputs = BTreeMap<Output, ArrayD<f64>>;

/// The f64 oracle for `case` on `inputs`, computed with portable arithmetic so the
/// values are bit-identical on every machine.
pub fn expected(case: &Case, inputs: &Arrays) -> Result<Outputs> {
    Pipeline::new(case, inputs, None)?.run()
}

/// The outputs of a kernel with one mistake: the reference pipeline with `deviation`'s
/// hooks ([`crate::variant`]), for a kernel computing in `dtype`, on the case's own
/// inputs. Errors where the variant is not defined for the case (a distance outside
/// the relative table, a position outside a learned table).
pub fn variant_outputs(
    case: &Case,
    inputs: &Arrays,
    dtype: Dtype,
    deviation: &dyn Deviation,
) -> Result<Outputs> {
    let run = || Pipeline::with_deviation(case, inputs, dtype, deviation)?.run();
    match deviation.angles(case, dtype) {
        Some(angles) => crate::math::angle::with_angles_in(angles, run),
        None => run(),
    }
}

/// The same pipeline with inputs and stage tensors rounded to `dtype`, and angles
/// formed in f32 unless `dtype` is f64 (a plain kernel at the edge of the contract).
pub fn baseline(case: &Case, inputs: &Arrays, dtype: Dtype) -> Result<Outputs> {
    let run = || Pipeline::new(case, inputs, Some(dtype))?.run();
    if dtype == Dtype::F64 {
        run()
    } else {
        crate::math::angle::with_single_precision_angles(run)
    }
}

/// Analytic per-element bounds on every output, for any kernel inside the numerical
/// contract of `dtype`.
pub fn analytic_bounds(case: &Case, inputs: &Arrays, dtype: Dtype) -> Result<Outputs> {
    Pipeline::new(case, inputs, None)?.bounds(dtype)
}

/// [`expected`] and [`analytic_bounds`] for `dtype` in one pass: the bounds reuse the
/// scores, probabilities and outputs the oracle computes (same values, bit for bit, as
/// the two functions called apart), so nothing of the pipeline runs twice.
pub fn expected_and_bounds(
    case: &Case,
    inputs: &Arrays,
    dtype: Dtype,
) -> Result<(Outputs, Outputs)> {
    Pipeline::new(case, inputs, None)?.run_with_bounds(dtype)
}

/// The reduction length behind each output element, for the baseline's floor
/// `sqrt(n)·u·max|expected|`.
pub fn reduction_length(case: &Case, output: Output) -> usize {
    let d = case.head_dim;
    match output {
        Output::Probs | Output::Output => case.key_len().max(case.tokens()),
        Output::Scores => 2 * d + 3,
        _ => d + 3,
    }
}

struct Pipeline<'a> {
    case: Cow<'a, Case>,
    arrays: InputArrays<'a>,
    stage: Option<Dtype>,
    /// A faulty variant's hooks, and the dtype its kernel computes in.
    deviation: Option<(&'a dyn Deviation, Dtype)>,
}

impl<'a> Pipeline<'a> {
    fn new(case: &'a Case, inputs: &'a Arrays, stage: Option<Dtype>) -> Result<Self> {
        case.validate()?;
        case.check_inputs(inputs)?;
        // Inputs are borrowed; only the baseline's rounded copies are owned.
        let arrays = inputs
            .iter()
            .map(|(name, tensor)| {
                let view = tensor.view();
                let array = match stage {
                    Some(dtype) if tensor.dtype().is_float() && dtype != Dtype::F64 => {
                        CowArray::from(view.mapv(|x| dtype.round(x)))
                    }
                    _ => CowArray::from(view),
                };
                (name.clone(), array)
            })
            .collect();
        Ok(Pipeline {
            case: Cow::Borrowed(case),
            arrays,
            stage,
            deviation: None,
        })
    }

    fn with_deviation(
        case: &'a Case,
        inputs: &'a Arrays,
        dtype: Dtype,
        deviation: &'a dyn Deviation,
    ) -> Result<Self> {
        case.validate()?;
        case.check_inputs(inputs)?;
        let stage = deviation.stage(case, dtype);
        let mut arrays: BTreeMap<String, ArrayD<f64>> = inputs
            .iter()
            .map(|(name, tensor)| {
                let mut array = tensor.view().to_owned();
                if let Some(dtype) = stage.filter(|_| tensor.dtype().is_float()) {
                    array.mapv_inplace(|x| dtype.round(x));
                }
                (name.clone(), array)
            })
            .collect();
        let read = deviation.case(case);
        deviation.inputs(read.as_ref().unwrap_or(case), &mut arrays)?;
        Ok(Pipeline {
            case: read.map_or(Cow::Borrowed(case), Cow::Owned),
            arrays: arrays
                .into_iter()
                .map(|(name, array)| (name, CowArray::from(array)))
                .collect(),
            stage,
            deviation: Some((deviation, dtype)),
        })
    }

    fn model(&self) -> &dyn SchemeModel {
        self.case.model()
    }

    fn inputs(&self) -> Inputs<'_, 'a> {
        Inputs::new(&self.case.id, &self.arrays)
    }

    fn round<D: ndarray::Dimension>(
        &self,
        mut x: ndarray::Array<f64, D>,
    ) -> ndarray::Array<f64, D> {
        if let Some(dtype) = self.stage {
            x.mapv_inplace(|v| dtype.round(v));
        }
        x
    }

    /// Scores of one window with the case's hidden keys masked.
    fn window_scores(
        &self,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
        at: &StepAt,
    ) -> Result<Array3<f64>> {
        if let Some((deviation, dtype)) = self.deviation {
            return self.variant_scores(deviation, dtype, q, k, p0, at);
        }
        let mut scores =
            self.model()
                .window_scores(&self.case.shape(), &self.inputs(), q, k, p0)?;
        for &j in &self.case.hidden_keys {
            scores.slice_mut(s![.., .., j]).fill(f64::NEG_INFINITY);
        }
        Ok(scores)
    }

    fn ctx<'s>(&'s self, dtype: Dtype, window: Window, at: &'s StepAt) -> WindowCtx<'s, 'a> {
        WindowCtx {
            case: &self.case,
            dtype,
            inputs: self.inputs(),
            window,
            at,
        }
    }

    /// A faulty variant's scores of one window: every pair scored at the positions,
    /// keys and scale the deviation chooses, then masked by its visibility rule.
    fn variant_scores(
        &self,
        deviation: &dyn Deviation,
        dtype: Dtype,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
        at: &StepAt,
    ) -> Result<Array3<f64>> {
        let window = window_for(q, k)?;
        let ctx = self.ctx(dtype, window, at);
        let mut positions = PairPositions::standard(window, p0);
        deviation.positions(&ctx, &mut positions);
        let mut keys = k.to_owned();
        deviation.keys(&ctx, &positions, &mut keys)?;
        let scale = deviation.scale(&ctx, self.model().scale());
        let shape = self.case.shape();
        let raw =
            self.model()
                .pair_scores(&shape, &ctx.inputs, q, keys.view(), &positions, scale)?;
        let mut scores = deviation.scores(&ctx, q, keys.view(), &positions, raw)?;
        let one_window = at.kind == StepKind::Window;
        for ((h, i, j), x) in scores.indexed_iter_mut() {
            let hidden = one_window && self.case.hidden_keys.contains(&j);
            if !deviation.visible(&ctx, i, j, window.is_visible(i, j), hidden) {
                *x = f64::NEG_INFINITY;
            } else if x.is_nan() {
                return Err(Error::param(
                    "variant",
                    "a score for every pair the variant's kernel sees",
                    format!("none at [head {h}, query {i}, key {j}]"),
                ));
            }
        }
        Ok(scores)
    }

    /// Outputs of one window from its probabilities, with the scheme's value-side
    /// terms for queries and keys at `positions`; with `absolute`, their magnitudes (for
    /// error bounds).
    fn window_output(
        &self,
        probs: &Array3<f64>,
        v: ArrayView3<'_, f64>,
        positions: &PairPositions,
        absolute: bool,
    ) -> Result<Array3<f64>> {
        let mut out = attend(probs.view(), v)?;
        self.model()
            .add_value_terms(&self.inputs(), probs, &mut out, positions, absolute)?;
        Ok(out)
    }

    /// Scores, probabilities and outputs of one window, each rounded at its stage.
    fn attend_window(
        &self,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        v: ArrayView3<'_, f64>,
        p0: i64,
        at: &StepAt,
    ) -> Result<(Array3<f64>, Array3<f64>, Array3<f64>)> {
        let window = window_for(q, k)?;
        let scores = self.round(self.window_scores(q, k, p0, at)?);
        let mut positions = PairPositions::standard(window, p0);
        let Some((deviation, dtype)) = self.deviation else {
            let probs = self.round(masked_softmax(scores.view())?);
            let output = self.round(self.window_output(&probs, v, &positions, false)?);
            return Ok((scores, probs, output));
        };
        let ctx = self.ctx(dtype, window, at);
        // The value side reads the positions the variant's scores read.
        deviation.positions(&ctx, &mut positions);
        let probs = self.round(deviation.softmax(&ctx, &scores)?);
        let output = self.window_output(&probs, v, &positions, false)?;
        let output = self.round(deviation.output(&ctx, output)?);
        Ok((scores, probs, output))
    }

    fn run(&self) -> Result<Outputs> {
        let case: &Case = &self.case;
        let inputs = self.inputs();
        let mut out = Outputs::new();
        let one_window = |keys: usize| StepAt {
            kind: StepKind::Window,
            index: 0,
            start: 0,
            key_tokens: (0..keys).collect(),
            key_step_starts: Vec::new(),
        };
        match &case.operation {
            Operation::Encode => {
                let shape = case.shape();
                let (output, _) = self.model().encode_output(&shape);
                let mut table = self.model().encode(&shape, &inputs)?;
                if let Some((deviation, _)) = self.deviation {
                    table = deviation.encode(case, &inputs, table)?;
                }
                out.insert(output, self.round(table));
            }
            Operation::Scores => {
                let (q, k) = (inputs.get3("q")?, inputs.get3("k")?);
                let at = one_window(k.dim().1);
                let scores = self.round(self.window_scores(q, k, case.query_start, &at)?);
                out.insert(Output::Scores, scores.into_dyn());
            }
            Operation::Attention => {
                let (q, k, v) = (inputs.get3("q")?, inputs.get3("k")?, inputs.get3("v")?);
                let at = one_window(k.dim().1);
                let (_, probs, output) = self.attend_window(q, k, v, case.query_start, &at)?;
                out.insert(Output::Probs, probs.into_dyn());
                out.insert(Output::Output, output.into_dyn());
            }
            Operation::Stream { tokens } => {
                let (q, k, v) = (inputs.get3("q")?, inputs.get3("k")?, inputs.get3("v")?);
                let mut output = Array3::zeros((case.heads, *tokens, case.head_dim));
                let segment_len = case.query_len.max(1);
                for (index, step) in segments(*tokens, case.query_len, case.memory_len).enumerate()
                {
                    let p0 = case.query_start + step.start as i64;
                    let queries = q.slice(s![.., step.start..step.end, ..]);
                    let o = match self.deviation {
                        None => {
                            let at = one_window(0);
                            self.attend_window(
                                queries,
                                k.slice(s![.., step.first_key..step.end, ..]),
                                v.slice(s![.., step.first_key..step.end, ..]),
                                p0,
                                &at,
                            )?
                            .2
                        }
                        Some((deviation, _)) => {
                            let tokens =
                                deviation.segment_keys(case, step.first_key, step.start, step.end);
                            let at = StepAt {
                                kind: StepKind::Segment,
                                index,
                                start: step.start,
                                key_step_starts: tokens
                                    .iter()
                                    .map(|t| t / segment_len * segment_len)
                                    .collect(),
                                key_tokens: tokens,
                            };
                            let keys = k.select(Axis(1), &at.key_tokens);
                            let values = v.select(Axis(1), &at.key_tokens);
                            self.attend_window(queries, keys.view(), values.view(), p0, &at)?
                                .2
                        }
                    };
                    output
                        .slice_mut(s![.., step.start..step.end, ..])
                        .assign(&o);
                }
                out.insert(Output::Output, output.into_dyn());
            }
            Operation::Decode {
                tokens,
                prefill,
                chunks,
            } => {
                let (q, k, v) = (inputs.get3("q")?, inputs.get3("k")?, inputs.get3("v")?);
                let mut output = Array3::zeros((case.heads, tokens - prefill, case.head_dim));
                let steps: Vec<_> = decode_steps(*prefill, chunks).collect();
                let step_of = |t: usize| {
                    steps
                        .iter()
                        .find(|s| s.start <= t && t < s.end)
                        .map_or(0, |s| s.start)
                };
                // The prefill's own rows are not an output; its keys stay in the cache.
                for (index, step) in steps.iter().enumerate().skip(1) {
                    let at = match self.deviation {
                        None => one_window(0),
                        Some(_) => StepAt {
                            kind: StepKind::Decode,
                            index,
                            start: step.start,
                            key_tokens: (0..step.end).collect(),
                            key_step_starts: (0..step.end).map(step_of).collect(),
                        },
                    };
                    let (_, _, o) = self.attend_window(
                        q.slice(s![.., step.start..step.end, ..]),
                        k.slice(s![.., ..step.end, ..]),
                        v.slice(s![.., ..step.end, ..]),
                        case.query_start + step.start as i64,
                        &at,
                    )?;
                    output
                        .slice_mut(s![.., step.start - prefill..step.end - prefill, ..])
                        .assign(&o);
                }
                out.insert(Output::Output, output.into_dyn());
            }
        }
        Ok(out)
    }

    /// The oracle and the bounds together; see [`expected_and_bounds`].
    fn run_with_bounds(&self, dtype: Dtype) -> Result<(Outputs, Outputs)> {
        let case: &Case = &self.case;
        let at = StepAt::whole_window();
        let inputs = self.inputs();
        let contract = Contract::for_dtype(dtype, case.dtype);
        let mut out = Outputs::new();
        let mut bounds = Outputs::new();
        match &case.operation {
            Operation::Encode => {
                let shape = case.shape();
                let (output, _) = self.model().encode_output(&shape);
                let table = self.model().encode(&shape, &inputs)?;
                let bound = self
                    .model()
                    .encode_bounds(&shape, &inputs, &table, &contract)?;
                bounds.insert(output, bound);
                out.insert(output, table);
            }
            Operation::Scores => {
                let (q, k) = (inputs.get3("q")?, inputs.get3("k")?);
                let scores = self.window_scores(q, k, case.query_start, &at)?;
                let bound = self.score_bound_from(&scores, q, k, case.query_start, &contract)?;
                bounds.insert(Output::Scores, bound.into_dyn());
                out.insert(Output::Scores, scores.into_dyn());
            }
            Operation::Attention => {
                let (q, k, v) = (inputs.get3("q")?, inputs.get3("k")?, inputs.get3("v")?);
                let window = self.attend_window(q, k, v, case.query_start, &at)?;
                let (probs_bound, output_bound) =
                    self.bounds_from(&window, q, k, v, case.query_start, &contract)?;
                let (_, probs, output) = window;
                bounds.insert(Output::Probs, probs_bound.into_dyn());
                bounds.insert(Output::Output, output_bound.into_dyn());
                out.insert(Output::Probs, probs.into_dyn());
                out.insert(Output::Output, output.into_dyn());
            }
            Operation::Stream { tokens } => {
                let (q, k, v) = (inputs.get3("q")?, inputs.get3("k")?, inputs.get3("v")?);
                let mut output = Array3::zeros((case.heads, *tokens, case.head_dim));
                let mut bound = Array3::zeros((case.heads, *tokens, case.head_dim));
                for step in segments(*tokens, case.query_len, case.memory_len) {
                    let (q, k, v) = (
                        q.slice(s![.., step.start..step.end, ..]),
                        k.slice(s![.., step.first_key..step.end, ..]),
                        v.slice(s![.., step.first_key..step.end, ..]),
                    );
                    let p0 = case.query_start + step.start as i64;
                    let window = self.attend_window(q, k, v, p0, &at)?;
                    let (_, o_bound) = self.bounds_from(&window, q, k, v, p0, &contract)?;
                    let rows = s![.., step.start..step.end, ..];
                    output.slice_mut(rows).assign(&window.2);
                    bound.slice_mut(rows).assign(&o_bound);
                }
                bounds.insert(Output::Output, bound.into_dyn());
                out.insert(Output::Output, output.into_dyn());
            }
            Operation::Decode { .. } => {
                // The oracle runs step by step; the bound over the full causal window
                // (see `bounds`) is a computation of its own.
                out = self.run()?;
                bounds = self.bounds(dtype)?;
            }
        }
        Ok((out, bounds))
    }

    fn bounds(&self, dtype: Dtype) -> Result<Outputs> {
        let case: &Case = &self.case;
        let inputs = self.inputs();
        let contract = Contract::for_dtype(dtype, case.dtype);
        let mut out = Outputs::new();
        match &case.operation {
            Operation::Encode => {
                let shape = case.shape();
                let (output, _) = self.model().encode_output(&shape);
                let values = self.model().encode(&shape, &inputs)?;
                let bound = self
                    .model()
                    .encode_bounds(&shape, &inputs, &values, &contract)?;
                out.insert(output, bound);
            }
            Operation::Scores => {
                let (q, k) = (inputs.get3("q")?, inputs.get3("k")?);
                let (bound, _) = self.score_bounds(q, k, case.query_start, &contract)?;
                out.insert(Output::Scores, bound.into_dyn());
            }
            Operation::Attention => {
                let (q, k, v) = (inputs.get3("q")?, inputs.get3("k")?, inputs.get3("v")?);
                let (probs, output) = self.window_bounds(q, k, v, case.query_start, &contract)?;
                out.insert(Output::Probs, probs.into_dyn());
                out.insert(Output::Output, output.into_dyn());
            }
            Operation::Stream { tokens } => {
                let (q, k, v) = (inputs.get3("q")?, inputs.get3("k")?, inputs.get3("v")?);
                let mut output = Array3::zeros((case.heads, *tokens, case.head_dim));
                for step in segments(*tokens, case.query_len, case.memory_len) {
                    let (_, o) = self.window_bounds(
                        q.slice(s![.., step.start..step.end, ..]),
                        k.slice(s![.., step.first_key..step.end, ..]),
                        v.slice(s![.., step.first_key..step.end, ..]),
                        case.query_start + step.start as i64,
                        &contract,
                    )?;
                    output
                        .slice_mut(s![.., step.start..step.end, ..])
                        .assign(&o);
                }
                out.insert(Output::Output, output.into_dyn());
            }
            Operation::Decode { prefill, .. } => {
                // The bound of each decoded row is taken over the full causal window of
                // all tokens: the same row, every later key masked, and a key count at
                // least that of any step, so it bounds every chunking.
                let (q, k, v) = (inputs.get3("q")?, inputs.get3("k")?, inputs.get3("v")?);
                let (_, o) = self.window_bounds(q, k, v, case.query_start, &contract)?;
                out.insert(
                    Output::Output,
                    o.slice(s![.., *prefill.., ..]).to_owned().into_dyn(),
                );
            }
        }
        Ok(out)
    }

    /// Per-element bound on each visible score of one window, and the scores: the
    /// scheme's terms plus the score's own storage (`2u_s|s|`: the score and the scale
    /// product) and the floor; 0 on masked entries.
    fn score_bounds(
        &self,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
        contract: &Contract,
    ) -> Result<(Array3<f64>, Array3<f64>)> {
        let scores = self
            .model()
            .window_scores(&self.case.shape(), &self.inputs(), q, k, p0)?;
        let bound = self.score_bound_from(&scores, q, k, p0, contract)?;
        Ok((bound, scores))
    }

    /// The score bound of [`Self::score_bounds`] from scores already computed (hidden
    /// keys may already be `-inf`: their bound is 0 either way).
    fn score_bound_from(
        &self,
        scores: &Array3<f64>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
        contract: &Contract,
    ) -> Result<Array3<f64>> {
        let mut terms =
            self.model()
                .score_terms(&self.case.shape(), &self.inputs(), q, k, p0, contract)?;
        let us = contract.storage;
        Zip::from(&mut terms).and(scores).par_for_each(|t, &s| {
            *t = if s.is_finite() {
                *t + 2.0 * us * s.abs() + contract.floor
            } else {
                0.0
            }
        });
        for &j in &self.case.hidden_keys {
            terms.slice_mut(s![.., .., j]).fill(0.0);
        }
        Ok(terms)
    }

    /// Bounds on probabilities and outputs of one window, carried from the score
    /// bounds through the softmax (docs/budgets.md, "Through the softmax"): with `Δ_i`
    /// the largest score error of row `i` (plus the rounding of a score shifted by a
    /// per-row constant, which leaves the probabilities unchanged in exact arithmetic),
    /// each probability moves by a factor within `e^(±2Δ_i)`; the softmax's own
    /// subtraction, exponentials, sum and division add a relative
    /// `γ_(2K+4) + 2u(|s_ij| + max_j|s_ij|)`; the output's weighted sum adds
    /// `γ_K·Σ_j p_ij|v_j|`; each result is stored once in the dtype.
    fn window_bounds(
        &self,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        v: ArrayView3<'_, f64>,
        p0: i64,
        contract: &Contract,
    ) -> Result<(Array3<f64>, Array3<f64>)> {
        let window = self.attend_window(q, k, v, p0, &StepAt::whole_window())?;
        self.bounds_from(&window, q, k, v, p0, contract)
    }

    /// [`Self::window_bounds`] from the window's scores (hidden keys `-inf`),
    /// probabilities and outputs, as [`Self::attend_window`] returns them.
    fn bounds_from(
        &self,
        (scores, probs, output): &(Array3<f64>, Array3<f64>, Array3<f64>),
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        v: ArrayView3<'_, f64>,
        p0: i64,
        contract: &Contract,
    ) -> Result<(Array3<f64>, Array3<f64>)> {
        let us = contract.storage;
        let ua = contract.accumulation;
        let window = window_for(q, k)?;
        let key_len = window.key_len();
        let score_bound = self.score_bound_from(scores, q, k, p0, contract)?;
        let row_max_abs = scores.map_axis(Axis(2), |row| {
            row.iter()
                .copied()
                .map(finite_or_zero)
                .fold(0.0f64, |m, x| m.max(x.abs()))
        });
        let row_delta = Zip::from(score_bound.lanes(Axis(2)))
            .and(&row_max_abs)
            .map_collect(|bounds, &largest| {
                bounds.iter().copied().fold(0.0, f64::max) + us * largest
            });
        let growth = |delta: f64| {
            let g = libm::expm1(2.0 * delta);
            if g.is_finite() {
                g
            } else {
                f64::MAX
            }
        };
        let softmax_gamma = gamma_of(ua, 2 * key_len + 4) + gamma_of(R64, key_len + 2);
        let row_growth = row_delta.mapv(growth);
        let mut probs_bound = probs.clone();
        Zip::from(probs_bound.lanes_mut(Axis(2)))
            .and(scores.lanes(Axis(2)))
            .and(&row_growth)
            .and(&row_max_abs)
            .par_for_each(|mut bounds, scores, &growth, &largest| {
                for (bound, &s) in bounds.iter_mut().zip(scores) {
                    let s = finite_or_zero(s).abs();
                    let relative = growth + softmax_gamma + 2.0 * ua * (s + largest) + us + R64;
                    *bound = (*bound * relative).min(f64::MAX) + contract.floor;
                }
            });
        // Σ_j δp_ij |v_jc| + (γ_K + input)·Σ_j p_ij (|v_jc| + |value embedding|).
        let va = v.mapv(f64::abs);
        let positions = PairPositions::standard(window, p0);
        let carried = self.window_output(&probs_bound, va.view(), &positions, true)?;
        let magnitude = self.window_output(probs, va.view(), &positions, true)?;
        let output_gamma = gamma_of(ua, key_len) + gamma_of(R64, key_len) + contract.input;
        let output_bound = Zip::from(&carried)
            .and(&magnitude)
            .and(output)
            .map_collect(|&c, &m, &o| c + output_gamma * m + us * o.abs() + contract.floor);
        Ok((probs_bound, output_bound))
    }
}
