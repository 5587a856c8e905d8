//! One configurable in-process kernel for every scheme and every operation, written
//! from the conventions alone (docs/protocol.md and the `posconform::case` docs), not
//! from the library's reference code.
//!
//! Conventions it implements:
//! - Layout `[H, rows, d]`; keys over `[memory ; current]`. Query `i` of a window sits at
//!   `p0 + i`, key `j` at `p0 - M + j`; distance `Δ = M + i - j`; key `j` is visible to
//!   query `i` iff `Δ >= 0` and `j` is not a hidden key. Masked scores are `-inf`; a row
//!   with no visible key has zero probabilities and a zero output.
//! - Sinusoid: `PE(p, 2i) = sin(p·ω_i)`, `PE(p, 2i+1) = cos(p·ω_i)`, `ω_i = base^(-2i/d)`,
//!   interleaved or `[sin… ‖ cos…]`; added to queries and keys; scores scaled by `1/√d`.
//! - Learned: `table[p]` added to queries and keys.
//! - Rotary: `θ_j = base^(-2j/d_rot)`, pairs `(2j, 2j+1)` or `(j, j + d_rot/2)`, rotation
//!   `(x, y) -> (x cos - y sin, x sin + y cos)`, dims past `d_rot` untouched; linear
//!   interpolation uses the angle `(p/s)·θ_j`, NTK-aware scaling the base
//!   `b·s^(d_rot/(d_rot-2))`.
//! - ALiBi: bias `-m_h·Δ` (unscaled), slopes `2^(-8k/n)` for `n` a power of two, else
//!   those of the largest power of two `c < n` followed by every other slope of `2c`.
//! - T5 buckets of the relative position `key - query`, with the published operation
//!   order; bias added unscaled.
//! - Shaw et al.: `a_ij = w[clip(j_pos - i_pos, -k, k) + k]` added to keys (scores) and
//!   values (outputs).
//! - Transformer-XL: `scale·((q+u)·k_j + (q+v)·r[min(Δ, clamp)])`; encode
//!   `r[h, δ, c] = Σ_e R_δ[e]·w_kr[h, e, c]`, `R_δ` the `[sin‖cos]` sinusoid of `δ`.
//! - `stream`: segments of `L`, each attending to the newest `M` earlier tokens and to
//!   itself causally. `decode`: prefill `P`, then chunks; every token attends causally
//!   to the whole prefix.
//!
//! How each variant rounds is described by [`Profile`]; the algorithmic choices
//! (frequency formula, softmax form, relative shift, ALiBi form, cache) by [`Variant`].

use std::collections::BTreeSet;

use ndarray::{ArrayD, IxDyn};
use posconform::case::{Arrays, Case, Operation};
use posconform::kernel::{full_support, Answer, Kernel, KernelInfo};
use posconform::math::Dtype;
use posconform::rotary::{Pairing, RotaryScaling};
use posconform::scheme::{
    bucketed::BucketedSpec, clipped::ClippedSpec, rotary::RotarySpec, sinusoidal::SinusoidalSpec,
    xl_relative::XlRelativeSpec, SchemeSpec,
};
use posconform::{Error, Result, Scale, SinusoidLayout};

use crate::real::{round_to, Real};

/// Precision in which angles `p·ω` and their cos/sin are formed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AngleForm {
    /// ω, p·ω, cos and sin in f64.
    F64,
    /// ω in f32, `p as f32 * ω` in f32, `f32::cos`/`f32::sin` (the usual framework recipe).
    F32,
    /// ω and p rounded to this half type and their product rounded to it, cos/sin in f32
    /// (outside the numerical contract: a planted bug).
    Half(Dtype),
}

/// The arithmetic type of everything that is not an angle.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Compute {
    /// Native f64.
    F64,
    /// Native f32.
    F32,
}

/// How one requested dtype is computed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Profile {
    /// Arithmetic type.
    pub compute: Compute,
    /// Angle precision.
    pub angles: AngleForm,
    /// When set, every elementwise result (tables, rotated or shifted vectors, scores,
    /// exponentials, probabilities, outputs, every dot product's result) is rounded to
    /// this dtype after its operation; sums inside a dot product stay in the compute type.
    pub store: Option<Dtype>,
    /// Independent partial sums of every dot product (1: one running sum), added at the
    /// end: another summation order.
    pub lanes: usize,
    /// The dtype declared on the returned float arrays.
    pub answer: Dtype,
}

impl Profile {
    /// Everything in f64, one running sum.
    pub const EXACT: Profile = Profile {
        compute: Compute::F64,
        angles: AngleForm::F64,
        store: None,
        lanes: 1,
        answer: Dtype::F64,
    };
}

/// Formula for the frequencies `ω_i = base^(-2i/w)`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Freq {
    /// `base.powf(-2i/w)`.
    Pow,
    /// `exp(-2i·ln(base)/w)` (the tutorial "div_term" recipe).
    ExpLn,
    /// `1 / base^(2i/w)` (the "inv_freq" recipe).
    Reciprocal,
}

/// Softmax form.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Softmax {
    /// `exp(s - max) / Σ exp(s - max)`, output `Σ p·v`.
    MaxSubtracted,
    /// Running max and rescaled running sum over key blocks of `block`; the output is
    /// accumulated with the same rescaling and divided at the end.
    Online {
        /// Keys per block.
        block: usize,
    },
    /// `exp(s - logsumexp(row))`, output `Σ p·v`.
    LogSumExp,
}

/// ALiBi bias form.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AlibiForm {
    /// `-m·Δ`.
    Distance,
    /// `+m·j` with `j` the key index in the window: differs by the per-row constant
    /// `-m·(M+i)`, so probabilities and outputs agree and `scores` is declined.
    KeyPosition,
}

/// How Transformer-XL's position term `(q+v)·r[Δ]` is laid out.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum XlForm {
    /// A dot product per visible pair with `r[Δ]`.
    PerPair,
    /// `BD[i, c] = (q_i+v)·r[K-1-c]` over the descending relative sequence, then the
    /// relative shift: pad a zero column, reshape row-major to `(K+1)×L`, drop the first
    /// row, reshape to `L×K`.
    PadReshape,
    /// `P[i, δ] = (q_i+v)·r[δ]` for every δ, then a gather `P[i, Δ(i, j)]`.
    Gather,
}

/// How `decode` keeps its cache.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DecodeForm {
    /// The cache holds the raw keys; each step re-encodes every key at its position.
    Recompute,
    /// The cache holds keys already encoded (rotated, or with the absolute encoding
    /// added) at their absolute positions, stored in the requested dtype; each chunk
    /// encodes only its own rows.
    EncodedCache,
}

/// Small realistic bugs, planted on purpose (never in a correct variant).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Bug {
    /// Angles formed in f16: `p` and `ω` rounded to f16, their product rounded to f16.
    AnglesF16,
    /// Sinusoid and rotary positions shifted by +1 (queries and keys alike).
    PositionOffByOne,
    /// `θ_j = base^(-2j/(w-2))`: the endpoint-inclusive spacing (last frequency `1/base`).
    OtherFrequencyExponent,
    /// Rotary pairing adjacent ↔ half-split, sinusoid layout interleaved ↔ concatenated.
    WrongPairing,
    /// `1/d` where `1/√d` is asked for.
    ScaleOneOverD,
    /// Dot products accumulated in f16: each product and each partial sum rounded to f16.
    AccumulateF16,
}

impl Bug {
    /// Every planted bug.
    pub const ALL: [Bug; 6] = [
        Bug::AnglesF16,
        Bug::PositionOffByOne,
        Bug::OtherFrequencyExponent,
        Bug::WrongPairing,
        Bug::ScaleOneOverD,
        Bug::AccumulateF16,
    ];

    /// Its name in tables.
    pub fn name(self) -> &'static str {
        match self {
            Bug::AnglesF16 => "angles-f16",
            Bug::PositionOffByOne => "position-off-by-one",
            Bug::OtherFrequencyExponent => "other-frequency-exponent",
            Bug::WrongPairing => "wrong-pairing",
            Bug::ScaleOneOverD => "scale-1-over-d",
            Bug::AccumulateF16 => "accumulate-f16",
        }
    }
}

/// A named kernel configuration.
#[derive(Debug, Clone, PartialEq)]
pub struct Variant {
    /// Name (used in describe and in every table).
    pub name: String,
    /// One line on what it does.
    pub summary: String,
    /// The dtypes it declares, preferred first, each with how it is computed.
    pub profiles: Vec<(Dtype, Profile)>,
    /// Frequency formula of sinusoids (absolute and Transformer-XL's `R_δ`).
    pub freq_sinusoid: Freq,
    /// Frequency formula of rotary.
    pub freq_rotary: Freq,
    /// Linear interpolation as `p·(θ/s)` instead of `(p/s)·θ`.
    pub interpolate_frequencies: bool,
    /// ALiBi slopes as `2^(-8k/n)` directly instead of powers of `2^(-8/n)`.
    pub slopes_by_exponent: bool,
    /// Softmax form.
    pub softmax: Softmax,
    /// ALiBi form.
    pub alibi: AlibiForm,
    /// Transformer-XL layout.
    pub xl: XlForm,
    /// Decode cache.
    pub decode: DecodeForm,
    /// A planted bug.
    pub bug: Option<Bug>,
}

impl Variant {
    /// A plain variant: every algorithmic choice the straightforward one, `profiles` as given.
    pub fn plain(name: &str, summary: &str, profiles: Vec<(Dtype, Profile)>) -> Self {
        Variant {
            name: name.into(),
            summary: summary.into(),
            profiles,
            freq_sinusoid: Freq::Pow,
            freq_rotary: Freq::Pow,
            interpolate_frequencies: false,
            slopes_by_exponent: false,
            softmax: Softmax::MaxSubtracted,
            alibi: AlibiForm::Distance,
            xl: XlForm::PerPair,
            decode: DecodeForm::Recompute,
            bug: None,
        }
    }

    /// The same algorithms with every precision raised to f64 (the structural check).
    pub fn in_f64(&self) -> Self {
        let mut v = self.clone();
        v.name = format!("{}@f64", self.name);
        v.profiles = vec![(Dtype::F64, Profile::EXACT)];
        v
    }

    /// The same variant with a planted bug.
    pub fn with_bug(&self, bug: Bug) -> Self {
        let mut v = self.clone();
        v.name = format!("{}+{}", self.name, bug.name());
        v.bug = Some(bug);
        v
    }

    /// The dtypes it declares.
    pub fn dtypes(&self) -> Vec<Dtype> {
        self.profiles.iter().map(|(d, _)| *d).collect()
    }

    fn profile(&self, dtype: Dtype) -> Profile {
        self.profiles
            .iter()
            .find(|(d, _)| *d == dtype)
            .or(self.profiles.first())
            .map(|(_, p)| *p)
            .unwrap_or(Profile::EXACT)
    }
}

/// The kernel: a variant behind the `Kernel` trait.
#[derive(Debug, Clone)]
pub struct ZooKernel {
    /// Its configuration.
    pub variant: Variant,
}

impl ZooKernel {
    /// A kernel for `variant`.
    pub fn new(variant: Variant) -> Self {
        ZooKernel { variant }
    }
}

impl Kernel for ZooKernel {
    fn describe(&mut self) -> Result<KernelInfo> {
        Ok(KernelInfo {
            name: self.variant.name.clone(),
            version: "zoo".into(),
            supports: full_support(),
            dtypes: self.variant.dtypes(),
            conventions: vec![
                "masked scores are -inf".into(),
                self.variant.summary.clone(),
            ],
        })
    }

    fn run(&mut self, case: &Case, dtype: Dtype, inputs: &Arrays) -> Result<Answer> {
        if self.variant.alibi == AlibiForm::KeyPosition
            && matches!(case.scheme, SchemeSpec::Alibi(_))
            && case.operation == Operation::Scores
        {
            return Ok(Answer::Unsupported(
                "ALiBi bias is m·(key index): scores differ from the distance form by a per-row constant".into(),
            ));
        }
        let profile = self.variant.profile(dtype);
        let outputs = match profile.compute {
            Compute::F64 => Engine::<f64>::new(&self.variant, profile, case, dtype).run(inputs),
            Compute::F32 => Engine::<f32>::new(&self.variant, profile, case, dtype).run(inputs),
        }
        .map_err(|reason| {
            Error::kernel(
                posconform::KernelErrorKind::Failed,
                self.variant.name.clone(),
                format!("case {}: {reason}", case.id),
            )
        })?;
        Ok(Answer::Outputs {
            outputs,
            elapsed_ms: None,
        })
    }
}

type Rows<T> = Vec<Vec<T>>;
type Heads<T> = Vec<Rows<T>>;
type Fallible<T> = std::result::Result<T, String>;
/// Scheme arrays, `q`, `k`, `v` of a `stream` or `decode` case.
type SequenceInputs<T> = (SchemeArrays<T>, Heads<T>, Heads<T>, Heads<T>);

/// One attention window of one head: encoded queries and keys, values, `M`, the
/// absolute position of query 0, hidden keys.
struct Window<'a, T> {
    head: usize,
    q: &'a [Vec<T>],
    k: &'a [Vec<T>],
    v: &'a [Vec<T>],
    memory: usize,
    hidden: &'a BTreeSet<usize>,
}

/// Scheme arrays of the non-encode operations, per head.
struct SchemeArrays<T> {
    table: Rows<T>,
    r: Heads<T>,
    u: Rows<T>,
    pv: Rows<T>,
    bias_table: Rows<T>,
    w_key: Heads<T>,
    w_value: Heads<T>,
}

struct Engine<'a, T> {
    variant: &'a Variant,
    profile: Profile,
    case: &'a Case,
    dtype: Dtype,
    _t: std::marker::PhantomData<T>,
}

fn input<'i>(
    inputs: &'i Arrays,
    name: &str,
) -> Fallible<ndarray::CowArray<'i, f64, ndarray::IxDyn>> {
    inputs
        .get(name)
        .map(|t| t.view())
        .ok_or_else(|| format!("missing input `{name}`"))
}

fn heads<T: Real>(x: &ndarray::CowArray<'_, f64, ndarray::IxDyn>) -> Fallible<Heads<T>> {
    if x.ndim() != 3 {
        return Err(format!("expected a 3-d array, got shape {:?}", x.shape()));
    }
    x.outer_iter().map(|h| rows(&h)).collect()
}

fn rows<T: Real>(x: &ndarray::ArrayViewD<'_, f64>) -> Fallible<Rows<T>> {
    if x.ndim() != 2 {
        return Err(format!("expected a 2-d array, got shape {:?}", x.shape()));
    }
    Ok(x.outer_iter()
        .map(|r| r.iter().map(|&v| T::of(v)).collect())
        .collect())
}

fn to_array<T: Real>(shape: &[usize], values: impl IntoIterator<Item = T>) -> ArrayD<f64> {
    let flat: Vec<f64> = values.into_iter().map(Real::to_f64).collect();
    ArrayD::from_shape_vec(IxDyn(shape), flat).expect("shape matches the values")
}

impl<'a, T: Real> Engine<'a, T> {
    fn new(variant: &'a Variant, profile: Profile, case: &'a Case, dtype: Dtype) -> Self {
        Engine {
            variant,
            profile,
            case,
            dtype,
            _t: std::marker::PhantomData,
        }
    }

    fn bug(&self, bug: Bug) -> bool {
        self.variant.bug == Some(bug)
    }

    /// Where angles are formed: the profile's choice, or f16 under the planted bug.
    fn angle_form(&self) -> AngleForm {
        if self.bug(Bug::AnglesF16) {
            AngleForm::Half(Dtype::F16)
        } else {
            self.profile.angles
        }
    }

    /// Rounds an elementwise result to the storage dtype, when the profile has one.
    fn st(&self, x: T) -> T {
        match self.profile.store {
            Some(d) => T::of(round_to(d, x.to_f64())),
            None => x,
        }
    }

    /// `Σ a_i b_i` in the profile's summation order, the result stored.
    fn dot(&self, a: &[T], b: &[T]) -> T {
        self.st(self.sum_products(a.iter().copied().zip(b.iter().copied())))
    }

    fn sum_products(&self, pairs: impl Iterator<Item = (T, T)>) -> T {
        if self.bug(Bug::AccumulateF16) {
            let h = |x: T| T::of(round_to(Dtype::F16, x.to_f64()));
            return pairs.fold(T::ZERO, |acc, (x, y)| h(acc + h(x * y)));
        }
        let lanes = self.profile.lanes.max(1);
        let mut partial = vec![T::ZERO; lanes];
        for (n, (x, y)) in pairs.enumerate() {
            partial[n % lanes] = partial[n % lanes] + x * y;
        }
        partial.into_iter().fold(T::ZERO, |a, b| a + b)
    }

    fn emit(
        &self,
        shape: &[usize],
        values: impl IntoIterator<Item = T>,
    ) -> posconform::tensor::Tensor {
        posconform::tensor::Tensor::from_f64(self.profile.answer, to_array(shape, values))
    }

    fn emit_int(&self, values: Vec<i64>) -> posconform::tensor::Tensor {
        let n = values.len();
        posconform::tensor::Tensor::from_f64(
            Dtype::I64,
            ArrayD::from_shape_vec(IxDyn(&[n]), values.into_iter().map(|x| x as f64).collect())
                .expect("1-d"),
        )
    }

    // ---------------------------------------------------------------- angles

    /// `ω_i` for `i < width/2`, in the angle precision, as f64 values.
    fn omegas(&self, width: usize, base: f64, formula: Freq) -> Vec<f64> {
        let denominator = if self.bug(Bug::OtherFrequencyExponent) && width > 2 {
            width - 2
        } else {
            width
        };
        (0..width / 2)
            .map(|i| {
                let two_i = 2.0 * i as f64;
                match self.angle_form() {
                    AngleForm::F64 => {
                        let w = denominator as f64;
                        match formula {
                            Freq::Pow => base.powf(-two_i / w),
                            Freq::ExpLn => (-two_i * base.ln() / w).exp(),
                            Freq::Reciprocal => 1.0 / base.powf(two_i / w),
                        }
                    }
                    AngleForm::F32 | AngleForm::Half(_) => {
                        let (b, w, t) = (base as f32, denominator as f32, two_i as f32);
                        (match formula {
                            Freq::Pow => b.powf(-t / w),
                            Freq::ExpLn => (t * ((-base.ln() / denominator as f64) as f32)).exp(),
                            Freq::Reciprocal => 1.0 / b.powf(t / w),
                        }) as f64
                    }
                }
            })
            .collect()
    }

    /// `(cos, sin)` of `p·ω_i` for every `ω_i`, formed in the angle precision, stored.
    fn cos_sin(&self, position: f64, omegas: &[f64]) -> Vec<(T, T)> {
        omegas
            .iter()
            .map(|&w| {
                let (c, s) = match self.angle_form() {
                    AngleForm::F64 => {
                        let a = position * w;
                        (a.cos(), a.sin())
                    }
                    AngleForm::F32 => {
                        let a = position as f32 * w as f32;
                        (a.cos() as f64, a.sin() as f64)
                    }
                    AngleForm::Half(h) => {
                        let a = round_to(h, round_to(h, position) * round_to(h, w)) as f32;
                        (a.cos() as f64, a.sin() as f64)
                    }
                };
                (self.st(T::of(c)), self.st(T::of(s)))
            })
            .collect()
    }

    /// The position an absolute scheme uses for token position `p` (the off-by-one bug).
    fn shifted(&self, p: i64) -> i64 {
        if self.bug(Bug::PositionOffByOne) {
            p + 1
        } else {
            p
        }
    }

    /// The sinusoid of width `d` at `position`.
    fn sinusoid(&self, position: f64, d: usize, base: f64, layout: SinusoidLayout) -> Vec<T> {
        let omegas = self.omegas(d, base, self.variant.freq_sinusoid);
        let cs = self.cos_sin(position, &omegas);
        let mut out = vec![T::ZERO; d];
        for (i, (c, s)) in cs.into_iter().enumerate() {
            match layout {
                SinusoidLayout::Interleaved => {
                    out[2 * i] = s;
                    out[2 * i + 1] = c;
                }
                SinusoidLayout::Concatenated => {
                    out[i] = s;
                    out[d / 2 + i] = c;
                }
            }
        }
        out
    }

    fn sinusoid_layout(&self, layout: SinusoidLayout) -> SinusoidLayout {
        match (self.bug(Bug::WrongPairing), layout) {
            (false, l) => l,
            (true, SinusoidLayout::Interleaved) => SinusoidLayout::Concatenated,
            (true, SinusoidLayout::Concatenated) => SinusoidLayout::Interleaved,
        }
    }

    /// Rotary `(rotary_dim, pairing, ω, position transform)` of the case.
    fn rotary_setup(&self) -> Fallible<RotarySetup> {
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
        let d_rot = *rotary_dim;
        let pairing = match (self.bug(Bug::WrongPairing), *pairing) {
            (false, p) => p,
            (true, Pairing::Adjacent) => Pairing::HalfSplit,
            (true, Pairing::HalfSplit) => Pairing::Adjacent,
        };
        let (base, divide_by) = match *scaling {
            RotaryScaling::None => (*base, None),
            RotaryScaling::LinearInterpolation { factor } => (*base, Some(factor)),
            RotaryScaling::NtkAware { factor } => {
                let n = d_rot as f64;
                (*base * factor.powf(n / (n - 2.0)), None)
            }
        };
        let mut omegas = self.omegas(d_rot, base, self.variant.freq_rotary);
        let mut divide_positions = divide_by;
        if let (Some(s), true) = (divide_by, self.variant.interpolate_frequencies) {
            // p·(θ/s): the same angle, the division moved onto the frequencies.
            for w in &mut omegas {
                *w /= s;
            }
            divide_positions = None;
        }
        Ok(RotarySetup {
            d_rot,
            pairing,
            omegas,
            divide_positions,
        })
    }

    /// The position value the angle is formed from: `p`, or `p/s` in the angle precision.
    fn rotary_position(&self, setup: &RotarySetup, p: i64) -> f64 {
        let p = self.shifted(p);
        match setup.divide_positions {
            None => p as f64,
            Some(s) => match self.angle_form() {
                AngleForm::F64 => p as f64 / s,
                AngleForm::F32 | AngleForm::Half(_) => (p as f32 / s as f32) as f64,
            },
        }
    }

    fn rotate(&self, setup: &RotarySetup, x: &[T], p: i64) -> Vec<T> {
        let cs = self.cos_sin(self.rotary_position(setup, p), &setup.omegas);
        let mut out = x.to_vec();
        for (j, (c, s)) in cs.into_iter().enumerate() {
            let (a, b) = match setup.pairing {
                Pairing::Adjacent => (2 * j, 2 * j + 1),
                Pairing::HalfSplit => (j, j + setup.d_rot / 2),
            };
            let (x0, x1) = (x[a], x[b]);
            out[a] = self.st(self.st(x0 * c) - self.st(x1 * s));
            out[b] = self.st(self.st(x0 * s) + self.st(x1 * c));
        }
        out
    }

    // ---------------------------------------------------------------- schemes

    fn scale(&self) -> T {
        let d = self.case.head_dim as f64;
        match self.case.scheme.scale() {
            Scale::InverseSqrtDim if self.bug(Bug::ScaleOneOverD) => T::ONE / T::of(d),
            Scale::InverseSqrtDim => T::ONE / T::of(d).sqrt(),
            Scale::Fixed(x) => T::of(x),
        }
    }

    fn slopes(&self) -> Vec<T> {
        let n = self.case.heads;
        let power_of_two = |n: usize| -> Vec<T> {
            if self.variant.slopes_by_exponent {
                (1..=n)
                    .map(|k| T::of(2.0).powf(T::of(-8.0 * k as f64 / n as f64)))
                    .collect()
            } else {
                let start = T::of(2.0).powf(T::of(-8.0 / n as f64));
                (1..=n).map(|k| start.powf(T::of(k as f64))).collect()
            }
        };
        if n.is_power_of_two() {
            return power_of_two(n);
        }
        let c = 1usize << (usize::BITS - 1 - n.leading_zeros());
        let mut out = power_of_two(c);
        out.extend(power_of_two(2 * c).into_iter().step_by(2).take(n - c));
        out
    }

    /// T5 bucket of `relative = key position - query position`, in the compute type.
    fn bucket(&self, relative: i64) -> Fallible<i64> {
        let SchemeSpec::Bucketed(BucketedSpec {
            num_buckets,
            max_distance,
            bidirectional,
            ..
        }) = &self.case.scheme
        else {
            return Err("not a bucketed case".into());
        };
        let mut nb = *num_buckets as i64;
        let mut bucket = 0;
        let mut n = -relative;
        if *bidirectional {
            nb /= 2;
            if n < 0 {
                bucket += nb;
            }
            n = n.abs();
        } else {
            n = n.max(0);
        }
        let max_exact = nb / 2;
        if n < max_exact {
            return Ok(bucket + n);
        }
        let ratio = T::of(n as f64) / T::of(max_exact as f64);
        let span = T::of((*max_distance as f64 / max_exact as f64).ln());
        let large = max_exact as f64
            + (ratio.ln() / span * T::of((nb - max_exact) as f64))
                .to_f64()
                .trunc();
        Ok(bucket + (large as i64).min(nb - 1))
    }

    fn clip_index(&self, relative: i64) -> Fallible<usize> {
        let SchemeSpec::Clipped(ClippedSpec { clip_distance, .. }) = &self.case.scheme else {
            return Err("not a clipped case".into());
        };
        let k = *clip_distance as i64;
        Ok((relative.clamp(-k, k) + k) as usize)
    }

    fn xl_clamp(&self) -> Option<usize> {
        match &self.case.scheme {
            SchemeSpec::XlRelative(XlRelativeSpec { clamp_len, .. }) => *clamp_len,
            _ => None,
        }
    }

    // ---------------------------------------------------------------- entry

    fn run(&self, inputs: &Arrays) -> Fallible<Arrays> {
        let case = self.case;
        let mut out = Arrays::new();
        match &case.operation {
            Operation::Encode => self.encode(inputs, &mut out)?,
            Operation::Scores | Operation::Attention => {
                let arrays = self.scheme_arrays(inputs)?;
                let q: Heads<T> = heads(&input(inputs, "q")?)?;
                let k: Heads<T> = heads(&input(inputs, "k")?)?;
                let v: Heads<T> = if case.operation == Operation::Attention {
                    heads(&input(inputs, "v")?)?
                } else {
                    vec![Vec::new(); case.heads]
                };
                let hidden: BTreeSet<usize> = case.hidden_keys.iter().copied().collect();
                let (m, l, kk, d) = (
                    case.memory_len,
                    case.query_len,
                    case.key_len(),
                    case.head_dim,
                );
                let (mut scores, mut probs, mut output) = (Vec::new(), Vec::new(), Vec::new());
                for h in 0..case.heads {
                    let qe = self.encode_rows(&arrays, &q[h], case.query_start)?;
                    let ke = self.encode_rows(&arrays, &k[h], case.query_start - m as i64)?;
                    let w = Window {
                        head: h,
                        q: &qe,
                        k: &ke,
                        v: &v[h],
                        memory: m,
                        hidden: &hidden,
                    };
                    let s = self.scores(&arrays, &w)?;
                    if case.operation == Operation::Scores {
                        scores.extend(s.into_iter().flatten());
                    } else {
                        let (p, o) = self.attend(&arrays, &w, &s);
                        probs.extend(p.into_iter().flatten());
                        output.extend(o.into_iter().flatten());
                    }
                }
                let hh = case.heads;
                if case.operation == Operation::Scores {
                    out.insert("scores".into(), self.emit(&[hh, l, kk], scores));
                } else {
                    out.insert("probs".into(), self.emit(&[hh, l, kk], probs));
                    out.insert("output".into(), self.emit(&[hh, l, d], output));
                }
            }
            Operation::Stream { tokens } => {
                let output = self.stream(inputs, *tokens)?;
                out.insert(
                    "output".into(),
                    self.emit(&[case.heads, *tokens, case.head_dim], output),
                );
            }
            Operation::Decode {
                tokens,
                prefill,
                chunks,
            } => {
                let output = self.decode(inputs, *tokens, *prefill, chunks)?;
                out.insert(
                    "output".into(),
                    self.emit(&[case.heads, tokens - prefill, case.head_dim], output),
                );
            }
        }
        Ok(out)
    }

    fn encode(&self, inputs: &Arrays, out: &mut Arrays) -> Fallible<()> {
        let case = self.case;
        let (h, l, d) = (case.heads, case.query_len, case.head_dim);
        let positions = || -> Fallible<Vec<i64>> {
            Ok(input(inputs, "positions")?
                .iter()
                .map(|&p| p as i64)
                .collect())
        };
        match &case.scheme {
            SchemeSpec::Sinusoidal(SinusoidalSpec { base, layout }) => {
                let layout = self.sinusoid_layout(*layout);
                let table: Vec<T> = positions()?
                    .into_iter()
                    .flat_map(|p| self.sinusoid(self.shifted(p) as f64, d, *base, layout))
                    .collect();
                out.insert("table".into(), self.emit(&[l, d], table));
            }
            SchemeSpec::Learned(_) => {
                let table: Rows<T> = rows(&input(inputs, "table")?.view())?;
                let mut values = Vec::new();
                for p in positions()? {
                    let row = usize::try_from(p)
                        .ok()
                        .and_then(|p| table.get(p))
                        .ok_or_else(|| format!("position {p} outside the table"))?;
                    values.extend(row.iter().copied());
                }
                out.insert("rows".into(), self.emit(&[l, d], values));
            }
            SchemeSpec::Rotary(_) => {
                let setup = self.rotary_setup()?;
                let x: Heads<T> = heads(&input(inputs, "x")?)?;
                let positions = positions()?;
                let mut values = Vec::new();
                for head in &x {
                    for (row, &p) in head.iter().zip(&positions) {
                        values.extend(self.rotate(&setup, row, p));
                    }
                }
                out.insert("rotated".into(), self.emit(&[h, l, d], values));
            }
            SchemeSpec::XlRelative(_) => {
                let w: Heads<T> = heads(&input(inputs, "w_kr")?)?;
                // Every distance 0..K-1, unclamped: the protocol's encode lists r for each
                // δ, and a clamp acts where r is read (row min(δ, c)). (Transformer-XL's
                // published code clamps the distances before the sinusoid instead; the
                // scores agree either way, the encode table does not.)
                let kk = case.key_len();
                let table: Rows<T> = (0..kk)
                    .map(|delta| {
                        self.sinusoid(delta as f64, d, 10_000.0, SinusoidLayout::Concatenated)
                    })
                    .collect();
                let mut values = Vec::new();
                for wh in &w {
                    // Columns of w_kr[h], so each output element is one dot product.
                    let columns: Rows<T> =
                        (0..d).map(|c| wh.iter().map(|r| r[c]).collect()).collect();
                    for row in &table {
                        values.extend(columns.iter().map(|col| self.dot(row, col)));
                    }
                }
                out.insert("r".into(), self.emit(&[h, kk, d], values));
            }
            SchemeSpec::Alibi(_) => {
                out.insert("slopes".into(), self.emit(&[h], self.slopes()));
            }
            SchemeSpec::Bucketed(_) => {
                let rel = input(inputs, "relative_positions")?;
                let b = rel
                    .iter()
                    .map(|&x| self.bucket(x as i64))
                    .collect::<Fallible<Vec<_>>>()?;
                out.insert("buckets".into(), self.emit_int(b));
            }
            SchemeSpec::Clipped(_) => {
                let rel = input(inputs, "relative_positions")?;
                let b = rel
                    .iter()
                    .map(|&x| self.clip_index(x as i64).map(|i| i as i64))
                    .collect::<Fallible<Vec<_>>>()?;
                out.insert("indices".into(), self.emit_int(b));
            }
        }
        Ok(())
    }

    fn scheme_arrays(&self, inputs: &Arrays) -> Fallible<SchemeArrays<T>> {
        let mut a = SchemeArrays {
            table: Vec::new(),
            r: Vec::new(),
            u: Vec::new(),
            pv: Vec::new(),
            bias_table: Vec::new(),
            w_key: Vec::new(),
            w_value: Vec::new(),
        };
        match &self.case.scheme {
            SchemeSpec::Learned(_) => a.table = rows(&input(inputs, "table")?.view())?,
            SchemeSpec::XlRelative(_) => {
                a.r = heads(&input(inputs, "r")?)?;
                a.u = rows(&input(inputs, "content_bias")?.view())?;
                a.pv = rows(&input(inputs, "position_bias")?.view())?;
            }
            SchemeSpec::Bucketed(_) => a.bias_table = rows(&input(inputs, "bias_table")?.view())?,
            SchemeSpec::Clipped(_) => {
                a.w_key = heads(&input(inputs, "w_key")?)?;
                a.w_value = heads(&input(inputs, "w_value")?)?;
            }
            _ => {}
        }
        Ok(a)
    }

    /// Queries or keys with the absolute encoding applied, row `n` at `first + n`.
    fn encode_rows(&self, a: &SchemeArrays<T>, x: &[Vec<T>], first: i64) -> Fallible<Rows<T>> {
        match &self.case.scheme {
            SchemeSpec::Sinusoidal(SinusoidalSpec { base, layout }) => {
                let layout = self.sinusoid_layout(*layout);
                Ok(x.iter()
                    .enumerate()
                    .map(|(n, row)| {
                        let p = self.shifted(first + n as i64);
                        let pe = self.sinusoid(p as f64, row.len(), *base, layout);
                        row.iter().zip(pe).map(|(&x, e)| self.st(x + e)).collect()
                    })
                    .collect())
            }
            SchemeSpec::Learned(_) => x
                .iter()
                .enumerate()
                .map(|(n, row)| {
                    let p = first + n as i64;
                    let pe = usize::try_from(p)
                        .ok()
                        .and_then(|p| a.table.get(p))
                        .ok_or_else(|| format!("position {p} outside the learned table"))?;
                    Ok(row.iter().zip(pe).map(|(&x, &e)| self.st(x + e)).collect())
                })
                .collect(),
            SchemeSpec::Rotary(_) => {
                let setup = self.rotary_setup()?;
                Ok(x.iter()
                    .enumerate()
                    .map(|(n, row)| self.rotate(&setup, row, first + n as i64))
                    .collect())
            }
            _ => Ok(x.to_vec()),
        }
    }

    /// Pre-softmax scores of one window, `-inf` where masked. (Index loops: the
    /// conventions are stated in `(i, j)`, and the code keeps them visible.)
    #[allow(clippy::needless_range_loop)]
    fn scores(&self, a: &SchemeArrays<T>, w: &Window<'_, T>) -> Fallible<Rows<T>> {
        let (l, kk, m) = (w.q.len(), w.k.len(), w.memory);
        let visible = |i: usize, j: usize| j <= m + i && !w.hidden.contains(&j);
        let scale = self.scale();
        let mut s = vec![vec![T::NEG_INF; kk]; l];
        match &self.case.scheme {
            SchemeSpec::XlRelative(_) => {
                let h = w.head;
                let qu: Rows<T> = w.q.iter().map(|q| self.add(q, &a.u[h])).collect();
                let qv: Rows<T> = w.q.iter().map(|q| self.add(q, &a.pv[h])).collect();
                let r = &a.r[h];
                let row_of = |delta: usize| -> Fallible<&Vec<T>> {
                    let delta = self.xl_clamp().map_or(delta, |c| delta.min(c));
                    r.get(delta).ok_or_else(|| {
                        format!(
                            "distance {delta} needs row {delta} of r, which has {}",
                            r.len()
                        )
                    })
                };
                let bd: Rows<T> = match self.variant.xl {
                    XlForm::PerPair => {
                        let mut bd = vec![vec![T::ZERO; kk]; l];
                        for i in 0..l {
                            for j in 0..kk {
                                if visible(i, j) {
                                    bd[i][j] = self.dot(&qv[i], row_of(m + i - j)?);
                                }
                            }
                        }
                        bd
                    }
                    XlForm::Gather => {
                        let reach = (m + l).min(kk); // largest distance + 1
                        let mut by_distance = vec![Vec::with_capacity(reach); l];
                        for (i, row) in by_distance.iter_mut().enumerate() {
                            for delta in 0..reach {
                                row.push(self.dot(&qv[i], row_of(delta)?));
                            }
                        }
                        let mut bd = vec![vec![T::ZERO; kk]; l];
                        for i in 0..l {
                            for j in 0..kk {
                                if visible(i, j) {
                                    bd[i][j] = by_distance[i][m + i - j];
                                }
                            }
                        }
                        bd
                    }
                    XlForm::PadReshape => {
                        // Relative sequence descending: column c holds distance K-1-c.
                        let mut raw = vec![vec![T::ZERO; kk]; l];
                        for i in 0..l {
                            for c in 0..kk {
                                raw[i][c] = self.dot(&qv[i], row_of(kk - 1 - c)?);
                            }
                        }
                        relative_shift(&raw)
                    }
                };
                for i in 0..l {
                    for j in 0..kk {
                        if visible(i, j) {
                            let ac = self.dot(&qu[i], &w.k[j]);
                            s[i][j] = self.st(self.st(ac + bd[i][j]) * scale);
                        }
                    }
                }
            }
            scheme => {
                let slopes = if matches!(scheme, SchemeSpec::Alibi(_)) {
                    self.slopes()
                } else {
                    Vec::new()
                };
                for i in 0..l {
                    for j in 0..kk {
                        if !visible(i, j) {
                            continue;
                        }
                        let delta = m + i - j;
                        s[i][j] = match scheme {
                            SchemeSpec::Alibi(_) => {
                                let slope = slopes[w.head];
                                let bias = match self.variant.alibi {
                                    AlibiForm::Distance => self.st(-(slope * T::of(delta as f64))),
                                    AlibiForm::KeyPosition => self.st(slope * T::of(j as f64)),
                                };
                                self.st(self.st(self.dot(&w.q[i], &w.k[j]) * scale) + bias)
                            }
                            SchemeSpec::Bucketed(_) => {
                                let b = self.bucket(-(delta as i64))? as usize;
                                let bias = a.bias_table[w.head][b];
                                self.st(self.st(self.dot(&w.q[i], &w.k[j]) * scale) + bias)
                            }
                            SchemeSpec::Clipped(_) => {
                                let c = self.clip_index(-(delta as i64))?;
                                let key = self.add(&w.k[j], &a.w_key[w.head][c]);
                                self.st(self.dot(&w.q[i], &key) * scale)
                            }
                            _ => self.st(self.dot(&w.q[i], &w.k[j]) * scale),
                        };
                    }
                }
            }
        }
        Ok(s)
    }

    fn add(&self, x: &[T], y: &[T]) -> Vec<T> {
        x.iter().zip(y).map(|(&a, &b)| self.st(a + b)).collect()
    }

    /// Probabilities and outputs of one window from its scores.
    fn attend(&self, a: &SchemeArrays<T>, w: &Window<'_, T>, s: &[Vec<T>]) -> (Rows<T>, Rows<T>) {
        let d = self.case.head_dim;
        let m = w.memory;
        let clipped = matches!(self.case.scheme, SchemeSpec::Clipped(_));
        let mut probs = Vec::with_capacity(s.len());
        let mut outs = Vec::with_capacity(s.len());
        for (i, row) in s.iter().enumerate() {
            // Values seen by this query (Shaw et al. add the clipped value embedding).
            let value = |j: usize| -> Vec<T> {
                if clipped {
                    let c = self
                        .clip_index(j as i64 - (m + i) as i64)
                        .expect("clipped case");
                    self.add(&w.v[j], &a.w_value[w.head][c])
                } else {
                    w.v[j].clone()
                }
            };
            let visible: Vec<usize> = (0..row.len()).filter(|&j| row[j] != T::NEG_INF).collect();
            if visible.is_empty() {
                probs.push(vec![T::ZERO; row.len()]);
                outs.push(vec![T::ZERO; d]);
                continue;
            }
            let (p, o) = match self.variant.softmax {
                Softmax::MaxSubtracted | Softmax::LogSumExp => {
                    let p = self.probabilities(row, &visible);
                    let values: Rows<T> = visible.iter().map(|&j| value(j)).collect();
                    let o = (0..d)
                        .map(|c| {
                            self.st(self.sum_products(
                                visible.iter().zip(&values).map(|(&j, v)| (p[j], v[c])),
                            ))
                        })
                        .collect();
                    (p, o)
                }
                Softmax::Online { block } => self.online(row, &visible, block.max(1), value, d),
            };
            probs.push(p);
            outs.push(o);
        }
        (probs, outs)
    }

    fn probabilities(&self, row: &[T], visible: &[usize]) -> Vec<T> {
        let max = visible
            .iter()
            .map(|&j| row[j])
            .fold(T::NEG_INF, |a, b| if b > a { b } else { a });
        let mut p = vec![T::ZERO; row.len()];
        match self.variant.softmax {
            Softmax::LogSumExp => {
                let sum = visible
                    .iter()
                    .fold(T::ZERO, |acc, &j| acc + (row[j] - max).exp());
                let lse = max + sum.ln();
                for &j in visible {
                    p[j] = self.st((row[j] - lse).exp());
                }
            }
            _ => {
                let e: Vec<T> = visible
                    .iter()
                    .map(|&j| self.st(self.st(row[j] - max).exp()))
                    .collect();
                let sum = e.iter().fold(T::ZERO, |acc, &x| acc + x);
                for (&j, &x) in visible.iter().zip(&e) {
                    p[j] = self.st(x / sum);
                }
            }
        }
        p
    }

    /// Blocked online softmax: running max `m`, running sum `l` and running output `o`,
    /// rescaled by `exp(m_old - m_new)` whenever a block raises the max.
    fn online(
        &self,
        row: &[T],
        visible: &[usize],
        block: usize,
        value: impl Fn(usize) -> Vec<T>,
        d: usize,
    ) -> (Vec<T>, Vec<T>) {
        let mut m = T::NEG_INF;
        let mut l = T::ZERO;
        let mut o = vec![T::ZERO; d];
        for chunk in visible.chunks(block) {
            let block_max =
                chunk
                    .iter()
                    .map(|&j| row[j])
                    .fold(T::NEG_INF, |a, b| if b > a { b } else { a });
            let new_m = if block_max > m { block_max } else { m };
            let rescale = if m == T::NEG_INF {
                T::ZERO
            } else {
                (m - new_m).exp()
            };
            let e: Vec<T> = chunk.iter().map(|&j| (row[j] - new_m).exp()).collect();
            l = l * rescale + e.iter().fold(T::ZERO, |acc, &x| acc + x);
            let values: Rows<T> = chunk.iter().map(|&j| value(j)).collect();
            for (c, oc) in o.iter_mut().enumerate() {
                *oc = *oc * rescale
                    + self.sum_products(e.iter().zip(&values).map(|(&x, v)| (x, v[c])));
            }
            m = new_m;
        }
        let mut p = vec![T::ZERO; row.len()];
        for &j in visible {
            p[j] = (row[j] - m).exp() / l;
        }
        (p, o.into_iter().map(|x| x / l).collect())
    }

    // ---------------------------------------------------------------- sequences

    fn sequence_inputs(&self, inputs: &Arrays) -> Fallible<SequenceInputs<T>> {
        Ok((
            self.scheme_arrays(inputs)?,
            heads(&input(inputs, "q")?)?,
            heads(&input(inputs, "k")?)?,
            heads(&input(inputs, "v")?)?,
        ))
    }

    /// Attention of tokens `from..to` over keys `key_from..to`, all at absolute
    /// positions `p0 + t`; keys are encoded here unless `encoded_keys` is given.
    #[allow(clippy::too_many_arguments)]
    fn segment(
        &self,
        a: &SchemeArrays<T>,
        h: usize,
        q: &[Vec<T>],
        keys: &[Vec<T>],
        v: &[Vec<T>],
        key_from: usize,
        from: usize,
        to: usize,
        encoded_keys: bool,
    ) -> Fallible<Rows<T>> {
        let p0 = self.case.query_start;
        let qe = self.encode_rows(a, &q[from..to], p0 + from as i64)?;
        let ke = if encoded_keys {
            keys[key_from..to].to_vec()
        } else {
            self.encode_rows(a, &keys[key_from..to], p0 + key_from as i64)?
        };
        let hidden = BTreeSet::new();
        let w = Window {
            head: h,
            q: &qe,
            k: &ke,
            v: &v[key_from..to],
            memory: from - key_from,
            hidden: &hidden,
        };
        let s = self.scores(a, &w)?;
        Ok(self.attend(a, &w, &s).1)
    }

    fn stream(&self, inputs: &Arrays, tokens: usize) -> Fallible<Vec<T>> {
        let (a, q, k, v) = self.sequence_inputs(inputs)?;
        let (l, m) = (self.case.query_len, self.case.memory_len);
        let mut out = Vec::new();
        for h in 0..self.case.heads {
            let mut start = 0;
            while start < tokens {
                let end = (start + l).min(tokens);
                let key_from = start.saturating_sub(m);
                let o = self.segment(&a, h, &q[h], &k[h], &v[h], key_from, start, end, false)?;
                out.extend(o.into_iter().flatten());
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
    ) -> Fallible<Vec<T>> {
        let (a, q, k, v) = self.sequence_inputs(inputs)?;
        let cache_encoded = self.variant.decode == DecodeForm::EncodedCache
            && matches!(
                self.case.scheme,
                SchemeSpec::Rotary(_) | SchemeSpec::Sinusoidal(_) | SchemeSpec::Learned(_)
            );
        let p0 = self.case.query_start;
        let mut out = Vec::new();
        for h in 0..self.case.heads {
            // The cache: keys as stored (encoded and rounded to the requested dtype when
            // the variant keeps encoded keys), grown chunk by chunk.
            let store = |rows: Rows<T>| -> Rows<T> {
                rows.into_iter()
                    .map(|r| {
                        r.into_iter()
                            .map(|x| T::of(round_to(self.dtype, x.to_f64())))
                            .collect()
                    })
                    .collect()
            };
            let mut cache: Rows<T> = if cache_encoded {
                store(self.encode_rows(&a, &k[h][..prefill], p0)?)
            } else {
                k[h][..prefill].to_vec()
            };
            let mut at = prefill;
            for &c in chunks {
                let end = at + c;
                if end > tokens {
                    return Err(format!("chunks run past {tokens} tokens"));
                }
                if cache_encoded {
                    cache.extend(store(self.encode_rows(
                        &a,
                        &k[h][at..end],
                        p0 + at as i64,
                    )?));
                } else {
                    cache.extend(k[h][at..end].iter().cloned());
                }
                let o = self.segment(&a, h, &q[h], &cache, &v[h], 0, at, end, cache_encoded)?;
                out.extend(o.into_iter().flatten());
                at = end;
            }
        }
        Ok(out)
    }
}

struct RotarySetup {
    d_rot: usize,
    pairing: Pairing,
    omegas: Vec<f64>,
    divide_positions: Option<f64>,
}

/// The relative shift of an `L×K` matrix whose column `c` holds distance `K-1-c`:
/// prepend a zero column (`L×(K+1)`), read it row-major as `(K+1)×L`, drop the first
/// row, read the rest as `L×K`. Entry `(i, j)` then holds distance `K-L+i-j` for
/// `j <= K-L+i`; the others are garbage that the mask removes.
pub fn relative_shift<T: Copy + Real>(bd: &[Vec<T>]) -> Vec<Vec<T>> {
    let l = bd.len();
    let kk = bd.first().map_or(0, Vec::len);
    let padded: Vec<T> = bd
        .iter()
        .flat_map(|row| std::iter::once(T::ZERO).chain(row.iter().copied()))
        .collect();
    padded[l..]
        .chunks(kk.max(1))
        .take(l)
        .map(|r| r.to_vec())
        .collect()
}
