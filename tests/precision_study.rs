//! Precision study: rotary angles formed in f16 or bf16 versus f32 (the phase error of
//! angles grows with position, docs/budgets.md; `angles-in-half-precision` in docs/faults.md).
//!
//! "Formed in dtype T" means exactly this, for position `p` and `θ_j = 10000^(-2j/d)`:
//! 1. `p` is rounded to T;
//! 2. `θ_j`, computed in f64, is rounded to T;
//! 3. their product is rounded to T.
//!
//! The product of two f16 (11-bit significand), two bf16 (8-bit) or two f32 (24-bit)
//! values is done in a wider type where it is exact (f32 for the half types, f64 for
//! f32), so step 3 is a single rounding, as in a kernel that multiplies in T.
//! The reference angle is `p·θ_j` in f64 via `posconform::rotary::Rotary::angles`,
//! whose own error (≈ 11·2^-53·pθ, see tests/published_values/rotary.rs) is below
//! 10^-9 relative to the f32 bound used here. Phase error is the angle error wrapped
//! to [-π, π], because sin and cos only see the angle modulo 2π.
//!
//! Run with `--nocapture` to see the table of errors by position.

use half::{bf16, f16};
use posconform::rotary::{Pairing, Rotary, RotaryParams};
use std::f64::consts::PI;

/// Unit roundoffs (Higham 2002, §2.1: u = 2^-p for a p-bit significand).
const U_F32: f64 = 1.0 / (1u64 << 24) as f64;
const U_F16: f64 = 1.0 / (1u64 << 11) as f64;

/// A storage type angles may be formed in.
#[derive(Debug, Clone, Copy)]
enum AngleDtype {
    F32,
    F16,
    Bf16,
}

/// The angle `p·θ` formed in `dtype` as described in the module docs, returned in f64.
fn angle_formed_in(dtype: AngleDtype, position: i64, theta: f64) -> f64 {
    match dtype {
        AngleDtype::F32 => {
            let product = (position as f32 as f64) * (theta as f32 as f64);
            product as f32 as f64
        }
        AngleDtype::F16 => {
            let product = f16::from_f64(position as f64).to_f32() * f16::from_f64(theta).to_f32();
            f16::from_f32(product).to_f64()
        }
        AngleDtype::Bf16 => {
            let product = bf16::from_f64(position as f64).to_f32() * bf16::from_f64(theta).to_f32();
            bf16::from_f32(product).to_f64()
        }
    }
}

fn wrapped(angle_error: f64) -> f64 {
    let mut x = angle_error.rem_euclid(2.0 * PI);
    if x > PI {
        x -= 2.0 * PI;
    }
    x.abs()
}

fn rope64() -> Rotary {
    Rotary::new(RotaryParams::full(64, Pairing::HalfSplit)).unwrap()
}

/// Largest phase error over all 32 frequencies of d = 64 at `position`.
fn max_phase_error(dtype: AngleDtype, position: i64) -> f64 {
    let rope = rope64();
    let exact = rope.angles(position).unwrap();
    rope.frequencies()
        .iter()
        .zip(&exact)
        .map(|(&theta, &reference)| wrapped(angle_formed_in(dtype, position, theta) - reference))
        .fold(0.0, f64::max)
}

/// Largest phase error over every position in `positions` (all frequencies of d = 64).
fn band_max(dtype: AngleDtype, positions: impl Iterator<Item = i64>) -> f64 {
    positions
        .map(|p| max_phase_error(dtype, p))
        .fold(0.0, f64::max)
}

/// The f32 bound: `p` is exact in f32 for `|p| <= 2^24`; rounding `θ` and the product
/// each contribute a relative `u32`, so `|Δangle| <= (2u32 + u32²)·|p·θ|`; add the
/// f64 reference's `11·2^-53·|p·θ|`. Unwrapped, so it also bounds the phase error.
fn f32_bound(position: i64, theta: f64) -> f64 {
    (2.0 * U_F32 + U_F32 * U_F32 + 11.0 * f64::EPSILON / 2.0) * (position as f64 * theta).abs()
}

#[test]
fn half_types_hold_integers_exactly_only_up_to_2048_and_256() {
    // IEEE 754-2008 binary16 has an 11-bit significand (§3.6); bfloat16, the upper half
    // of binary32, an 8-bit one (common knowledge).
    assert_eq!(f16::from_f64(2048.0).to_f64(), 2048.0);
    assert_eq!(f16::from_f64(2049.0).to_f64(), 2048.0);
    assert_eq!(bf16::from_f64(256.0).to_f64(), 256.0);
    assert_eq!(bf16::from_f64(257.0).to_f64(), 256.0);
    // f16's largest finite value is 65504: beyond, an f16 position is infinite.
    assert!(f16::from_f64(65536.0).to_f64().is_infinite());
}

#[test]
fn f16_phase_error_grows_with_position() {
    // One octave band of positions per row; the worst case in each band is what a
    // kernel meets somewhere in that stretch of context.
    let bands = [(16, 32), (128, 256), (1024, 2048), (8192, 16384)];
    let mut previous = 0.0;
    println!("worst phase error (rad), d = 64, base 10000, by position band:");
    for (low, high) in bands {
        let f16_error = band_max(AngleDtype::F16, low..high);
        let bf16_error = band_max(AngleDtype::Bf16, low..high);
        let f32_error = band_max(AngleDtype::F32, low..high);
        println!(
            "  [{low:>5}, {high:>5}): f16 {f16_error:.3e}  bf16 {bf16_error:.3e}  f32 {f32_error:.3e}"
        );
        if high <= 2048 {
            // Each band is 8× further out and f16's error bound (2u16 + u16²)·p·θ grows
            // 8× with it; demanding at least 2× per band tests growth without relying on
            // where inside a band the worst rounding falls.
            assert!(
                f16_error > 2.0 * previous,
                "band [{low}, {high}): {f16_error} is not > 2 × {previous}"
            );
        } else {
            // Past 2048 f16 cannot hold the position itself and its spacing reaches 8
            // (in [8192, 16384)): the fastest pairs' phase is lost altogether.
            assert!(
                f16_error > PI / 2.0,
                "band [{low}, {high}): only {f16_error}"
            );
        }
        previous = f16_error;
    }
}

#[test]
fn f16_angles_at_position_1857_are_far_outside_f32_tolerance() {
    // Position 1857 with d = 64: a case reported in the field (from the issue).
    let position = 1857;
    let f16_error = max_phase_error(AngleDtype::F16, position);
    let f32_error = max_phase_error(AngleDtype::F32, position);
    // θ_0 = 1 gives the largest f32 bound at this position: 2u32·1857 ≈ 2.2e-4 rad.
    let f32_tolerance = f32_bound(position, 1.0);
    println!(
        "position 1857, d = 64: f16 {f16_error:.4} rad, f32 {f32_error:.3e} rad, f32 bound {f32_tolerance:.3e} rad"
    );
    assert!(f32_error <= f32_tolerance);
    // 1857 is an integer below 2048, so f16 holds it exactly; the error comes from θ
    // rounded to 11 bits (relative 2^-12) and the product rounded where f16's spacing
    // is 1 (in [1024, 2048)): up to ≈ 0.5 + 1857·θ·2^-12 rad. Demand more than a
    // thousand times the f32 tolerance, i.e. more than ~0.2 rad.
    assert!(
        f16_error > 1000.0 * f32_tolerance,
        "f16 error {f16_error} is within 1000 × the f32 tolerance {f32_tolerance}"
    );
    // And the f16 error respects its own derived bound (2u16 + u16²)·p·θ_0.
    assert!(f16_error <= (2.0 * U_F16 + U_F16 * U_F16) * position as f64);
}

#[test]
fn f32_angles_stay_within_the_derived_bound_up_to_one_million() {
    let rope = rope64();
    let probe: Vec<i64> = [0, 1, 255, 256, 1857, 2047, 2048, 2049, 65504, 65535, 65536]
        .into_iter()
        .chain((1..=100).map(|k| k * 9_973)) // a prime stride through the range
        .chain([999_983, 1_000_000])
        .collect();
    let mut worst_ratio: f64 = 0.0;
    let mut worst_error: f64 = 0.0;
    for &position in &probe {
        let exact = rope.angles(position).unwrap();
        for (&theta, &reference) in rope.frequencies().iter().zip(&exact) {
            let error = (angle_formed_in(AngleDtype::F32, position, theta) - reference).abs();
            let bound = f32_bound(position, theta);
            assert!(
                error <= bound,
                "p = {position}, θ = {theta}: f32 angle off by {error} > bound {bound}"
            );
            worst_error = worst_error.max(error);
            if bound > 0.0 {
                worst_ratio = worst_ratio.max(error / bound);
            }
        }
    }
    println!(
        "f32-formed angles up to 10^6: worst |Δangle| {worst_error:.3e} rad \
         (bound at 10^6, θ = 1: {:.3e}), worst error/bound {worst_ratio:.3}",
        f32_bound(1_000_000, 1.0)
    );
}
