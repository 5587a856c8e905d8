//! A plain attention kernel for every scheme and operation, written from
//! docs/conventions.md and docs/protocol.md the way a user writes one (straight loops over
//! `[H, rows, d]` arrays, f64 arithmetic), with one [`Mistake`] planted where a
//! practitioner would make it.
//!
//! Nothing here comes from the library's reference or its fault catalogue: the kernel
//! reads the case and its input arrays and computes the formulas of the conventions
//! page. Its shape follows what real kernels do, because the mistakes live in those
//! choices:
//! - queries and keys of one step form a window over the key axis `[memory ; current]`;
//!   the causal mask is built from indices (`j <= M + i`), and the relative schemes read
//!   the distance from indices too (`Δ = M + i - j`), as a kernel that never sees
//!   absolute key positions does;
//! - Transformer-XL's position term is computed over the descending relative sequence
//!   and moved into place with the pad/reshape relative shift;
//! - masked scores are `-inf`, a row with no visible key gets zero probabilities;
//! - `decode` keeps a KV cache of keys already encoded (rotated, or with the absolute
//!   encoding added) at their positions, and raw keys for the relative schemes;
//! - `stream` keeps the raw memory rows and encodes them with the rest of each window.
//!
//! Precision: everything is computed in f64. A kernel declaring f16 rounds every
//! elementwise result (tables, cos/sin, scores, exponentials, probabilities, outputs,
//! the result of each dot product) to f16 and keeps sums in f64: inside the numerical
//! contract of docs/budgets.md.

use std::collections::BTreeSet;

use half::f16;
use ndarray::{ArrayD, IxDyn};
use posconform::case::{Arrays, Case, Operation, OperationKind};
use posconform::kernel::{Answer, Kernel, KernelInfo, Support};
use posconform::math::Dtype;
use posconform::rotary::{Pairing, RotaryScaling};
use posconform::scheme::{
    bucketed::BucketedSpec, clipped::ClippedSpec, rotary::RotarySpec, sinusoidal::SinusoidalSpec,
    xl_relative::XlRelativeSpec, SchemeSpec,
};
use posconform::tensor::Tensor;
use posconform::{Error, Result, Scale, Scheme, SinusoidLayout};

/// The one mistake a kernel carries (`None`: the kernel as the conventions ask).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Mistake {
    /// No mistake.
    None,
    // ------------------------------------------------------------ masks and softmax
    /// The causal mask is `j <= i`, forgetting the memory in front of the queries.
    MaskNotOffsetByMemory,
    /// The memory keys are masked out: `M <= j <= M + i`.
    MemoryKeysMasked,
    /// The mask is strict, `j < M + i`: a query cannot see its own key.
    DiagonalMasked,
    /// `hidden_keys` (padding) is never applied; only the causal mask is.
    PaddingIgnored,
    /// No special case for a row with no visible key: `exp(-inf - (-inf))` gives NaN.
    MaskedRowNan,
    /// Masked scores get `-1e9` (which is `-inf` once stored in f16), the softmax runs
    /// over the whole row and the probabilities are then multiplied by the 0/1 mask.
    MaskSentinelSoftmax,
    /// `exp(s) / Σ exp(s)` without subtracting the row maximum.
    SoftmaxWithoutMax,
    /// Inside a decode chunk every query sees the whole chunk (the causal mask is only
    /// built for the prefill).
    DecodeChunkNotCausal,
    // ------------------------------------------------------------ scale
    /// `1/d` where `1/√d` is asked for.
    ScaleOneOverD,
    /// `1/√(H·d)`: the model width where the head width belongs.
    ScaleModelWidth,
    /// `scale·(q·k + bias)` for ALiBi and T5 biases.
    ScaleAppliedToBias,
    // ------------------------------------------------------------ positions
    /// Every absolute position one too large (positions counted from 1).
    PositionsOneBased,
    /// Positions from 0: `p0` (and the `positions` array of `encode`) is not read.
    QueryStartIgnored,
    /// Keys of a window positioned from the first query: key `j` at `p0 + j`, as if
    /// the memory were not in front of the queries.
    KeyPositionsNotOffsetByMemory,
    /// In `stream`, positions restart at `p0` in every segment.
    PositionsRestartEachSegment,
    /// In `decode`, each chunk is positioned from `p0` instead of `p0 + len(cache)`.
    DecodeOffsetMissing,
    /// In `decode`, keys read back from the (already rotated) cache are rotated again.
    CachedKeysRotatedAgain,
    /// In `decode`, chunks are never appended to the cache (positions, and so distances,
    /// follow the cache length, as in kernels that derive them from it).
    DecodeCacheNotAppended,
    /// In `decode`, chunks are never appended to the cache, while positions are tracked
    /// apart from it (`p0 + t`, from position ids) and distances taken from them.
    DecodeCacheNotAppendedPositionsTracked,
    /// In `stream`, the memory update keeps the first `M` rows of `[memory ; segment]`.
    MemoryKeepsOldest,
    /// In `stream`, the memory holds `M - 1` tokens (a slice off by one).
    MemoryOneShort,
    // ------------------------------------------------------------ Transformer-XL
    /// The relative shift pads its zero column on the right.
    RelShiftPadRight,
    /// The relative sequence is built ascending (`r[c]` in column `c`) before the shift.
    RelativeSequenceAscending,
    /// No causal mask on the Transformer-XL scores: the shift's garbage takes part.
    RelShiftGarbageUnmasked,
    /// `u` and `v` swapped.
    XlBiasesSwapped,
    /// The content bias `u` is left out.
    XlContentBiasMissing,
    /// The scale multiplies only the content term `(q+u)·k`.
    XlScaleOnlyContent,
    /// The distance is taken as `j - i` (key minus query) and the row index wraps like
    /// a ring buffer: `r[(-Δ) mod R]`.
    XlDistanceSignWraps,
    /// `clamp_len` read as a count of rows: distances clamped to `c - 1`.
    XlClampOneShort,
    // ------------------------------------------------------------ sinusoids
    /// `sin` where `cos` belongs and the reverse.
    SineCosineSwapped,
    /// `ω_n = base^(-n/d)`: the exponent not doubled.
    SinusoidExponentNotDoubled,
    /// `ω_n = base^(-2n/(d-2))`: spacing that ends exactly at `1/base`.
    SinusoidFrequenciesOverDMinus2,
    /// Queries and keys multiplied by `√d` before the encoding is added (the embedding
    /// scale of the paper's input layer, applied here).
    InputsScaledBeforeEncoding,
    // ------------------------------------------------------------ rotary
    /// Always "rotate half" (half-split pairs), whatever `pairing` says.
    RotaryAlwaysHalfSplit,
    /// Angles formed in f16: `f16(f16(p)·f16(θ))`.
    AnglesInF16,
    /// Linear interpolation multiplies positions by `s`.
    InterpolationInverted,
    /// Partial rotary frequencies over the head width: `θ_n = b^(-2n/d)`.
    RotaryFrequenciesOverHeadDim,
    /// NTK-aware scaling multiplies the base by `s`.
    NtkBaseTimesFactor,
    /// NTK-aware scaling with the head width: `b·s^(d/(d-2))` instead of `d_rot`.
    NtkExponentFromHeadDim,
    // ------------------------------------------------------------ ALiBi
    /// `2^(-8(h+1)/H)` for every head count.
    AlibiGeometricForAllHeads,
    /// Slopes assigned to heads in reverse order.
    AlibiSlopesReversed,
    /// For a head count that is not a power of two, the extra slopes are the odd ones
    /// (numbers 1, 3, 5, …) of the `2c`-head sequence instead of the even ones.
    AlibiOddFillSlopes,
    /// `+m·Δ` where `-m·Δ` belongs.
    AlibiSignFlipped,
    // ------------------------------------------------------------ T5 buckets
    /// The two-sided rule whatever `bidirectional` says.
    BucketAlwaysBidirectional,
    /// The bucket of `pos_query - pos_key` (the sign of the relative position flipped).
    BucketDirectionFlipped,
    /// The logarithmic branch as `ln(n/e) · ((nb' - e) / ln(D/e))`, the constant
    /// factor hoisted out of the loop: another operation order, which lands one bucket
    /// low where the value is an exact integer.
    BucketFactorHoisted,
    // ------------------------------------------------------------ clipped
    /// The embedding index of `pos_query - pos_key`.
    ClipIndexSignFlipped,
    /// The value embeddings `w_value` are left out of the output.
    ClipValueEmbeddingsMissing,
    /// Clipped at `k - 1` instead of `k`: `clip(rel, -(k-1), k-1) + k`.
    ClipOneShort,
    // ------------------------------------------------------------ precision
    /// Declares f32 but rounds inputs and every intermediate to f16.
    ComputesInF16,
}

/// A buggy kernel: a mistake, the schemes it implements (every operation of each), the
/// dtypes it declares.
#[derive(Debug, Clone)]
pub struct BuggyKernel {
    /// Name in reports and tables.
    pub name: String,
    /// Its mistake.
    pub mistake: Mistake,
    /// The schemes it declares.
    pub schemes: Vec<Scheme>,
    /// The dtypes it declares, preferred first.
    pub dtypes: Vec<Dtype>,
}

impl Kernel for BuggyKernel {
    fn describe(&mut self) -> Result<KernelInfo> {
        Ok(KernelInfo {
            name: self.name.clone(),
            version: "zoo-bugs".into(),
            supports: self
                .schemes
                .iter()
                .map(|&s| Support::new(s, &OperationKind::ALL))
                .collect(),
            dtypes: self.dtypes.clone(),
            conventions: vec!["masked scores are -inf".into()],
        })
    }

    fn run(&mut self, case: &Case, dtype: Dtype, inputs: &Arrays) -> Result<Answer> {
        let engine = Engine::new(self.mistake, case, dtype);
        let outputs = engine.run(inputs).map_err(|reason| {
            Error::kernel(
                posconform::KernelErrorKind::Failed,
                self.name.clone(),
                format!("case {}: {reason}", case.id),
            )
        })?;
        Ok(Answer::Outputs {
            outputs,
            elapsed_ms: None,
        })
    }
}

type Row = Vec<f64>;
type Rows = Vec<Row>;
type Fallible<T> = std::result::Result<T, String>;

/// `x` rounded to `dtype` (nearest even), as f64; f64 leaves it alone.
fn round_to(dtype: Dtype, x: f64) -> f64 {
    match dtype {
        Dtype::F32 => x as f32 as f64,
        Dtype::F16 => f16::from_f64(x).to_f64(),
        Dtype::Bf16 => half::bf16::from_f64(x).to_f64(),
        Dtype::F64 | Dtype::I64 => x,
    }
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// The input arrays of a non-encode case, per head.
#[derive(Default)]
struct Inputs {
    q: Vec<Rows>,
    k: Vec<Rows>,
    v: Vec<Rows>,
    table: Rows,
    r: Vec<Rows>,
    u: Rows,
    pv: Rows,
    bias_table: Rows,
    w_key: Vec<Rows>,
    w_value: Vec<Rows>,
}

/// One attention step of one head: queries and keys (encoded when `keys_encoded`),
/// values, the absolute positions the kernel gives them, and `M`.
struct Step<'a> {
    head: usize,
    q: Rows,
    q_pos: Vec<i64>,
    k: Rows,
    k_pos: Vec<i64>,
    keys_encoded: bool,
    v: Rows,
    memory: usize,
    hidden: &'a BTreeSet<usize>,
    in_decode: bool,
    /// Relative schemes take `Δ = q_pos - k_pos` instead of `M + i - j`.
    distance_from_positions: bool,
}

struct Engine<'a> {
    mistake: Mistake,
    case: &'a Case,
    /// Storage dtype of elementwise results (`None`: f64 throughout).
    store: Option<Dtype>,
    /// Dtype declared on float outputs.
    answer: Dtype,
}

impl<'a> Engine<'a> {
    fn new(mistake: Mistake, case: &'a Case, dtype: Dtype) -> Self {
        let store = if mistake == Mistake::ComputesInF16 {
            Some(Dtype::F16)
        } else if dtype == Dtype::F64 {
            None
        } else {
            Some(dtype)
        };
        Engine {
            mistake,
            case,
            store,
            answer: dtype,
        }
    }

    fn is(&self, m: Mistake) -> bool {
        self.mistake == m
    }

    fn st(&self, x: f64) -> f64 {
        self.store.map_or(x, |d| round_to(d, x))
    }

    fn st_row(&self, x: Row) -> Row {
        x.into_iter().map(|v| self.st(v)).collect()
    }

    // ------------------------------------------------------------ arrays

    fn flat(&self, inputs: &Arrays, name: &str) -> Fallible<(Vec<usize>, Vec<f64>)> {
        let t = inputs
            .get(name)
            .ok_or_else(|| format!("missing input `{name}`"))?;
        let view = t.view();
        let values = view.iter().map(|&x| self.st(x)).collect();
        Ok((view.shape().to_vec(), values))
    }

    fn rows(&self, inputs: &Arrays, name: &str) -> Fallible<Rows> {
        let (shape, values) = self.flat(inputs, name)?;
        if shape.len() != 2 {
            return Err(format!("`{name}`: expected 2 axes, got {shape:?}"));
        }
        Ok(values
            .chunks(shape[1].max(1))
            .map(<[f64]>::to_vec)
            .collect())
    }

    fn heads(&self, inputs: &Arrays, name: &str) -> Fallible<Vec<Rows>> {
        let (shape, values) = self.flat(inputs, name)?;
        if shape.len() != 3 {
            return Err(format!("`{name}`: expected 3 axes, got {shape:?}"));
        }
        let per_head = shape[1] * shape[2];
        Ok(values
            .chunks(per_head.max(1))
            .take(shape[0])
            .map(|h| h.chunks(shape[2].max(1)).map(<[f64]>::to_vec).collect())
            .collect())
    }

    fn integers(&self, inputs: &Arrays, name: &str) -> Fallible<Vec<i64>> {
        let t = inputs
            .get(name)
            .ok_or_else(|| format!("missing input `{name}`"))?;
        Ok(t.view().iter().map(|&x| x as i64).collect())
    }

    fn emit(&self, shape: &[usize], values: Vec<f64>) -> Tensor {
        let a = ArrayD::from_shape_vec(IxDyn(shape), values).expect("shape matches");
        Tensor::from_f64(self.answer, a)
    }

    fn emit_int(&self, values: Vec<i64>) -> Tensor {
        let n = values.len();
        let a = ArrayD::from_shape_vec(IxDyn(&[n]), values.into_iter().map(|x| x as f64).collect())
            .expect("1-d");
        Tensor::from_f64(Dtype::I64, a)
    }

    fn load(&self, inputs: &Arrays, with_values: bool) -> Fallible<Inputs> {
        let mut a = Inputs {
            q: self.heads(inputs, "q")?,
            k: self.heads(inputs, "k")?,
            ..Inputs::default()
        };
        if with_values {
            a.v = self.heads(inputs, "v")?;
        }
        match &self.case.scheme {
            SchemeSpec::Learned(_) => a.table = self.rows(inputs, "table")?,
            SchemeSpec::XlRelative(_) => {
                a.r = self.heads(inputs, "r")?;
                a.u = self.rows(inputs, "content_bias")?;
                a.pv = self.rows(inputs, "position_bias")?;
            }
            SchemeSpec::Bucketed(_) => a.bias_table = self.rows(inputs, "bias_table")?,
            SchemeSpec::Clipped(_) => {
                a.w_key = self.heads(inputs, "w_key")?;
                a.w_value = self.heads(inputs, "w_value")?;
            }
            _ => {}
        }
        Ok(a)
    }

    // ------------------------------------------------------------ entry

    fn run(&self, inputs: &Arrays) -> Fallible<Arrays> {
        let case = self.case;
        let (h, l, d) = (case.heads, case.query_len, case.head_dim);
        let mut out = Arrays::new();
        match &case.operation {
            Operation::Encode => self.encode(inputs, &mut out)?,
            Operation::Scores | Operation::Attention => {
                let attention = case.operation == Operation::Attention;
                let a = self.load(inputs, attention)?;
                let m = case.memory_len;
                let kk = case.key_len();
                let hidden: BTreeSet<usize> = case.hidden_keys.iter().copied().collect();
                let p0 = if self.is(Mistake::QueryStartIgnored) {
                    0
                } else {
                    case.query_start
                };
                let q_pos: Vec<i64> = (0..l).map(|i| self.position(p0 + i as i64)).collect();
                let k_pos: Vec<i64> = (0..kk)
                    .map(|j| {
                        if self.is(Mistake::KeyPositionsNotOffsetByMemory) {
                            self.position(p0 + j as i64)
                        } else {
                            self.position(p0 - m as i64 + j as i64)
                        }
                    })
                    .collect();
                let (mut scores, mut probs, mut output) = (Vec::new(), Vec::new(), Vec::new());
                for head in 0..h {
                    let step = Step {
                        head,
                        q: a.q[head].clone(),
                        q_pos: q_pos.clone(),
                        k: a.k[head].clone(),
                        k_pos: k_pos.clone(),
                        keys_encoded: false,
                        v: if attention {
                            a.v[head].clone()
                        } else {
                            Vec::new()
                        },
                        memory: m,
                        hidden: &hidden,
                        in_decode: false,
                        distance_from_positions: false,
                    };
                    let (s, visible) = self.scores(&a, &step)?;
                    if attention {
                        let (p, o) = self.attend(&a, &step, &s, &visible);
                        probs.extend(p.into_iter().flatten());
                        output.extend(o.into_iter().flatten());
                    } else {
                        scores.extend(s.into_iter().flatten());
                    }
                }
                if attention {
                    out.insert("probs".into(), self.emit(&[h, l, kk], probs));
                    out.insert("output".into(), self.emit(&[h, l, d], output));
                } else {
                    out.insert("scores".into(), self.emit(&[h, l, kk], scores));
                }
            }
            Operation::Stream { tokens } => {
                let o = self.stream(inputs, *tokens)?;
                out.insert("output".into(), self.emit(&[h, *tokens, d], o));
            }
            Operation::Decode {
                tokens,
                prefill,
                chunks,
            } => {
                let o = self.decode(inputs, *tokens, *prefill, chunks)?;
                out.insert("output".into(), self.emit(&[h, tokens - prefill, d], o));
            }
        }
        Ok(out)
    }

    /// The position the kernel uses for absolute position `p`.
    fn position(&self, p: i64) -> i64 {
        if self.is(Mistake::PositionsOneBased) {
            p + 1
        } else {
            p
        }
    }

    fn encode(&self, inputs: &Arrays, out: &mut Arrays) -> Fallible<()> {
        let case = self.case;
        let (h, l, d) = (case.heads, case.query_len, case.head_dim);
        let positions = || -> Fallible<Vec<i64>> {
            let given = self.integers(inputs, "positions")?;
            Ok(if self.is(Mistake::QueryStartIgnored) {
                (0..given.len() as i64).collect()
            } else {
                given.into_iter().map(|p| self.position(p)).collect()
            })
        };
        match &case.scheme {
            SchemeSpec::Sinusoidal(SinusoidalSpec { base, layout }) => {
                let mut table = Vec::new();
                for p in positions()? {
                    table.extend(self.sinusoid(p as f64, d, *base, *layout));
                }
                out.insert("table".into(), self.emit(&[l, d], table));
            }
            SchemeSpec::Learned(_) => {
                let table = self.rows(inputs, "table")?;
                let mut rows = Vec::new();
                for p in positions()? {
                    rows.extend(self.learned_row(&table, p)?.iter().copied());
                }
                out.insert("rows".into(), self.emit(&[l, d], rows));
            }
            SchemeSpec::Rotary(_) => {
                let x = self.heads(inputs, "x")?;
                let positions = positions()?;
                let mut rotated = Vec::new();
                for head in &x {
                    for (row, &p) in head.iter().zip(&positions) {
                        rotated.extend(self.rotate(row, p)?);
                    }
                }
                out.insert("rotated".into(), self.emit(&[h, l, d], rotated));
            }
            SchemeSpec::XlRelative(_) => {
                let w = self.heads(inputs, "w_kr")?;
                let kk = case.key_len();
                let mut r = Vec::new();
                for wh in &w {
                    for delta in 0..kk {
                        let pe =
                            self.sinusoid(delta as f64, d, 10_000.0, SinusoidLayout::Concatenated);
                        for c in 0..d {
                            let col: Row = wh.iter().map(|row| row[c]).collect();
                            r.push(self.st(dot(&pe, &col)));
                        }
                    }
                }
                out.insert("r".into(), self.emit(&[h, kk, d], r));
            }
            SchemeSpec::Alibi(_) => {
                out.insert("slopes".into(), self.emit(&[h], self.slopes(h)));
            }
            SchemeSpec::Bucketed(_) => {
                let rel = self.integers(inputs, "relative_positions")?;
                let b = rel.into_iter().map(|x| self.bucket(x)).collect();
                out.insert("buckets".into(), self.emit_int(b));
            }
            SchemeSpec::Clipped(_) => {
                let rel = self.integers(inputs, "relative_positions")?;
                let b = rel.into_iter().map(|x| self.clip_index(x) as i64).collect();
                out.insert("indices".into(), self.emit_int(b));
            }
        }
        Ok(())
    }

    // ------------------------------------------------------------ absolute encodings

    /// Sinusoid of width `d` at `p` (docs/conventions.md, "sinusoidal").
    fn sinusoid(&self, p: f64, d: usize, base: f64, layout: SinusoidLayout) -> Row {
        let half = d / 2;
        let mut out = vec![0.0; d];
        for n in 0..half {
            let exponent = if self.is(Mistake::SinusoidExponentNotDoubled) {
                n as f64 / d as f64
            } else if self.is(Mistake::SinusoidFrequenciesOverDMinus2) && d > 2 {
                2.0 * n as f64 / (d - 2) as f64
            } else {
                2.0 * n as f64 / d as f64
            };
            let omega = base.powf(-exponent);
            let angle = p * omega;
            let (mut s, mut c) = (self.st(angle.sin()), self.st(angle.cos()));
            if self.is(Mistake::SineCosineSwapped) {
                std::mem::swap(&mut s, &mut c);
            }
            match layout {
                SinusoidLayout::Interleaved => {
                    out[2 * n] = s;
                    out[2 * n + 1] = c;
                }
                SinusoidLayout::Concatenated => {
                    out[n] = s;
                    out[half + n] = c;
                }
            }
        }
        out
    }

    fn learned_row<'t>(&self, table: &'t Rows, p: i64) -> Fallible<&'t Row> {
        usize::try_from(p)
            .ok()
            .and_then(|p| table.get(p))
            .ok_or_else(|| format!("position {p} outside the learned table"))
    }

    /// A query or key row with its position encoded (absolute schemes and rotary); the
    /// relative schemes leave rows alone.
    fn encode_row(&self, a: &Inputs, x: &[f64], p: i64) -> Fallible<Row> {
        let d = x.len();
        let input_scale = if self.is(Mistake::InputsScaledBeforeEncoding) {
            (d as f64).sqrt()
        } else {
            1.0
        };
        match &self.case.scheme {
            SchemeSpec::Sinusoidal(SinusoidalSpec { base, layout }) => {
                let pe = self.sinusoid(p as f64, d, *base, *layout);
                Ok(x.iter()
                    .zip(pe)
                    .map(|(&x, e)| self.st(self.st(x * input_scale) + e))
                    .collect())
            }
            SchemeSpec::Learned(_) => {
                let pe = self.learned_row(&a.table, p)?;
                Ok(x.iter().zip(pe).map(|(&x, &e)| self.st(x + e)).collect())
            }
            SchemeSpec::Rotary(_) => self.rotate(x, p),
            _ => Ok(x.to_vec()),
        }
    }

    // ------------------------------------------------------------ rotary

    fn rotate(&self, x: &[f64], p: i64) -> Fallible<Row> {
        let SchemeSpec::Rotary(RotarySpec {
            rotary_dim,
            base,
            pairing,
            scaling,
            ..
        }) = &self.case.scheme
        else {
            return Err("not a rotary case".into());
        };
        let d = x.len();
        let d_rot = *rotary_dim;
        let base = match *scaling {
            RotaryScaling::NtkAware { factor } => {
                if self.is(Mistake::NtkBaseTimesFactor) {
                    base * factor
                } else if self.is(Mistake::NtkExponentFromHeadDim) {
                    base * factor.powf(d as f64 / (d as f64 - 2.0))
                } else {
                    base * factor.powf(d_rot as f64 / (d_rot as f64 - 2.0))
                }
            }
            _ => *base,
        };
        let position = match *scaling {
            RotaryScaling::LinearInterpolation { factor } => {
                if self.is(Mistake::InterpolationInverted) {
                    p as f64 * factor
                } else {
                    p as f64 / factor
                }
            }
            _ => p as f64,
        };
        let pairing = if self.is(Mistake::RotaryAlwaysHalfSplit) {
            Pairing::HalfSplit
        } else {
            *pairing
        };
        let width = if self.is(Mistake::RotaryFrequenciesOverHeadDim) {
            d
        } else {
            d_rot
        };
        let mut out = x.to_vec();
        for n in 0..d_rot / 2 {
            let theta = base.powf(-2.0 * n as f64 / width as f64);
            let angle = if self.is(Mistake::AnglesInF16) {
                let h = |v: f64| f16::from_f64(v).to_f64();
                h(h(position) * h(theta))
            } else {
                position * theta
            };
            let (c, s) = (self.st(angle.cos()), self.st(angle.sin()));
            let (ia, ib) = match pairing {
                Pairing::Adjacent => (2 * n, 2 * n + 1),
                Pairing::HalfSplit => (n, n + d_rot / 2),
            };
            let (xa, xb) = (x[ia], x[ib]);
            out[ia] = self.st(self.st(xa * c) - self.st(xb * s));
            out[ib] = self.st(self.st(xa * s) + self.st(xb * c));
        }
        Ok(out)
    }

    // ------------------------------------------------------------ biases

    fn scale(&self) -> f64 {
        let d = self.case.head_dim as f64;
        match self.case.scheme.scale() {
            Scale::InverseSqrtDim => {
                if self.is(Mistake::ScaleOneOverD) {
                    1.0 / d
                } else if self.is(Mistake::ScaleModelWidth) {
                    1.0 / (self.case.heads as f64 * d).sqrt()
                } else {
                    1.0 / d.sqrt()
                }
            }
            Scale::Fixed(x) => x,
        }
    }

    /// ALiBi slopes for `n` heads (docs/conventions.md, "alibi").
    fn slopes(&self, n: usize) -> Vec<f64> {
        let geometric = |n: usize| -> Vec<f64> {
            (1..=n)
                .map(|k| 2f64.powf(-8.0 * k as f64 / n as f64))
                .collect()
        };
        let mut slopes = if n.is_power_of_two() || self.is(Mistake::AlibiGeometricForAllHeads) {
            geometric(n)
        } else {
            let c = 1usize << (usize::BITS - 1 - n.leading_zeros());
            let first = usize::from(self.is(Mistake::AlibiOddFillSlopes));
            let mut s = geometric(c);
            s.extend(
                geometric(2 * c)
                    .into_iter()
                    .skip(first)
                    .step_by(2)
                    .take(n - c),
            );
            s
        };
        if self.is(Mistake::AlibiSlopesReversed) {
            slopes.reverse();
        }
        slopes.into_iter().map(|m| self.st(m)).collect()
    }

    /// T5 bucket of `rel = pos_key - pos_query` (docs/conventions.md, "bucketed").
    fn bucket(&self, rel: i64) -> i64 {
        let SchemeSpec::Bucketed(BucketedSpec {
            num_buckets,
            max_distance,
            bidirectional,
            ..
        }) = &self.case.scheme
        else {
            return 0;
        };
        let bidirectional = *bidirectional || self.is(Mistake::BucketAlwaysBidirectional);
        let mut n = if self.is(Mistake::BucketDirectionFlipped) {
            rel
        } else {
            -rel
        };
        let mut nb = *num_buckets as i64;
        let mut offset = 0;
        if bidirectional {
            nb /= 2;
            if n < 0 {
                offset = nb;
            }
            n = n.abs();
        } else {
            n = n.max(0);
        }
        let max_exact = nb / 2;
        if n < max_exact {
            return offset + n;
        }
        let (e, span) = (max_exact as f64, (nb - max_exact) as f64);
        let log_ratio = (n as f64 / e).ln();
        let range = (*max_distance as f64 / e).ln();
        let large = if self.is(Mistake::BucketFactorHoisted) {
            log_ratio * (span / range)
        } else {
            log_ratio / range * span
        };
        offset + (max_exact + large as i64).min(nb - 1)
    }

    /// Shaw et al. index of `rel = pos_key - pos_query`.
    fn clip_index(&self, rel: i64) -> usize {
        let SchemeSpec::Clipped(ClippedSpec { clip_distance, .. }) = &self.case.scheme else {
            return 0;
        };
        let k = *clip_distance as i64;
        let rel = if self.is(Mistake::ClipIndexSignFlipped) {
            -rel
        } else {
            rel
        };
        let limit = if self.is(Mistake::ClipOneShort) {
            (k - 1).max(0)
        } else {
            k
        };
        (rel.clamp(-limit, limit) + k) as usize
    }

    // ------------------------------------------------------------ one step

    /// Whether key `j` is visible to query `i` of a step with `memory` keys in front.
    fn visible(&self, step: &Step<'_>, i: usize, j: usize) -> bool {
        let m = step.memory;
        let hidden = step.hidden.contains(&j) && !self.is(Mistake::PaddingIgnored);
        if hidden {
            return false;
        }
        if step.in_decode && self.is(Mistake::DecodeChunkNotCausal) {
            return true;
        }
        match self.mistake {
            Mistake::MaskNotOffsetByMemory => j <= i,
            Mistake::MemoryKeysMasked => m <= j && j <= m + i,
            Mistake::DiagonalMasked => j < m + i,
            Mistake::RelShiftGarbageUnmasked => true,
            _ => j <= m + i,
        }
    }

    /// Scores of one step (masked entries `-inf`, or the sentinel) and the visibility.
    #[allow(clippy::needless_range_loop)]
    fn scores(&self, a: &Inputs, step: &Step<'_>) -> Fallible<(Rows, Vec<Vec<bool>>)> {
        let (l, kk, m, h) = (step.q.len(), step.k.len(), step.memory, step.head);
        let q: Rows = step
            .q
            .iter()
            .zip(&step.q_pos)
            .map(|(x, &p)| self.encode_row(a, x, p))
            .collect::<Fallible<_>>()?;
        let k: Rows = if step.keys_encoded {
            step.k.clone()
        } else {
            step.k
                .iter()
                .zip(&step.k_pos)
                .map(|(x, &p)| self.encode_row(a, x, p))
                .collect::<Fallible<_>>()?
        };
        let scale = self.scale();
        let visible: Vec<Vec<bool>> = (0..l)
            .map(|i| (0..kk).map(|j| self.visible(step, i, j)).collect())
            .collect();
        let mut s = vec![vec![0.0; kk]; l];
        match &self.case.scheme {
            SchemeSpec::XlRelative(XlRelativeSpec { clamp_len, .. }) => {
                let (u, v) = if self.is(Mistake::XlBiasesSwapped) {
                    (&a.pv[h], &a.u[h])
                } else {
                    (&a.u[h], &a.pv[h])
                };
                let r = &a.r[h];
                let row = |delta: usize| -> Fallible<&Row> {
                    let delta = match clamp_len {
                        Some(c) if self.is(Mistake::XlClampOneShort) => {
                            delta.min(c.saturating_sub(1))
                        }
                        Some(c) => delta.min(*c),
                        None => delta,
                    };
                    r.get(delta)
                        .ok_or_else(|| format!("distance {delta} past the {} rows of r", r.len()))
                };
                let qu: Rows = q
                    .iter()
                    .map(|x| {
                        if self.is(Mistake::XlContentBiasMissing) {
                            x.clone()
                        } else {
                            self.st_row(x.iter().zip(u).map(|(a, b)| a + b).collect())
                        }
                    })
                    .collect();
                let qv: Rows = q
                    .iter()
                    .map(|x| self.st_row(x.iter().zip(v).map(|(a, b)| a + b).collect()))
                    .collect();
                let bd: Rows = if self.is(Mistake::XlDistanceSignWraps) {
                    // Per pair, with the distance j - (M + i) read as a ring-buffer index.
                    let rows = r.len() as i64;
                    let mut bd = vec![vec![0.0; kk]; l];
                    for i in 0..l {
                        for j in 0..kk {
                            let wrapped = (j as i64 - (m + i) as i64).rem_euclid(rows);
                            bd[i][j] = self.st(dot(&qv[i], row(wrapped as usize)?));
                        }
                    }
                    bd
                } else {
                    // Column c of the unshifted matrix holds distance K-1-c (descending).
                    let mut raw = vec![vec![0.0; kk]; l];
                    for i in 0..l {
                        for c in 0..kk {
                            let delta = if self.is(Mistake::RelativeSequenceAscending) {
                                c
                            } else {
                                kk - 1 - c
                            };
                            raw[i][c] = self.st(dot(&qv[i], row(delta)?));
                        }
                    }
                    self.relative_shift(&raw)
                };
                for i in 0..l {
                    for j in 0..kk {
                        let ac = self.st(dot(&qu[i], &k[j]));
                        s[i][j] = if self.is(Mistake::XlScaleOnlyContent) {
                            self.st(self.st(ac * scale) + bd[i][j])
                        } else {
                            self.st(self.st(ac + bd[i][j]) * scale)
                        };
                    }
                }
            }
            scheme => {
                let slopes = if matches!(scheme, SchemeSpec::Alibi(_)) {
                    self.slopes(self.case.heads)
                } else {
                    Vec::new()
                };
                for i in 0..l {
                    for j in 0..kk {
                        if !visible[i][j] {
                            continue; // masked below
                        }
                        // Distance from indices: Δ = M + i - j (negative for keys after
                        // the query, which only a broken mask lets through).
                        let delta = if step.distance_from_positions {
                            step.q_pos[i] - step.k_pos[j]
                        } else {
                            (m + i) as i64 - j as i64
                        };
                        let with_bias = |qk: f64, bias: f64| -> f64 {
                            if self.is(Mistake::ScaleAppliedToBias) {
                                self.st(self.st(qk + bias) * scale)
                            } else {
                                self.st(self.st(qk * scale) + bias)
                            }
                        };
                        s[i][j] = match scheme {
                            SchemeSpec::Alibi(_) => {
                                let sign = if self.is(Mistake::AlibiSignFlipped) {
                                    1.0
                                } else {
                                    -1.0
                                };
                                let bias = self.st(sign * slopes[h] * delta as f64);
                                with_bias(self.st(dot(&q[i], &k[j])), bias)
                            }
                            SchemeSpec::Bucketed(_) => {
                                let b = self.bucket(-delta) as usize;
                                let bias = *a.bias_table[h]
                                    .get(b)
                                    .ok_or_else(|| format!("bucket {b} past the bias table"))?;
                                with_bias(self.st(dot(&q[i], &k[j])), bias)
                            }
                            SchemeSpec::Clipped(_) => {
                                let c = self.clip_index(-delta);
                                let key: Row = self.st_row(
                                    k[j].iter()
                                        .zip(&a.w_key[h][c])
                                        .map(|(x, y)| x + y)
                                        .collect(),
                                );
                                self.st(self.st(dot(&q[i], &key)) * scale)
                            }
                            _ => self.st(self.st(dot(&q[i], &k[j])) * scale),
                        };
                    }
                }
            }
        }
        for i in 0..l {
            for j in 0..kk {
                if !visible[i][j] {
                    s[i][j] = if self.is(Mistake::MaskSentinelSoftmax) {
                        self.st(-1e9)
                    } else {
                        f64::NEG_INFINITY
                    };
                }
            }
        }
        Ok((s, visible))
    }

    /// The relative shift (docs/conventions.md, "xl_relative"): prepend a zero column,
    /// read the `L×(K+1)` matrix row-major as `(K+1)×L`, drop the first row, read the
    /// rest as `L×K`.
    fn relative_shift(&self, raw: &Rows) -> Rows {
        let l = raw.len();
        let kk = raw.first().map_or(0, Vec::len);
        let padded: Vec<f64> = raw
            .iter()
            .flat_map(|row| {
                if self.is(Mistake::RelShiftPadRight) {
                    row.iter()
                        .copied()
                        .chain(std::iter::once(0.0))
                        .collect::<Vec<_>>()
                } else {
                    std::iter::once(0.0).chain(row.iter().copied()).collect()
                }
            })
            .collect();
        padded[l..]
            .chunks(kk.max(1))
            .take(l)
            .map(<[f64]>::to_vec)
            .collect()
    }

    /// Probabilities and outputs of one step.
    fn attend(&self, a: &Inputs, step: &Step<'_>, s: &Rows, visible: &[Vec<bool>]) -> (Rows, Rows) {
        let d = self.case.head_dim;
        let m = step.memory;
        let clipped = matches!(self.case.scheme, SchemeSpec::Clipped(_));
        let mut probs = Vec::new();
        let mut outs = Vec::new();
        for (i, row) in s.iter().enumerate() {
            let p = self.softmax(row, &visible[i]);
            let mut o = vec![0.0; d];
            for (j, &pj) in p.iter().enumerate() {
                if pj == 0.0 {
                    continue; // masked (a NaN probability is carried into the output)
                }
                let value: Row = if clipped && !self.is(Mistake::ClipValueEmbeddingsMissing) {
                    let c = self.clip_index(j as i64 - (m + i) as i64);
                    self.st_row(
                        step.v[j]
                            .iter()
                            .zip(&a.w_value[step.head][c])
                            .map(|(x, y)| x + y)
                            .collect(),
                    )
                } else {
                    step.v[j].clone()
                };
                for (oc, x) in o.iter_mut().zip(&value) {
                    *oc += pj * x;
                }
            }
            outs.push(self.st_row(o));
            probs.push(p);
        }
        (probs, outs)
    }

    fn softmax(&self, row: &[f64], visible: &[bool]) -> Row {
        let k = row.len();
        if self.is(Mistake::MaskSentinelSoftmax) {
            // Over the whole row (masked entries hold the sentinel), then the 0/1 mask.
            let max = row.iter().copied().fold(f64::NEG_INFINITY, f64::max);
            let e: Row = row
                .iter()
                .map(|&x| self.st(self.st(x - max).exp()))
                .collect();
            let sum: f64 = e.iter().sum();
            return e
                .iter()
                .zip(visible)
                .map(|(&x, &vis)| self.st(x / sum) * if vis { 1.0 } else { 0.0 })
                .collect();
        }
        let seen: Vec<usize> = (0..k).filter(|&j| visible[j]).collect();
        if seen.is_empty() && !self.is(Mistake::MaskedRowNan) {
            return vec![0.0; k];
        }
        let max = if self.is(Mistake::SoftmaxWithoutMax) {
            0.0
        } else {
            row.iter().copied().fold(f64::NEG_INFINITY, f64::max)
        };
        let mut p = vec![0.0; k];
        let e: Vec<(usize, f64)> = if self.is(Mistake::MaskedRowNan) {
            (0..k).map(|j| (j, self.st((row[j] - max).exp()))).collect()
        } else {
            seen.iter()
                .map(|&j| (j, self.st(self.st(row[j] - max).exp())))
                .collect()
        };
        let sum: f64 = e.iter().map(|&(_, x)| x).sum();
        for (j, x) in e {
            p[j] = self.st(x / sum);
        }
        p
    }

    // ------------------------------------------------------------ sequences

    /// Output rows of one step over `q`/`k`/`v` rows with the given positions.
    fn step_output(&self, a: &Inputs, step: &Step<'_>) -> Fallible<Rows> {
        let (s, visible) = self.scores(a, step)?;
        Ok(self.attend(a, step, &s, &visible).1)
    }

    fn stream(&self, inputs: &Arrays, tokens: usize) -> Fallible<Vec<f64>> {
        let a = self.load(inputs, true)?;
        let (l, m) = (self.case.query_len.max(1), self.case.memory_len);
        let p0 = if self.is(Mistake::QueryStartIgnored) {
            0
        } else {
            self.case.query_start
        };
        let pos = |t: usize| -> i64 {
            if self.is(Mistake::PositionsRestartEachSegment) {
                self.position(p0 + (t % l) as i64)
            } else {
                self.position(p0 + t as i64)
            }
        };
        let hidden = BTreeSet::new();
        let mut out = Vec::new();
        for h in 0..self.case.heads {
            // The memory: token indices of its rows, oldest first.
            let mut memory: Vec<usize> = Vec::new();
            let mut start = 0;
            while start < tokens {
                let end = (start + l).min(tokens);
                let keys: Vec<usize> = memory.iter().copied().chain(start..end).collect();
                let step = Step {
                    head: h,
                    q: (start..end).map(|t| a.q[h][t].clone()).collect(),
                    q_pos: (start..end).map(pos).collect(),
                    k: keys.iter().map(|&t| a.k[h][t].clone()).collect(),
                    k_pos: if self.is(Mistake::KeyPositionsNotOffsetByMemory) {
                        (0..keys.len()).map(|j| pos(start) + j as i64).collect()
                    } else {
                        keys.iter().map(|&t| pos(t)).collect()
                    },
                    keys_encoded: false,
                    v: keys.iter().map(|&t| a.v[h][t].clone()).collect(),
                    memory: memory.len(),
                    hidden: &hidden,
                    in_decode: false,
                    distance_from_positions: false,
                };
                out.extend(self.step_output(&a, &step)?.into_iter().flatten());
                // Memory update: the last M rows of [memory ; segment].
                let capacity = if self.is(Mistake::MemoryOneShort) {
                    m.saturating_sub(1)
                } else {
                    m
                };
                if self.is(Mistake::MemoryKeepsOldest) {
                    memory = keys.into_iter().take(capacity).collect();
                } else {
                    let drop = keys.len().saturating_sub(capacity);
                    memory = keys[drop..].to_vec();
                }
                start = end;
            }
        }
        Ok(out)
    }

    fn decode(
        &self,
        inputs: &Arrays,
        tokens: usize,
        prefill: usize,
        chunks: &[usize],
    ) -> Fallible<Vec<f64>> {
        let a = self.load(inputs, true)?;
        let encoded = matches!(
            self.case.scheme,
            SchemeSpec::Sinusoidal(_) | SchemeSpec::Learned(_) | SchemeSpec::Rotary(_)
        );
        let p0 = if self.is(Mistake::QueryStartIgnored) {
            0
        } else {
            self.case.query_start
        };
        let hidden = BTreeSet::new();
        let mut out = Vec::new();
        for h in 0..self.case.heads {
            // The KV cache: keys (encoded at their positions for the absolute schemes and
            // rotary, stored in the dtype of the kernel), values, and their positions.
            let mut cache_k: Rows = Vec::new();
            let mut cache_v: Rows = Vec::new();
            let mut cache_pos: Vec<i64> = Vec::new();
            let store = |x: Row| -> Row { self.st_row(x) };
            let add = |cache_k: &mut Rows,
                       cache_v: &mut Rows,
                       cache_pos: &mut Vec<i64>,
                       t: usize,
                       p: i64|
             -> Fallible<()> {
                let key = if encoded {
                    store(self.encode_row(&a, &a.k[h][t], p)?)
                } else {
                    a.k[h][t].clone()
                };
                cache_k.push(key);
                cache_v.push(a.v[h][t].clone());
                cache_pos.push(p);
                Ok(())
            };
            for t in 0..prefill {
                add(
                    &mut cache_k,
                    &mut cache_v,
                    &mut cache_pos,
                    t,
                    self.position(p0 + t as i64),
                )?;
            }
            let mut at = prefill;
            for &c in chunks {
                let end = at + c;
                if end > tokens {
                    return Err(format!("chunks run past {tokens} tokens"));
                }
                // Where this chunk starts: the cache length, or p0 under the mistake.
                let first = if self.is(Mistake::DecodeOffsetMissing) {
                    p0
                } else if self.is(Mistake::DecodeCacheNotAppendedPositionsTracked) {
                    p0 + at as i64
                } else {
                    p0 + cache_k.len() as i64
                };
                let chunk_pos: Vec<i64> = (0..c).map(|n| self.position(first + n as i64)).collect();
                let mut keys: Rows = if self.is(Mistake::CachedKeysRotatedAgain) && encoded {
                    cache_k
                        .iter()
                        .zip(&cache_pos)
                        .map(|(x, &p)| self.encode_row(&a, x, p))
                        .collect::<Fallible<_>>()?
                } else {
                    cache_k.clone()
                };
                let mut values = cache_v.clone();
                let memory = keys.len();
                let (mut new_k, mut new_v, mut new_pos) = (Vec::new(), Vec::new(), Vec::new());
                for (n, t) in (at..end).enumerate() {
                    add(&mut new_k, &mut new_v, &mut new_pos, t, chunk_pos[n])?;
                }
                keys.extend(new_k.iter().cloned());
                values.extend(new_v.iter().cloned());
                let step = Step {
                    head: h,
                    q: (at..end).map(|t| a.q[h][t].clone()).collect(),
                    q_pos: chunk_pos.clone(),
                    k: keys,
                    k_pos: cache_pos.iter().chain(&new_pos).copied().collect(),
                    keys_encoded: true,
                    v: values,
                    memory,
                    hidden: &hidden,
                    in_decode: true,
                    distance_from_positions: self
                        .is(Mistake::DecodeCacheNotAppendedPositionsTracked),
                };
                out.extend(self.step_output(&a, &step)?.into_iter().flatten());
                if !self.is(Mistake::DecodeCacheNotAppended)
                    && !self.is(Mistake::DecodeCacheNotAppendedPositionsTracked)
                {
                    cache_k.extend(new_k);
                    cache_v.extend(new_v);
                    cache_pos.extend(new_pos);
                }
                at = end;
            }
        }
        Ok(out)
    }
}
