//! The reference pipeline: a case's expected outputs, the same-precision baseline, and
//! the analytic per-element error bounds (DESIGN.md §4).
//!
//! - [`expected`]: the f64 oracle from the case's inputs.
//! - [`baseline`]: the same pipeline with inputs and every stage tensor (scores,
//!   probabilities, outputs, tables) rounded to a dtype. A kernel computing honestly
//!   in that dtype lands near it; the budget accepts `c ×` its error.
//! - [`analytic_bounds`]: per element, `(γ_n + 2u)·Σ|x_i y_i| + u·|result|` for scores
//!   (Higham 2002, §3.1), with the phase error of angles formed in f32 (the narrowest
//!   precision DESIGN.md §4 allows for `pos·θ`) for sinusoid, rotary and relative
//!   tables; probabilities and outputs carry the score bounds through the softmax
//!   (see `window_bounds`). `γ_n` is taken in the accumulation precision: f32 or wider
//!   ([`crate::precision::accumulation_gamma`]).

use std::collections::BTreeMap;

use ndarray::{s, Array1, Array2, Array3, ArrayD, ArrayView3, Axis, Zip};

use crate::attention::{attend, dot_scores, masked_softmax, Scale, Window};
use crate::case::{fixed, input, Arrays, Case, Operation, SchemeSpec};
use crate::error::Result;
use crate::precision::{accumulation_gamma, with_portable_arithmetic, Dtype};
use crate::scheme::{alibi, bucketed, clipped, learned, rotary, sinusoidal, xl_relative};

/// Output arrays by name, in f64.
pub type Outputs = BTreeMap<String, ArrayD<f64>>;

/// The f64 oracle for `case` on `inputs`, computed with portable arithmetic so the
/// values are bit-identical on every machine.
pub fn expected(case: &Case, inputs: &Arrays) -> Result<Outputs> {
    with_portable_arithmetic(|| Pipeline::new(case, inputs, None)?.run())
}

/// The same pipeline with inputs and stage tensors rounded to `dtype`.
pub fn baseline(case: &Case, inputs: &Arrays, dtype: Dtype) -> Result<Outputs> {
    with_portable_arithmetic(|| Pipeline::new(case, inputs, Some(dtype))?.run())
}

/// Analytic per-element bounds for the outputs that have one (scores and tables), for
/// a kernel computing in `dtype`.
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

fn abs3(x: ArrayView3<'_, f64>) -> Array3<f64> {
    x.mapv(f64::abs)
}

/// Upper bound on the error of the angle `p·ω` formed in `u_angle` precision
/// (exponent rounding, `powf`, and the product: see published_values/sinusoidal.rs),
/// plus one rounding of sin or cos.
fn angle_error(position: f64, omega: f64, exponent_times_ln_base: f64, u_angle: f64) -> f64 {
    position.abs() * omega * (exponent_times_ln_base.abs() + 2.0) * u_angle + u_angle
}

/// Angles are formed in f32 or wider (DESIGN.md §4): the angle precision of a kernel
/// computing in `dtype`.
fn angle_roundoff(dtype: Dtype) -> f64 {
    dtype.unit_roundoff().min(Dtype::F32.unit_roundoff())
}

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
        let ua = angle_roundoff(dtype);
        let mut out = Outputs::new();
        match &case.operation {
            Operation::Encode => {
                let (name, values) = self.encode()?;
                let bound = self.encode_bounds(&values, dtype, ua)?;
                out.insert(name.to_string(), bound);
            }
            Operation::Scores => {
                let (q, k) = (self.get3("q")?, self.get3("k")?);
                let bound = self.score_bounds(q.view(), k.view(), case.query_start, dtype)?;
                out.insert("scores".into(), bound.into_dyn());
            }
            Operation::Attention => {
                let (q, k, v) = (self.get3("q")?, self.get3("k")?, self.get3("v")?);
                let (probs, output) =
                    self.window_bounds(q.view(), k.view(), v.view(), case.query_start, dtype)?;
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
                        dtype,
                    )?;
                    output.slice_mut(s![.., start..end, ..]).assign(&o);
                }
                out.insert("output".into(), output.into_dyn());
            }
            Operation::Decode { prefill, .. } => {
                let (q, k, v) = (self.get3("q")?, self.get3("k")?, self.get3("v")?);
                let (_, o) =
                    self.window_bounds(q.view(), k.view(), v.view(), case.query_start, dtype)?;
                out.insert(
                    "output".into(),
                    o.slice(s![.., *prefill.., ..]).to_owned().into_dyn(),
                );
            }
        }
        Ok(out)
    }

    /// Per-element bound on each visible score: `(γ_n + 2u)·magnitude + u·|s|`, with
    /// `γ_n` in the accumulation precision and `u` the dtype's (inputs and the result
    /// are rounded to it). 0 on hidden entries.
    fn score_bounds(
        &self,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
        dtype: Dtype,
    ) -> Result<Array3<f64>> {
        let u = dtype.unit_roundoff();
        let scores = self.window_scores(q, k, p0)?;
        let gamma = accumulation_gamma(dtype, reduction_length(self.case, "scores")) + 2.0 * u;
        let magnitude = self.score_magnitude(q, k, p0, angle_roundoff(dtype))?;
        Ok(Zip::from(&magnitude).and(&scores).map_collect(|&m, &s| {
            if s.is_finite() {
                gamma * m + u * s.abs()
            } else {
                0.0
            }
        }))
    }

    /// Bounds on probabilities and outputs of one window, propagated from the score
    /// bounds: if every score of row `i` is off by at most `S_i`, each probability is
    /// off by a factor within `e^(±2 S_i)`, i.e. by about `2 S_i · p_ij`; the softmax's
    /// own exp, sum and division add `γ_(K+2)` relatively, the output's weighted sum
    /// `γ_K · Σ_j p_ij |v_j|`, and each result is rounded once to the dtype.
    fn window_bounds(
        &self,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        v: ArrayView3<'_, f64>,
        p0: i64,
        dtype: Dtype,
    ) -> Result<(Array3<f64>, Array3<f64>)> {
        let u = dtype.unit_roundoff();
        let window = crate::attention::window_for(q, k)?;
        let mut score_bound = self.score_bounds(q, k, p0, dtype)?;
        let (_, probs, output) = self.attend_window(q, k, v, p0)?;
        for &j in &self.case.hidden_keys {
            score_bound.slice_mut(s![.., .., j]).fill(0.0);
        }
        let key_len = window.key_len();
        let relative = |row_bound: f64| {
            let growth = (2.0 * row_bound).exp_m1();
            if growth.is_finite() {
                growth
            } else {
                f64::MAX
            }
        };
        let row_max = score_bound.map_axis(ndarray::Axis(2), |row| {
            row.iter().copied().fold(0.0, f64::max)
        });
        let softmax_gamma = accumulation_gamma(dtype, key_len + 2);
        let probs_bound = Array3::from_shape_fn(probs.raw_dim(), |(h, i, j)| {
            let p = probs[[h, i, j]];
            p * (relative(row_max[[h, i]]) + softmax_gamma) + u * p
        });
        // Σ_j p_ij (|v_jc| + |value embedding|): the magnitude of each output element.
        let magnitude = self.window_output(&probs, v.mapv(f64::abs).view(), window, true)?;
        let output_gamma = accumulation_gamma(dtype, key_len) + u;
        let output_bound = Array3::from_shape_fn(output.raw_dim(), |(h, i, c)| {
            let m = magnitude[[h, i, c]];
            m * (relative(row_max[[h, i]]) + softmax_gamma + output_gamma)
                + u * output[[h, i, c]].abs()
        });
        Ok((probs_bound, output_bound))
    }

    /// `Σ|x_i y_i|`-type magnitude of each score, plus the phase-error contribution of
    /// position-dependent factors.
    fn score_magnitude(
        &self,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        p0: i64,
        u_angle: f64,
    ) -> Result<Array3<f64>> {
        let case = self.case;
        let window = crate::attention::window_for(q, k)?;
        let (qp, kp) = xl_relative::standard_positions(window, p0);
        let factor = case.scheme.scale().factor(case.head_dim).abs();
        let plain = |a: Array3<f64>, b: Array3<f64>| -> Result<Array3<f64>> {
            Ok(dot_scores(a.view(), b.view(), Scale::Fixed(factor))?
                .0
                .mapv(|x| if x.is_finite() { x } else { 0.0 }))
        };
        match &case.scheme {
            SchemeSpec::Sinusoidal { base, layout } => {
                let pe = self.sinusoid(case.head_dim, *base, *layout)?;
                let (qa, ka) = (
                    abs3((&q + &pe.table(&qp)).view()),
                    abs3((&k + &pe.table(&kp)).view()),
                );
                let errors = |positions: &[i64]| {
                    Array2::from_shape_fn((positions.len(), case.head_dim), |(n, c)| {
                        let i = c / 2;
                        let i = if *layout == sinusoidal::SinusoidLayout::Interleaved {
                            i
                        } else {
                            c % (case.head_dim / 2)
                        };
                        let omega = pe.frequencies()[i];
                        angle_error(positions[n] as f64, omega, omega.ln(), u_angle)
                    })
                };
                let (eq, ek) = (errors(&qp), errors(&kp));
                let eq3 = Array3::from_shape_fn(qa.raw_dim(), |(_, n, c)| eq[[n, c]]);
                let ek3 = Array3::from_shape_fn(ka.raw_dim(), |(_, n, c)| ek[[n, c]]);
                Ok(plain(qa.clone(), ka.clone())? + plain(eq3, ka)? + plain(qa, ek3)?)
            }
            SchemeSpec::Learned { .. } => {
                let qa = abs3((&q + &self.absolute_table(&qp)?).view());
                let ka = abs3((&k + &self.absolute_table(&kp)?).view());
                plain(qa, ka)
            }
            SchemeSpec::XlRelative { clamp_len, .. } => {
                let (r, u, v) = (
                    self.get3("r")?,
                    self.get2("content_bias")?,
                    self.get2("position_bias")?,
                );
                let (qa, ka, ra, ua, va) = (
                    abs3(q),
                    abs3(k),
                    r.mapv(f64::abs),
                    u.mapv(f64::abs),
                    v.mapv(f64::abs),
                );
                let inputs = xl_relative::RelativeInputs {
                    q: qa.view(),
                    k: ka.view(),
                    r: ra.view(),
                    u: ua.view(),
                    v: va.view(),
                };
                let params = xl_relative::RelativeParams {
                    scale: Scale::Fixed(factor),
                    clamp_len: *clamp_len,
                };
                Ok(xl_relative::scores(&inputs, &params)?
                    .mapv(|x| if x.is_finite() { x } else { 0.0 }))
            }
            SchemeSpec::Rotary { .. } => {
                let rot = self.rotary()?;
                let theta0 = rot.frequencies().first().copied().unwrap_or(0.0);
                let base_ln = match &case.scheme {
                    SchemeSpec::Rotary { base, .. } => base.ln(),
                    _ => 0.0,
                };
                let scaled = |p: i64| {
                    rot.angles(p)
                        .map(|a| a.first().copied().unwrap_or(0.0) / theta0.max(f64::MIN_POSITIVE))
                };
                let norms =
                    |x: ArrayView3<'_, f64>| x.map_axis(Axis(2), |row| row.dot(&row).sqrt());
                let (nq, nk) = (norms(q), norms(k));
                let mut out = Array3::zeros((case.heads, window.query_len(), window.key_len()));
                for ((h, i, j), o) in out.indexed_iter_mut() {
                    let eq = angle_error(scaled(qp[i])?, theta0, base_ln, u_angle);
                    let ek = angle_error(scaled(kp[j])?, theta0, base_ln, u_angle);
                    *o = factor * nq[[h, i]] * nk[[h, j]] * (1.0 + eq + ek);
                }
                Ok(out)
            }
            SchemeSpec::Alibi { .. } => {
                let bias = alibi::bias(
                    &alibi::slopes(case.heads)?,
                    window,
                    alibi::BiasForm::Distance,
                    p0,
                )?;
                Ok(plain(abs3(q), abs3(k))?
                    + bias.mapv(|b| if b.is_finite() { b.abs() } else { 0.0 }))
            }
            SchemeSpec::Bucketed { .. } => {
                let rule = self.buckets()?;
                let bias = bucketed::bias(self.get2("bias_table")?.view(), window, &rule)?;
                Ok(plain(abs3(q), abs3(k))?
                    + bias.mapv(|b| if b.is_finite() { b.abs() } else { 0.0 }))
            }
            SchemeSpec::Clipped { clip_distance, .. } => {
                let w = self.get3("w_key")?.mapv(f64::abs);
                let params = clipped::ClippedParams {
                    clip_distance: *clip_distance,
                    scale: Scale::Fixed(factor),
                };
                Ok(
                    clipped::scores(abs3(q).view(), abs3(k).view(), w.view(), &params)?.mapv(|x| {
                        if x.is_finite() {
                            x
                        } else {
                            0.0
                        }
                    }),
                )
            }
        }
    }

    fn encode_bounds(
        &self,
        values: &ArrayD<f64>,
        dtype: Dtype,
        u_angle: f64,
    ) -> Result<ArrayD<f64>> {
        let case = self.case;
        let u = dtype.unit_roundoff();
        Ok(match &case.scheme {
            SchemeSpec::Sinusoidal { base, layout } => {
                let pe = self.sinusoid(case.head_dim, *base, *layout)?;
                let positions = self.positions("positions")?;
                let half = case.head_dim / 2;
                ArrayD::from_shape_fn(values.raw_dim(), |idx| {
                    let (n, c) = (idx[0], idx[1]);
                    let i = if *layout == sinusoidal::SinusoidLayout::Interleaved {
                        c / 2
                    } else {
                        c % half
                    };
                    let omega = pe.frequencies()[i];
                    angle_error(positions[n] as f64, omega, omega.ln(), u_angle) + 2.0 * u
                })
            }
            // Lookups are exact; a kernel narrower than the case rounds them once.
            SchemeSpec::Learned { .. } => values.mapv(|v| u * v.abs()),
            SchemeSpec::Bucketed { .. } | SchemeSpec::Clipped { .. } => {
                ArrayD::zeros(values.raw_dim())
            }
            SchemeSpec::Alibi { .. } => values.mapv(|s| 2.0 * u * s.abs()),
            SchemeSpec::Rotary {
                rotary_dim,
                pairing,
                base,
                ..
            } => {
                let rot = self.rotary()?;
                let x = self.get3("x")?;
                let positions = self.positions("positions")?;
                let mut bound = values.mapv(|v| u * v.abs());
                let gamma = accumulation_gamma(dtype, 4);
                for ((h, n, c), _) in x.indexed_iter() {
                    if c >= *rotary_dim {
                        // The tail passes through: only the rounding to the dtype.
                        continue;
                    }
                    let j = match pairing {
                        rotary::Pairing::Adjacent => c / 2,
                        rotary::Pairing::HalfSplit => c % (rotary_dim / 2),
                    };
                    let (a, b) = pairing.pair_indices(j, *rotary_dim);
                    let theta = rot.frequencies()[j];
                    let angle = rot.angles(positions[n])?[j];
                    let p = if theta > 0.0 { angle / theta } else { 0.0 };
                    let pair = x[[h, n, a]].abs() + x[[h, n, b]].abs();
                    bound[[h, n, c].as_slice()] +=
                        pair * (angle_error(p, theta, base.ln(), u_angle) + gamma);
                }
                bound
            }
            SchemeSpec::XlRelative { .. } => {
                let pe = self.sinusoid(
                    case.head_dim,
                    sinusoidal::DEFAULT_BASE,
                    sinusoidal::SinusoidLayout::Concatenated,
                )?;
                let w = self.get3("w_kr")?.mapv(f64::abs);
                let distances: Vec<i64> = (0..case.key_len() as i64).collect();
                let table = pe.table(&distances).mapv(f64::abs);
                let half = case.head_dim / 2;
                let errors = Array2::from_shape_fn(table.raw_dim(), |(n, c)| {
                    let omega = pe.frequencies()[c % half];
                    angle_error(n as f64, omega, omega.ln(), u_angle)
                });
                let gamma = accumulation_gamma(dtype, case.head_dim + 2);
                let mut bound = Array3::zeros((case.heads, case.key_len(), case.head_dim));
                for (mut b, wh) in bound.outer_iter_mut().zip(w.outer_iter()) {
                    b.assign(&(table.dot(&wh) * gamma + errors.dot(&wh)));
                }
                bound.into_dyn() + values.mapv(|v| u * v.abs())
            }
        })
    }
}
