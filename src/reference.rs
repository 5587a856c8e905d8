//! The reference pipeline: a case's expected outputs, the same-precision baseline, and
//! the analytic per-element error bounds (docs/budgets.md).
//!
//! - [`expected`]: the f64 oracle from the case's inputs, with angles formed in
//!   double-double ([`crate::angle`]) and every product in one fixed order, so the values
//!   are within a few units in the last place of the truth and the same on every machine.
//! - [`baseline`]: what a plain kernel at the edge of the numerical contract computes:
//!   inputs and every stage tensor (tables, scores, probabilities, outputs) rounded to the
//!   dtype, angles formed in f32 for narrower dtypes. The budget accepts `c ×` its error.
//! - [`analytic_bounds`]: per element, a bound on the error of *any* kernel inside the
//!   contract for a dtype ([`Contract`]): rounding of stored intermediates and of the
//!   accumulation (`γ_n·Σ|x_i y_i|`, Higham 2002, §3.1), the *absolute* angle error of
//!   position-dependent tables carried linearly through the products, the reference's
//!   own f64 error, and the softmax carrying score errors into probabilities and outputs.

use std::collections::BTreeMap;

use ndarray::{s, Array1, Array2, Array3, ArrayD, ArrayView3, Axis, Zip};

use crate::attention::{attend, dot_scores, masked_softmax, Scale, Window};
use crate::case::{fixed, input, Arrays, Case, Operation, SchemeSpec};
use crate::error::Result;
use crate::math::contract::{gamma_of, AngleScaling, Contract, R64};
use crate::math::product::{gemm, with_portable_arithmetic};
use crate::math::Dtype;
use crate::scheme::{alibi, bucketed, clipped, learned, rotary, sinusoidal, xl_relative};

/// Output arrays by name, in f64.
pub type Outputs = BTreeMap<String, ArrayD<f64>>;

/// The f64 oracle for `case` on `inputs`, computed with portable arithmetic so the
/// values are bit-identical on every machine.
pub fn expected(case: &Case, inputs: &Arrays) -> Result<Outputs> {
    with_portable_arithmetic(|| Pipeline::new(case, inputs, None)?.run())
}

/// The same pipeline with inputs and stage tensors rounded to `dtype`, and angles
/// formed in f32 unless `dtype` is f64 (a plain kernel at the edge of the contract).
pub fn baseline(case: &Case, inputs: &Arrays, dtype: Dtype) -> Result<Outputs> {
    with_portable_arithmetic(|| {
        let run = || Pipeline::new(case, inputs, Some(dtype))?.run();
        if dtype == Dtype::F64 {
            run()
        } else {
            crate::math::angle::with_single_precision_angles(run)
        }
    })
}

/// Analytic per-element bounds on every output, for any kernel inside the numerical
/// contract of `dtype`.
pub fn analytic_bounds(case: &Case, inputs: &Arrays, dtype: Dtype) -> Result<Outputs> {
    with_portable_arithmetic(|| Pipeline::new(case, inputs, None)?.bounds(dtype))
}

/// The reduction length behind each output element, for the baseline's floor
/// `sqrt(n)·u·max|expected|`.
pub fn reduction_length(case: &Case, output: &str) -> usize {
    let d = case.head_dim;
    match output {
        "probs" | "output" => case.key_len().max(case.tokens()),
        "scores" => 2 * d + 3,
        _ => d + 3,
    }
}

struct Pipeline<'a> {
    case: &'a Case,
    inputs: BTreeMap<String, ArrayD<f64>>,
    stage: Option<Dtype>,
}

fn finite_or_zero(x: f64) -> f64 {
    if x.is_finite() {
        x
    } else {
        0.0
    }
}

fn angle_scaling(scaling: &rotary::RotaryScaling) -> AngleScaling {
    match scaling {
        rotary::RotaryScaling::None => AngleScaling::None,
        rotary::RotaryScaling::LinearInterpolation { .. } => AngleScaling::Linear,
        rotary::RotaryScaling::NtkAware { .. } => AngleScaling::Ntk,
    }
}

/// The frequency index of sinusoid component `c` in a vector of `width`.
fn sinusoid_pair(layout: sinusoidal::SinusoidLayout, c: usize, width: usize) -> usize {
    match layout {
        sinusoidal::SinusoidLayout::Interleaved => c / 2,
        sinusoidal::SinusoidLayout::Concatenated => c % (width / 2),
    }
}

/// For absolute schemes: the tables added to queries and keys, then the per-element
/// errors of `q + table` and `k + table`.
type AbsoluteErrors = (Array2<f64>, Array2<f64>, Array3<f64>, Array3<f64>);

impl<'a> Pipeline<'a> {
    fn new(case: &'a Case, inputs: &Arrays, stage: Option<Dtype>) -> Result<Self> {
        case.validate()?;
        case.check_inputs(inputs)?;
        let mut arrays = BTreeMap::new();
        for (name, _) in inputs.iter() {
            let tensor = input(inputs, case, name)?;
            let mut values = tensor.view().to_owned();
            if let (Some(dtype), true) = (stage, tensor.dtype().is_float()) {
                values.mapv_inplace(|x| dtype.round(x));
            }
            arrays.insert(name.clone(), values);
        }
        Ok(Pipeline {
            case,
            inputs: arrays,
            stage,
        })
    }

    fn get(&self, name: &str) -> Result<ArrayD<f64>> {
        self.inputs.get(name).cloned().ok_or_else(|| {
            crate::error::Error::format(
                format!("case {}", self.case.id),
                format!("missing input array `{name}`"),
            )
        })
    }

    fn get3(&self, name: &str) -> Result<Array3<f64>> {
        fixed(name, self.get(name)?)
    }

    fn get2(&self, name: &str) -> Result<Array2<f64>> {
        fixed(name, self.get(name)?)
    }

    fn positions(&self, name: &str) -> Result<Vec<i64>> {
        Ok(self.get(name)?.iter().map(|&p| p as i64).collect())
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

    fn sinusoid(
        &self,
        width: usize,
        base: f64,
        layout: sinusoidal::SinusoidLayout,
    ) -> Result<sinusoidal::Sinusoid> {
        sinusoidal::Sinusoid::new(width, base, layout)
    }

    fn rotary(&self) -> Result<rotary::Rotary> {
        match &self.case.scheme {
            SchemeSpec::Rotary {
                rotary_dim,
                base,
                pairing,
                scaling,
                ..
            } => rotary::Rotary::new(rotary::RotaryParams {
                head_dim: self.case.head_dim,
                rotary_dim: *rotary_dim,
                base: *base,
                pairing: *pairing,
                scaling: *scaling,
            }),
            _ => unreachable!("rotary() on a rotary case only"),
        }
    }

    /// The bucketing rule of a bucketed case.
    fn buckets(&self) -> Result<bucketed::Buckets> {
        match &self.case.scheme {
            SchemeSpec::Bucketed {
                num_buckets,
                max_distance,
                bidirectional,
                ..
            } => bucketed::Buckets::new(*num_buckets, *max_distance, *bidirectional),
            _ => unreachable!("buckets() on a bucketed case only"),
        }
    }

    /// The absolute-position additive table (sinusoid or learned) at `positions`.
    fn absolute_table(&self, positions: &[i64]) -> Result<Array2<f64>> {
        match &self.case.scheme {
            SchemeSpec::Sinusoidal { base, layout } => Ok(self
                .sinusoid(self.case.head_dim, *base, *layout)?
                .table(positions)),
            SchemeSpec::Learned { .. } => {
                learned::LearnedTable::new(self.get2("table")?)?.lookup(positions)
            }
            _ => unreachable!("absolute schemes only"),
        }
    }

    /// Scores of one attention window: queries `q[H,L,d]` at `p0..`, keys
    /// `k[H,M+L,d]` at `p0-M..`.
    fn window_scores(
        &self,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
    ) -> Result<Array3<f64>> {
        let window = crate::attention::window_for(q, k)?;
        let (qp, kp) = xl_relative::standard_positions(window, p0);
        let scale = self.case.scheme.scale();
        match &self.case.scheme {
            SchemeSpec::Sinusoidal { .. } | SchemeSpec::Learned { .. } => {
                let q = &q + &self.absolute_table(&qp)?;
                let k = &k + &self.absolute_table(&kp)?;
                Ok(dot_scores(q.view(), k.view(), scale)?.0)
            }
            SchemeSpec::XlRelative { scale, clamp_len } => {
                let (r, u, v) = (
                    self.get3("r")?,
                    self.get2("content_bias")?,
                    self.get2("position_bias")?,
                );
                let inputs = xl_relative::RelativeInputs {
                    q: q.view(),
                    k: k.view(),
                    r: r.view(),
                    u: u.view(),
                    v: v.view(),
                };
                xl_relative::scores(
                    &inputs,
                    &xl_relative::RelativeParams {
                        scale: *scale,
                        clamp_len: *clamp_len,
                    },
                )
            }
            SchemeSpec::Rotary { scale, .. } => {
                Ok(rotary::scores(&self.rotary()?, q, k, p0, *scale)?.0)
            }
            SchemeSpec::Alibi { scale } => {
                let slopes = alibi::slopes(self.case.heads)?;
                let params = alibi::AlibiParams {
                    scale: *scale,
                    form: alibi::BiasForm::Distance,
                    query_start: p0,
                };
                alibi::scores(q, k, &slopes, &params)
            }
            SchemeSpec::Bucketed { scale, .. } => {
                let buckets = self.buckets()?;
                let table = self.get2("bias_table")?;
                bucketed::scores(
                    q,
                    k,
                    table.view(),
                    &bucketed::BucketedParams {
                        buckets,
                        scale: *scale,
                    },
                )
            }
            SchemeSpec::Clipped {
                clip_distance,
                scale,
            } => {
                let w_key = self.get3("w_key")?;
                clipped::scores(
                    q,
                    k,
                    w_key.view(),
                    &clipped::ClippedParams {
                        clip_distance: *clip_distance,
                        scale: *scale,
                    },
                )
            }
        }
    }

    /// Outputs of one window from its probabilities (clipped adds value embeddings).
    ///
    /// With `absolute`, the value embeddings enter as `|w|` (for error magnitudes).
    fn window_output(
        &self,
        probs: &Array3<f64>,
        v: ArrayView3<'_, f64>,
        window: Window,
        absolute: bool,
    ) -> Result<Array3<f64>> {
        let mut out = attend(probs.view(), v)?;
        if let SchemeSpec::Clipped { clip_distance, .. } = &self.case.scheme {
            let mut w_value = self.get3("w_value")?;
            if absolute {
                w_value.mapv_inplace(f64::abs);
            }
            for ((h, i, j), &p) in probs.indexed_iter() {
                if p != 0.0 {
                    let relative = j as i64 - (window.memory_len() + i) as i64;
                    let row = clipped::embedding_index(relative, *clip_distance);
                    let mut o = out.slice_mut(s![h, i, ..]);
                    o.scaled_add(p, &w_value.slice(s![h, row, ..]));
                }
            }
        }
        Ok(out)
    }

    /// Scores, probabilities and outputs of one window, each rounded at its stage.
    fn attend_window(
        &self,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        v: ArrayView3<'_, f64>,
        p0: i64,
    ) -> Result<(Array3<f64>, Array3<f64>, Array3<f64>)> {
        let window = crate::attention::window_for(q, k)?;
        let mut scores = self.window_scores(q, k, p0)?;
        for &j in &self.case.hidden_keys {
            scores.slice_mut(s![.., .., j]).fill(f64::NEG_INFINITY);
        }
        let scores = self.round(scores);
        let probs = self.round(masked_softmax(scores.view())?);
        let output = self.round(self.window_output(&probs, v, window, false)?);
        Ok((scores, probs, output))
    }

    fn run(&self) -> Result<Outputs> {
        let case = self.case;
        let mut out = Outputs::new();
        let mut put = |name: &str, x: ArrayD<f64>| {
            out.insert(name.to_string(), x);
        };
        match &case.operation {
            Operation::Encode => {
                let (name, table) = self.encode()?;
                put(name, self.round(table));
            }
            Operation::Scores | Operation::Attention => {
                let (q, k) = (self.get3("q")?, self.get3("k")?);
                let v = if case.operation == Operation::Attention {
                    self.get3("v")?
                } else {
                    Array3::zeros(k.raw_dim())
                };
                let (scores, probs, output) =
                    self.attend_window(q.view(), k.view(), v.view(), case.query_start)?;
                if case.operation == Operation::Scores {
                    put("scores", scores.into_dyn());
                } else {
                    put("probs", probs.into_dyn());
                    put("output", output.into_dyn());
                }
            }
            Operation::Stream { tokens } => {
                let (q, k, v) = (self.get3("q")?, self.get3("k")?, self.get3("v")?);
                let mut output = Array3::zeros((case.heads, *tokens, case.head_dim));
                for start in (0..*tokens).step_by(case.query_len) {
                    let end = (start + case.query_len).min(*tokens);
                    let first_key = start.saturating_sub(case.memory_len);
                    let (_, _, o) = self.attend_window(
                        q.slice(s![.., start..end, ..]),
                        k.slice(s![.., first_key..end, ..]),
                        v.slice(s![.., first_key..end, ..]),
                        case.query_start + start as i64,
                    )?;
                    output.slice_mut(s![.., start..end, ..]).assign(&o);
                }
                put("output", output.into_dyn());
            }
            Operation::Decode { prefill, .. } => {
                let (q, k, v) = (self.get3("q")?, self.get3("k")?, self.get3("v")?);
                let (_, _, o) =
                    self.attend_window(q.view(), k.view(), v.view(), case.query_start)?;
                put(
                    "output",
                    o.slice(s![.., *prefill.., ..]).to_owned().into_dyn(),
                );
            }
        }
        Ok(out)
    }

    fn encode(&self) -> Result<(&'static str, ArrayD<f64>)> {
        let case = self.case;
        Ok(match &case.scheme {
            SchemeSpec::Sinusoidal { .. } | SchemeSpec::Learned { .. } => {
                let name = if matches!(case.scheme, SchemeSpec::Learned { .. }) {
                    "rows"
                } else {
                    "table"
                };
                (
                    name,
                    self.absolute_table(&self.positions("positions")?)?
                        .into_dyn(),
                )
            }
            SchemeSpec::Rotary { .. } => {
                let x = self.get3("x")?;
                (
                    "rotated",
                    self.rotary()?
                        .apply(x.view(), &self.positions("positions")?)?
                        .into_dyn(),
                )
            }
            SchemeSpec::XlRelative { .. } => {
                let pe = self.sinusoid(
                    case.head_dim,
                    sinusoidal::DEFAULT_BASE,
                    sinusoidal::SinusoidLayout::Concatenated,
                )?;
                (
                    "r",
                    xl_relative::relative_embeddings(
                        &pe,
                        self.get3("w_kr")?.view(),
                        case.key_len(),
                    )?
                    .into_dyn(),
                )
            }
            SchemeSpec::Alibi { .. } => (
                "slopes",
                Array1::from(alibi::slopes(case.heads)?).into_dyn(),
            ),
            SchemeSpec::Bucketed { .. } => {
                let rule = self.buckets()?;
                let rel = self.positions("relative_positions")?;
                (
                    "buckets",
                    Array1::from_iter(rel.iter().map(|&r| bucketed::bucket(r, &rule) as f64))
                        .into_dyn(),
                )
            }
            SchemeSpec::Clipped { clip_distance, .. } => {
                let rel = self.positions("relative_positions")?;
                (
                    "indices",
                    Array1::from_iter(
                        rel.iter()
                            .map(|&r| clipped::embedding_index(r, *clip_distance) as f64),
                    )
                    .into_dyn(),
                )
            }
        })
    }

    fn bounds(&self, dtype: Dtype) -> Result<Outputs> {
        let case = self.case;
        let contract = Contract::for_dtype(dtype, case.dtype);
        let mut out = Outputs::new();
        match &case.operation {
            Operation::Encode => {
                let (name, values) = self.encode()?;
                let bound = self.encode_bounds(&values, &contract)?;
                out.insert(name.to_string(), bound);
            }
            Operation::Scores => {
                let (q, k) = (self.get3("q")?, self.get3("k")?);
                let (bound, _) =
                    self.score_bounds(q.view(), k.view(), case.query_start, &contract)?;
                out.insert("scores".into(), bound.into_dyn());
            }
            Operation::Attention => {
                let (q, k, v) = (self.get3("q")?, self.get3("k")?, self.get3("v")?);
                let (probs, output) =
                    self.window_bounds(q.view(), k.view(), v.view(), case.query_start, &contract)?;
                out.insert("probs".into(), probs.into_dyn());
                out.insert("output".into(), output.into_dyn());
            }
            Operation::Stream { tokens } => {
                let (q, k, v) = (self.get3("q")?, self.get3("k")?, self.get3("v")?);
                let mut output = Array3::zeros((case.heads, *tokens, case.head_dim));
                for start in (0..*tokens).step_by(case.query_len) {
                    let end = (start + case.query_len).min(*tokens);
                    let first_key = start.saturating_sub(case.memory_len);
                    let (_, o) = self.window_bounds(
                        q.slice(s![.., start..end, ..]),
                        k.slice(s![.., first_key..end, ..]),
                        v.slice(s![.., first_key..end, ..]),
                        case.query_start + start as i64,
                        &contract,
                    )?;
                    output.slice_mut(s![.., start..end, ..]).assign(&o);
                }
                out.insert("output".into(), output.into_dyn());
            }
            Operation::Decode { prefill, .. } => {
                let (q, k, v) = (self.get3("q")?, self.get3("k")?, self.get3("v")?);
                let (_, o) =
                    self.window_bounds(q.view(), k.view(), v.view(), case.query_start, &contract)?;
                out.insert(
                    "output".into(),
                    o.slice(s![.., *prefill.., ..]).to_owned().into_dyn(),
                );
            }
        }
        Ok(out)
    }

    /// Per-element bound on each visible score of one window (0 on hidden entries),
    /// and the scores themselves.
    ///
    /// Every scheme's bound is `scale · (terms of the products) + 2u_s|s| + floor`:
    /// the terms are rounding of the stored intermediates and of the accumulation
    /// (`γ_n`, multiplied by a `Σ|x_i y_i|` magnitude), plus, for position-dependent
    /// tables, the *absolute* angle error carried linearly through the products
    /// (docs/budgets.md, "Scores").
    fn score_bounds(
        &self,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
        contract: &Contract,
    ) -> Result<(Array3<f64>, Array3<f64>)> {
        let case = self.case;
        let window = crate::attention::window_for(q, k)?;
        let (qp, kp) = xl_relative::standard_positions(window, p0);
        let scores = self.window_scores(q, k, p0)?;
        let d = case.head_dim;
        let factor = case.scheme.scale().factor(d).abs();
        let us = contract.storage;
        // γ' of the dot product: the kernel's accumulation, one rounding of the scale
        // product, and the reference's own f64 accumulation.
        let gamma = contract.gamma(d) + contract.accumulation + gamma_of(R64, d);
        let products = |a: &Array3<f64>, b: &Array3<f64>| -> Array3<f64> {
            let mut out = Array3::zeros((case.heads, window.query_len(), window.key_len()));
            Zip::from(out.outer_iter_mut())
                .and(a.outer_iter())
                .and(b.outer_iter())
                .for_each(|mut o, a, b| gemm(factor, &a, &b.t(), 0.0, &mut o));
            out
        };
        let terms: Array3<f64> = match &case.scheme {
            SchemeSpec::Sinusoidal { .. } | SchemeSpec::Learned { .. } => {
                let (qt, kt, eq, ek) = self.absolute_errors(q, k, &qp, &kp, contract)?;
                let (qa, ka) = ((&q + &qt).mapv(f64::abs), (&k + &kt).mapv(f64::abs));
                // ε_q·|k̂| + |q̂|·ε_k + ε_q·ε_k + γ'·|q̂|·|k̂|
                products(&eq, &ka)
                    + products(&qa, &ek)
                    + products(&eq, &ek)
                    + products(&qa, &ka) * gamma
            }
            SchemeSpec::XlRelative { clamp_len, .. } => {
                let (r, u, v) = (
                    self.get3("r")?.mapv(f64::abs),
                    self.get2("content_bias")?.mapv(f64::abs),
                    self.get2("position_bias")?.mapv(f64::abs),
                );
                let (qa, ka) = (q.mapv(f64::abs), k.mapv(f64::abs));
                let inputs = xl_relative::RelativeInputs {
                    q: qa.view(),
                    k: ka.view(),
                    r: r.view(),
                    u: u.view(),
                    v: v.view(),
                };
                let params = xl_relative::RelativeParams {
                    scale: Scale::Fixed(factor),
                    clamp_len: *clamp_len,
                };
                // Σ(|q|+|u|)|k| + Σ(|q|+|v|)|r_Δ|: q+u and q+v rounded, the inputs
                // rounded to the dtype, two dot products and their sum.
                let magnitude = xl_relative::scores(&inputs, &params)?.mapv(finite_or_zero);
                // (four dot products summed add 3u_s; inputs add 2·input)
                magnitude * (gamma + 3.0 * us + 2.0 * contract.input + 4.0 * R64)
            }
            SchemeSpec::Rotary { .. } => self.rotary_score_terms(q, k, &qp, &kp, contract)?,
            SchemeSpec::Alibi { .. } => {
                let bias = alibi::bias(
                    &alibi::slopes(case.heads)?,
                    window,
                    alibi::BiasForm::Distance,
                    p0,
                )?;
                let (qa, ka) = (q.mapv(f64::abs), k.mapv(f64::abs));
                // The slope formed at the angle precision, the product m·Δ and the
                // bias stored in the dtype.
                products(&qa, &ka) * (gamma + us + 2.0 * contract.input)
                    + bias.mapv(|b| finite_or_zero(b).abs()) * (contract.angle + us + R64)
            }
            SchemeSpec::Bucketed { .. } => {
                let rule = self.buckets()?;
                let bias = bucketed::bias(self.get2("bias_table")?.view(), window, &rule)?;
                let (qa, ka) = (q.mapv(f64::abs), k.mapv(f64::abs));
                products(&qa, &ka) * (gamma + us + 2.0 * contract.input)
                    + bias.mapv(|b| finite_or_zero(b).abs()) * (us + contract.input)
            }
            SchemeSpec::Clipped { clip_distance, .. } => {
                let w = self.get3("w_key")?.mapv(f64::abs);
                let params = clipped::ClippedParams {
                    clip_distance: *clip_distance,
                    scale: Scale::Fixed(factor),
                };
                let (qa, ka) = (q.mapv(f64::abs), k.mapv(f64::abs));
                clipped::scores(qa.view(), ka.view(), w.view(), &params)?.mapv(finite_or_zero)
                    * (gamma + us + 2.0 * contract.input)
            }
        };
        let mut bound = Zip::from(&terms).and(&scores).map_collect(|&t, &s| {
            if s.is_finite() {
                t + 2.0 * us * s.abs() + contract.floor
            } else {
                0.0
            }
        });
        for &j in &self.case.hidden_keys {
            bound.slice_mut(s![.., .., j]).fill(0.0);
        }
        Ok((bound, scores))
    }

    /// For absolute schemes: the tables added to queries and keys, and the per-element
    /// error `ε` of `q + table` a kernel may make: the table's angle error (sinusoid),
    /// its evaluation and storage, the sum's rounding and the inputs' rounding.
    fn absolute_errors(
        &self,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        qp: &[i64],
        kp: &[i64],
        contract: &Contract,
    ) -> Result<AbsoluteErrors> {
        let (qt, kt) = (self.absolute_table(qp)?, self.absolute_table(kp)?);
        let rounding = contract.storage + R64;
        let errors = |x: ArrayView3<'_, f64>, table: &Array2<f64>, positions: &[i64]| {
            let table_error = self.table_errors(table, positions, contract);
            Array3::from_shape_fn(x.raw_dim(), |(h, n, c)| {
                let sum = x[[h, n, c]] + table[[n, c]];
                table_error[[n, c]] + rounding * sum.abs() + contract.input * x[[h, n, c]].abs()
            })
        };
        let (eq, ek) = (errors(q, &qt, qp), errors(k, &kt, kp));
        Ok((qt, kt, eq, ek))
    }

    /// Per-element error of an absolute table at `positions`: a sinusoid's angle error,
    /// evaluation and storage; a learned table's rounding to the dtype.
    fn table_errors(
        &self,
        table: &Array2<f64>,
        positions: &[i64],
        contract: &Contract,
    ) -> Array2<f64> {
        match &self.case.scheme {
            SchemeSpec::Sinusoidal { base, layout } => {
                let width = self.case.head_dim;
                let omegas = match self.sinusoid(width, *base, *layout) {
                    Ok(pe) => pe.frequencies().to_vec(),
                    Err(_) => vec![0.0; width / 2],
                };
                Array2::from_shape_fn(table.raw_dim(), |(n, c)| {
                    let pair = sinusoid_pair(*layout, c, width);
                    let omega = omegas[pair];
                    let p = positions[n] as f64;
                    contract.angle_error(p, p * omega, omega, AngleScaling::None)
                        + contract.table_value_error()
                })
            }
            // A learned row is an exact lookup of an input.
            _ => table.mapv(|t| contract.input * t.abs()),
        }
    }

    /// The rotary score terms: per rotated pair `j`,
    /// `ρ_q ρ_k (δθ_q + δθ_k + 4e + 4e² + γ')` (a rotation by a wrong angle moves a pair
    /// of norm `ρ` by `ρ·|δθ|`; `e` is the relative error of one rotated component from
    /// cos/sin evaluation, storage, the rotation's products and the inputs' rounding),
    /// plus `(2u_s + γ')·Σ|q_c k_c|` over the pass-through tail; all times the scale.
    fn rotary_score_terms(
        &self,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        qp: &[i64],
        kp: &[i64],
        contract: &Contract,
    ) -> Result<Array3<f64>> {
        let case = self.case;
        let rot = self.rotary()?;
        let params = *rot.params();
        let pairs = params.rotary_dim / 2;
        let d = case.head_dim;
        let factor = case.scheme.scale().factor(d).abs();
        let gamma = contract.gamma(d) + contract.accumulation + gamma_of(R64, d);
        let e = contract.rotated_component_error();
        let per_pair = 4.0 * e + 4.0 * e * e + gamma;
        let scaling = angle_scaling(&params.scaling);
        let angle_errors = |positions: &[i64]| -> Result<Array2<f64>> {
            let mut out = Array2::zeros((positions.len(), pairs));
            for (n, &p) in positions.iter().enumerate() {
                for (j, theta) in rot.angles(p)?.into_iter().enumerate() {
                    out[[n, j]] =
                        contract.angle_error(p as f64, theta, rot.frequencies()[j], scaling);
                }
            }
            Ok(out)
        };
        let (dq, dk) = (angle_errors(qp)?, angle_errors(kp)?);
        let norms = |x: ArrayView3<'_, f64>| {
            Array3::from_shape_fn((x.dim().0, x.dim().1, pairs), |(h, n, j)| {
                let (a, b) = params.pairing.pair_indices(j, params.rotary_dim);
                x[[h, n, a]].hypot(x[[h, n, b]])
            })
        };
        let (rq, rk) = (norms(q), norms(k));
        let weighted = |rho: &Array3<f64>, delta: &Array2<f64>| {
            Array3::from_shape_fn(rho.raw_dim(), |(h, n, j)| rho[[h, n, j]] * delta[[n, j]])
        };
        let (rq_dq, rk_dk) = (weighted(&rq, &dq), weighted(&rk, &dk));
        let tail = |x: ArrayView3<'_, f64>| x.slice(s![.., .., params.rotary_dim..]).mapv(f64::abs);
        let (tq, tk) = (tail(q), tail(k));
        let (heads, l, kk) = (case.heads, q.dim().1, k.dim().1);
        let mut out = Array3::zeros((heads, l, kk));
        for h in 0..heads {
            let mut o = out.index_axis_mut(Axis(0), h);
            let (rq, rk) = (rq.index_axis(Axis(0), h), rk.index_axis(Axis(0), h));
            gemm(factor, &rq_dq.index_axis(Axis(0), h), &rk.t(), 0.0, &mut o);
            gemm(factor, &rq, &rk_dk.index_axis(Axis(0), h).t(), 1.0, &mut o);
            gemm(factor * per_pair, &rq, &rk.t(), 1.0, &mut o);
            if params.rotary_dim < d {
                let tail_coefficient = 2.0 * contract.input + gamma;
                gemm(
                    factor * tail_coefficient,
                    &tq.index_axis(Axis(0), h),
                    &tk.index_axis(Axis(0), h).t(),
                    1.0,
                    &mut o,
                );
            }
        }
        Ok(out)
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
        let us = contract.storage;
        let ua = contract.accumulation;
        let window = crate::attention::window_for(q, k)?;
        let key_len = window.key_len();
        let (score_bound, mut scores) = self.score_bounds(q, k, p0, contract)?;
        for &j in &self.case.hidden_keys {
            scores.slice_mut(s![.., .., j]).fill(f64::NEG_INFINITY);
        }
        let (_, probs, output) = self.attend_window(q, k, v, p0)?;
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
        let probs_bound = Array3::from_shape_fn(probs.raw_dim(), |(h, i, j)| {
            let p = probs[[h, i, j]];
            let s = finite_or_zero(scores[[h, i, j]]).abs();
            let relative = growth(row_delta[[h, i]])
                + softmax_gamma
                + 2.0 * ua * (s + row_max_abs[[h, i]])
                + us
                + R64;
            (p * relative).min(f64::MAX) + contract.floor
        });
        // Σ_j δp_ij |v_jc| + (γ_K + 2u_s)·Σ_j p_ij (|v_jc| + |value embedding|).
        let va = v.mapv(f64::abs);
        let carried = self.window_output(&probs_bound, va.view(), window, true)?;
        let magnitude = self.window_output(&probs, va.view(), window, true)?;
        let output_gamma = gamma_of(ua, key_len) + gamma_of(R64, key_len) + contract.input;
        let output_bound = Zip::from(&carried)
            .and(&magnitude)
            .and(&output)
            .map_collect(|&c, &m, &o| c + output_gamma * m + us * o.abs() + contract.floor);
        Ok((probs_bound, output_bound))
    }

    fn encode_bounds(&self, values: &ArrayD<f64>, contract: &Contract) -> Result<ArrayD<f64>> {
        let case = self.case;
        let us = contract.storage;
        let floor = contract.floor;
        Ok(match &case.scheme {
            SchemeSpec::Sinusoidal { .. } => {
                let table = fixed::<ndarray::Ix2>("table", values.clone())?;
                self.table_errors(&table, &self.positions("positions")?, contract)
                    .mapv(|e| e + floor)
                    .into_dyn()
            }
            // Lookups are exact; a kernel narrower than the case rounds them once.
            SchemeSpec::Learned { .. } => values.mapv(|v| contract.input * v.abs() + floor),
            SchemeSpec::Bucketed { .. } | SchemeSpec::Clipped { .. } => {
                ArrayD::zeros(values.raw_dim())
            }
            // Slopes formed at the angle precision and stored in the dtype.
            SchemeSpec::Alibi { .. } => {
                values.mapv(|m| (contract.angle + us + R64) * m.abs() + floor)
            }
            SchemeSpec::Rotary { .. } => {
                let rot = self.rotary()?;
                let params = *rot.params();
                let x = self.get3("x")?;
                let positions = self.positions("positions")?;
                let e = contract.rotated_component_error();
                let scaling = angle_scaling(&params.scaling);
                // The pass-through tail: only the inputs' rounding.
                let mut bound = values.mapv(|v| contract.input * v.abs() + floor);
                for (n, &p) in positions.iter().enumerate() {
                    let angles = rot.angles(p)?;
                    for (j, (&theta, &omega)) in angles.iter().zip(rot.frequencies()).enumerate() {
                        let delta = contract.angle_error(p as f64, theta, omega, scaling);
                        let (a, b) = params.pairing.pair_indices(j, params.rotary_dim);
                        for h in 0..case.heads {
                            let (xa, xb) = (x[[h, n, a]], x[[h, n, b]]);
                            let pair = xa.hypot(xb) * delta + (xa.abs() + xb.abs()) * e;
                            bound[[h, n, a].as_slice()] = pair + floor;
                            bound[[h, n, b].as_slice()] = pair + floor;
                        }
                    }
                }
                bound
            }
            SchemeSpec::XlRelative { .. } => {
                // r[h, δ] = R_δ · W[h]: the table's error (angle, evaluation, storage)
                // carried through W linearly, plus the product's rounding.
                let pe = self.sinusoid(
                    case.head_dim,
                    sinusoidal::DEFAULT_BASE,
                    sinusoidal::SinusoidLayout::Concatenated,
                )?;
                let w = self.get3("w_kr")?.mapv(f64::abs);
                let distances: Vec<i64> = (0..case.key_len() as i64).collect();
                let table = pe.table(&distances);
                let half = case.head_dim / 2;
                let errors = Array2::from_shape_fn(table.raw_dim(), |(n, c)| {
                    let omega = pe.frequencies()[c % half];
                    let p = n as f64;
                    contract.angle_error(p, p * omega, omega, AngleScaling::None)
                        + contract.table_value_error()
                });
                let table = table.mapv(f64::abs);
                let gamma =
                    contract.gamma(case.head_dim) + gamma_of(R64, case.head_dim) + contract.input;
                let mut bound = Array3::zeros((case.heads, case.key_len(), case.head_dim));
                for (mut b, wh) in bound.outer_iter_mut().zip(w.outer_iter()) {
                    gemm(1.0, &errors, &wh, 0.0, &mut b);
                    gemm(gamma, &table, &wh, 1.0, &mut b);
                }
                bound.into_dyn() + values.mapv(|v| us * v.abs() + floor)
            }
        })
    }
}
