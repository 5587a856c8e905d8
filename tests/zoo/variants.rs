//! The named configurations: correct kernels (inside the numerical contract: angles
//! formed in f32 or wider, tables and elementwise intermediates stored in the declared
//! dtype, accumulation in f32 or wider, any summation order, any exact softmax form) and
//! the base kernels planted bugs are added to.

use posconform::math::Dtype;

use crate::kernel::{
    AlibiForm, AngleForm, Compute, DecodeForm, Freq, Profile, Softmax, Variant, XlForm,
};

/// f32 angles (ω in f32, `p as f32 * ω`, `f32::cos`), the rest in f64, answered in f32.
pub const F32_ANGLES: Profile = Profile {
    compute: Compute::F64,
    angles: AngleForm::F32,
    store: None,
    lanes: 1,
    answer: Dtype::F32,
};

/// Every operation in native f32, dot products summed in 8 independent lanes (the
/// order a vectorised loop uses), answered in f32.
pub const F32_THROUGHOUT: Profile = Profile {
    compute: Compute::F32,
    angles: AngleForm::F32,
    store: None,
    lanes: 8,
    answer: Dtype::F32,
};

/// f32 arithmetic and angles, every elementwise result rounded to `dtype`, answered in it.
pub const fn per_op(dtype: Dtype) -> Profile {
    Profile {
        compute: Compute::F32,
        angles: AngleForm::F32,
        store: Some(dtype),
        lanes: 1,
        answer: dtype,
    }
}

/// f32 inside, inputs and outputs in `dtype` (a fused kernel keeps its intermediates in
/// registers).
pub const fn fused(dtype: Dtype) -> Profile {
    Profile {
        compute: Compute::F32,
        angles: AngleForm::F32,
        store: None,
        lanes: 4,
        answer: dtype,
    }
}

/// The correct variants of the zoo.
pub fn correct() -> Vec<Variant> {
    let exact = Profile::EXACT;
    let mut out = Vec::new();

    let mut v = Variant::plain(
        "f64-alt-frequencies",
        "f64; sinusoid ω = exp(-2i·ln(base)/d), rotary θ = 1/base^(2j/d), linear interpolation as p·(θ/s), ALiBi slopes 2^(-8k/n)",
        vec![(Dtype::F64, exact)],
    );
    v.freq_sinusoid = Freq::ExpLn;
    v.freq_rotary = Freq::Reciprocal;
    v.interpolate_frequencies = true;
    v.slopes_by_exponent = true;
    out.push(v);

    let mut v = Variant::plain(
        "f32-angles",
        "angles in f32 (ω in f32, positions.float() * ω, f32 cos/sin), everything else in f64, answered in f32",
        vec![(Dtype::F32, F32_ANGLES)],
    );
    v.freq_sinusoid = Freq::ExpLn;
    v.freq_rotary = Freq::Reciprocal;
    out.push(v);

    let mut v = Variant::plain(
        "f32-throughout",
        "every operation in native f32, dot products in 8 lanes",
        vec![(Dtype::F32, F32_THROUGHOUT)],
    );
    v.freq_sinusoid = Freq::ExpLn;
    v.freq_rotary = Freq::Reciprocal;
    out.push(v);

    for (name, dtype) in [("f16-per-op", Dtype::F16), ("bf16-per-op", Dtype::Bf16)] {
        let mut v = Variant::plain(
            name,
            "f32 angles; cos/sin and sinusoid tables and every elementwise result rounded to the storage dtype; sums in f32",
            vec![(dtype, per_op(dtype))],
        );
        v.freq_rotary = Freq::Reciprocal;
        out.push(v);
    }

    out.push(Variant::plain(
        "fused-low-precision",
        "inputs and outputs in f16 or bf16, everything inside in f32",
        vec![
            (Dtype::F16, fused(Dtype::F16)),
            (Dtype::Bf16, fused(Dtype::Bf16)),
        ],
    ));

    let mut v = Variant::plain(
        "online-softmax",
        "blocked online softmax over key blocks of 4 (running max, rescaled running sum and output); f64, or f32 throughout",
        vec![(Dtype::F64, exact), (Dtype::F32, F32_THROUGHOUT)],
    );
    v.softmax = Softmax::Online { block: 4 };
    out.push(v);

    let mut v = Variant::plain(
        "log-sum-exp",
        "probabilities exp(s - logsumexp(row)); f64, or f32 throughout",
        vec![(Dtype::F64, exact), (Dtype::F32, F32_THROUGHOUT)],
    );
    v.softmax = Softmax::LogSumExp;
    out.push(v);

    let mut v = Variant::plain(
        "alibi-key-position",
        "ALiBi bias +m·(key index in the window); declines ALiBi scores; f64, or f32 angles",
        vec![(Dtype::F64, exact), (Dtype::F32, F32_ANGLES)],
    );
    v.alibi = AlibiForm::KeyPosition;
    out.push(v);

    let mut v = Variant::plain(
        "pre-rotated-cache",
        "decode keeps keys already rotated (or with the absolute encoding added) at their positions, stored in the requested dtype; f32 throughout, or f32 inside with an f16 cache and f16 inputs and outputs",
        vec![(Dtype::F32, F32_THROUGHOUT), (Dtype::F16, fused(Dtype::F16))],
    );
    v.decode = DecodeForm::EncodedCache;
    v.freq_rotary = Freq::Reciprocal;
    out.push(v);

    let mut v = Variant::plain(
        "rel-shift-pad-reshape",
        "Transformer-XL position term over the descending relative sequence, then pad/reshape/drop; f64, or f32 throughout",
        vec![(Dtype::F64, exact), (Dtype::F32, F32_THROUGHOUT)],
    );
    v.xl = XlForm::PadReshape;
    out.push(v);

    let mut v = Variant::plain(
        "rel-shift-gather",
        "Transformer-XL position term for every distance, then a gather by distance; f64, or f32 throughout",
        vec![(Dtype::F64, exact), (Dtype::F32, F32_THROUGHOUT)],
    );
    v.xl = XlForm::Gather;
    out.push(v);

    let mut v = Variant::plain(
        "f32-declared-f64-answer",
        "declares f32, computes with f32 angles and f64 elsewhere, answers f64 arrays",
        vec![(
            Dtype::F32,
            Profile {
                answer: Dtype::F64,
                ..F32_ANGLES
            },
        )],
    );
    v.freq_sinusoid = Freq::ExpLn;
    v.freq_rotary = Freq::Reciprocal;
    out.push(v);

    out
}

/// The plain in-contract kernel of `dtype` that planted bugs are added to: f64 exact,
/// f32 throughout, f16 or bf16 per op.
pub fn base(dtype: Dtype) -> Variant {
    let profile = match dtype {
        Dtype::F32 => F32_THROUGHOUT,
        Dtype::F16 | Dtype::Bf16 => per_op(dtype),
        _ => Profile::EXACT,
    };
    Variant::plain(
        &format!("plain-{dtype}"),
        "plain in-contract kernel",
        vec![(dtype, profile)],
    )
}
