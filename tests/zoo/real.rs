//! The scalar types the zoo kernels compute in (native `f64` or native `f32`, so an
//! "f32 kernel" really calls `f32::exp`, `f32::cos`, `f32::powf`), and rounding to the
//! half-precision storage types with the `half` crate (round to nearest even).

use std::fmt::Debug;
use std::ops::{Add, Div, Mul, Neg, Sub};

use half::{bf16, f16};
use posconform::math::Dtype;

/// A floating-point type the kernel arithmetic is written over.
pub trait Real:
    Copy
    + Debug
    + PartialOrd
    + Add<Output = Self>
    + Sub<Output = Self>
    + Mul<Output = Self>
    + Div<Output = Self>
    + Neg<Output = Self>
{
    /// 0.
    const ZERO: Self;
    /// 1.
    const ONE: Self;
    /// -inf.
    const NEG_INF: Self;
    /// `x` rounded to this type.
    fn of(x: f64) -> Self;
    /// The value, exactly, as f64.
    fn to_f64(self) -> f64;
    /// `e^self`.
    fn exp(self) -> Self;
    /// Natural logarithm.
    fn ln(self) -> Self;
    /// Square root.
    fn sqrt(self) -> Self;
    /// `self^e`.
    fn powf(self, e: Self) -> Self;
}

macro_rules! real {
    ($t:ty) => {
        impl Real for $t {
            const ZERO: Self = 0.0;
            const ONE: Self = 1.0;
            const NEG_INF: Self = <$t>::NEG_INFINITY;
            fn of(x: f64) -> Self {
                x as $t
            }
            fn to_f64(self) -> f64 {
                self as f64
            }
            fn exp(self) -> Self {
                <$t>::exp(self)
            }
            fn ln(self) -> Self {
                <$t>::ln(self)
            }
            fn sqrt(self) -> Self {
                <$t>::sqrt(self)
            }
            fn powf(self, e: Self) -> Self {
                <$t>::powf(self, e)
            }
        }
    };
}

real!(f64);
real!(f32);

/// `x` rounded to `dtype` (nearest, ties to even), as f64. f64 and i64 leave it alone.
pub fn round_to(dtype: Dtype, x: f64) -> f64 {
    match dtype {
        Dtype::F32 => x as f32 as f64,
        Dtype::F16 => f16::from_f64(x).to_f64(),
        Dtype::Bf16 => bf16::from_f64(x).to_f64(),
        Dtype::F64 | Dtype::I64 => x,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Spot values of the rounding, worked by hand from the formats' definitions:
    /// f16 has 10 fraction bits, so 2049 (= 2^11 + 1) lies halfway between 2048 and 2050
    /// and rounds to the even 2048; bf16 has 7, so 257 rounds to 256; 1 + 2^-24 is the
    /// f32 halfway point above 1 and rounds to 1.
    #[test]
    fn rounding_spot_values() {
        assert_eq!(round_to(Dtype::F16, 2049.0), 2048.0);
        assert_eq!(round_to(Dtype::F16, 2051.0), 2052.0);
        assert_eq!(round_to(Dtype::Bf16, 257.0), 256.0);
        assert_eq!(round_to(Dtype::F32, 1.0 + 2f64.powi(-24)), 1.0);
        assert_eq!(
            round_to(Dtype::F64, 1.0 + 2f64.powi(-52)),
            1.0 + 2f64.powi(-52)
        );
    }
}
