//! The bundled demo kernel, in an invented scenario.
//!
//! Brightwater Audio (a fictional team) is porting Kestrel-XL, their streaming
//! captioning model with Transformer-XL relative attention and segment memory, to their
//! own runtime, Tern. Their fused attention kernel builds the causal mask the way a
//! plain decoder does, `j <= i`, instead of offsetting it by the memory length,
//! `j <= M + i` (docs/faults.md, `mask-not-offset-by-memory`). On the first segment there is no memory,
//! `M = 0`, and the two masks agree: every single-segment test they wrote passes. From
//! the second segment on, each query sees only the oldest `i + 1` memory rows and none
//! of its own segment. The model still trains; it is just worse.
//!
//! The kernel computes in f64 and answers in f32, as their runtime does.

use ndarray::{s, Array3};

use crate::attention::{attend, masked_softmax};
use crate::case::{Arrays, Case, Operation, OperationKind};
use crate::error::{Error, Result};
use crate::kernel::{Answer, Kernel, KernelInfo, Support};
use crate::math::precision::Dtype;
use crate::recurrence::segments;
use crate::scheme::xl_relative::{scores, RelativeInputs, RelativeParams};
use crate::scheme::{Scheme, SchemeSpec};
use crate::tensor::Tensor;

/// The demo team's kernel (see the module docs for the story and the bug).
#[derive(Debug, Clone, Default)]
pub struct TernKernel;

/// A named input of the expected rank, or an error naming it (never a panic).
fn get<D: ndarray::Dimension>(inputs: &Arrays, name: &str) -> Result<ndarray::Array<f64, D>> {
    let t = inputs
        .get(name)
        .ok_or_else(|| Error::format("run request", format!("missing input `{name}`")))?;
    let rank = t.shape().len();
    t.view()
        .to_owned()
        .into_dimensionality::<D>()
        .map_err(|_| Error::format("run request", format!("input `{name}` has rank {rank}")))
}

fn get3(inputs: &Arrays, name: &str) -> Result<Array3<f64>> {
    get(inputs, name)
}

impl TernKernel {
    /// Relative attention of one window with the kernel's (wrong) top-left mask.
    fn window(
        &self,
        params: &RelativeParams,
        inputs: &Arrays,
        q: ndarray::ArrayView3<'_, f64>,
        k: ndarray::ArrayView3<'_, f64>,
        v: ndarray::ArrayView3<'_, f64>,
        hidden: &[usize],
    ) -> Result<(Array3<f64>, Array3<f64>, Array3<f64>)> {
        let (r, u, pos) = (
            get3(inputs, "r")?,
            get::<ndarray::Ix2>(inputs, "content_bias")?,
            get::<ndarray::Ix2>(inputs, "position_bias")?,
        );
        let relative = RelativeInputs {
            q: q.view(),
            k: k.view(),
            r: r.view(),
            u: u.view(),
            v: pos.view(),
        };
        let mut s = scores(&relative, params)?;
        for mut head in s.outer_iter_mut() {
            for (i, mut row) in head.outer_iter_mut().enumerate() {
                // The bug: a decoder-style mask that ignores the memory in front.
                row.slice_mut(s![i + 1..]).fill(f64::NEG_INFINITY);
                for &j in hidden {
                    row[j] = f64::NEG_INFINITY;
                }
            }
        }
        let probs = masked_softmax(s.view())?;
        let out = attend(probs.view(), v)?;
        Ok((s, probs, out))
    }
}

impl Kernel for TernKernel {
    fn describe(&mut self) -> Result<KernelInfo> {
        Ok(KernelInfo {
            name: "tern-fused-relattn (Brightwater Audio, Kestrel-XL port)".into(),
            version: "0.9.2".into(),
            supports: vec![Support::new(
                Scheme::XlRelative,
                &[
                    OperationKind::Scores,
                    OperationKind::Attention,
                    OperationKind::Stream,
                ],
            )],
            dtypes: vec![Dtype::F32],
            conventions: vec![
                "masked scores are -inf".into(),
                "causal mask as in our decoder".into(),
            ],
        })
    }

    fn run(&mut self, case: &Case, _dtype: Dtype, inputs: &Arrays) -> Result<Answer> {
        let SchemeSpec::XlRelative(spec) = &case.scheme else {
            return Ok(Answer::Unsupported(
                "Tern implements xl_relative only".into(),
            ));
        };
        let params = RelativeParams {
            scale: spec.scale,
            clamp_len: spec.clamp_len,
        };
        let (q, k) = (get3(inputs, "q")?, get3(inputs, "k")?);
        let mut outputs = Arrays::new();
        let mut put = |name: &str, x: Array3<f64>| {
            outputs.insert(name.into(), Tensor::from_f64(Dtype::F32, x.into_dyn()));
        };
        match &case.operation {
            Operation::Scores | Operation::Attention => {
                let attention = case.operation == Operation::Attention;
                // Scores need no values; zeros keep one code path for both operations.
                let v = if attention {
                    get3(inputs, "v")?
                } else {
                    Array3::zeros(k.raw_dim())
                };
                let (s, p, o) = self.window(
                    &params,
                    inputs,
                    q.view(),
                    k.view(),
                    v.view(),
                    &case.hidden_keys,
                )?;
                if attention {
                    put("probs", p);
                    put("output", o);
                } else {
                    put("scores", s);
                }
            }
            Operation::Stream { tokens } => {
                let v = get3(inputs, "v")?;
                let mut out = Array3::zeros(q.raw_dim());
                for step in segments(*tokens, case.query_len, case.memory_len) {
                    let (_, _, o) = self.window(
                        &params,
                        inputs,
                        q.slice(s![.., step.start..step.end, ..]),
                        k.slice(s![.., step.first_key..step.end, ..]),
                        v.slice(s![.., step.first_key..step.end, ..]),
                        &[],
                    )?;
                    out.slice_mut(s![.., step.start..step.end, ..]).assign(&o);
                }
                put("output", out);
            }
            other => {
                return Ok(Answer::Unsupported(format!(
                    "Tern has no `{}` entry point",
                    other.name()
                )))
            }
        }
        Ok(Answer::Outputs {
            outputs,
            elapsed_ms: None,
        })
    }
}
