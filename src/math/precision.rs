//! Dtypes, rounding emulation and the numbers error budgets are built from
//! (docs/budgets.md).
//!
//! - Unit roundoff `u`: f64 2^-53, f32 2^-24, f16 2^-11, bf16 2^-8.
//! - Dot-product bound: `|fl(x·y) - x·y| <= γ_n Σ|x_i y_i|`, `γ_n = n·u / (1 - n·u)`
//!   (Higham, *Accuracy and Stability of Numerical Algorithms*, 2nd ed., §3.1).
//! - Rounding to f16 and bf16 uses the `half` crate (round to nearest even).

use std::fmt;
use std::str::FromStr;

use half::{bf16, f16};

use crate::error::{Error, Result};

/// The element types a kernel may compute or answer in.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, serde::Serialize, serde::Deserialize,
)]
#[serde(rename_all = "lowercase")]
pub enum Dtype {
    /// IEEE binary64.
    F64,
    /// IEEE binary32.
    F32,
    /// IEEE binary16.
    F16,
    /// bfloat16 (8 exponent bits, 7 fraction bits).
    Bf16,
    /// 64-bit signed integers (bucket indices, positions).
    I64,
}

impl Dtype {
    /// Every dtype, widest float first.
    pub const ALL: &'static [Dtype] =
        &[Dtype::F64, Dtype::F32, Dtype::F16, Dtype::Bf16, Dtype::I64];

    /// The name used in files and on the command line.
    pub fn name(self) -> &'static str {
        match self {
            Dtype::F64 => "f64",
            Dtype::F32 => "f32",
            Dtype::F16 => "f16",
            Dtype::Bf16 => "bf16",
            Dtype::I64 => "i64",
        }
    }

    /// Bytes per element in the little-endian array encoding.
    pub fn size(self) -> usize {
        match self {
            Dtype::F64 | Dtype::I64 => 8,
            Dtype::F32 => 4,
            Dtype::F16 | Dtype::Bf16 => 2,
        }
    }

    /// Whether this is a floating-point type.
    pub fn is_float(self) -> bool {
        self != Dtype::I64
    }

    /// Unit roundoff `u` (docs/budgets.md); 0 for integers.
    pub fn unit_roundoff(self) -> f64 {
        match self {
            Dtype::F64 => 2f64.powi(-53),
            Dtype::F32 => 2f64.powi(-24),
            Dtype::F16 => 2f64.powi(-11),
            Dtype::Bf16 => 2f64.powi(-8),
            Dtype::I64 => 0.0,
        }
    }

    /// `x` rounded to the nearest value of this dtype (ties to even), as f64.
    ///
    /// Integers round to the nearest integer. Overflow gives ±inf, as the hardware does.
    pub fn round(self, x: f64) -> f64 {
        match self {
            Dtype::F64 => x,
            Dtype::F32 => x as f32 as f64,
            Dtype::F16 => f16::from_f64(x).to_f64(),
            Dtype::Bf16 => bf16::from_f64(x).to_f64(),
            Dtype::I64 => x.round(),
        }
    }

    /// Whether `x` is exactly representable in this dtype.
    pub fn represents(self, x: f64) -> bool {
        x.is_nan() || self.round(x) == x
    }

    /// The spacing of this dtype's values at `x` (one unit in the last place).
    pub fn ulp(self, x: f64) -> f64 {
        if !self.is_float() {
            return 1.0;
        }
        let (mantissa_bits, min_exponent) = match self {
            Dtype::F64 => (52, -1022),
            Dtype::F32 => (23, -126),
            Dtype::F16 => (10, -14),
            Dtype::Bf16 => (7, -126),
            Dtype::I64 => unreachable!(),
        };
        // The binary exponent read off the f64 bits (exact, unlike a rounded log2);
        // zero, subnormals and non-finite values take the dtype's smallest exponent.
        let field = ((x.to_bits() >> 52) & 0x7ff) as i32;
        let exponent = if field == 0 || field == 0x7ff {
            min_exponent
        } else {
            (field - 1023).max(min_exponent)
        };
        pow2(exponent - mantissa_bits)
    }

    /// `γ_n = n·u / (1 - n·u)` (Higham 2002, §3.1); infinite once `n·u >= 1`.
    pub fn gamma(self, n: usize) -> f64 {
        let nu = n as f64 * self.unit_roundoff();
        if nu >= 1.0 {
            f64::INFINITY
        } else {
            nu / (1.0 - nu)
        }
    }

    /// Largest integer `N` such that every integer in `[-N, N]` is exact in this dtype
    /// (f16: 2048, bf16: 256: IEEE 754 binary16 has an 11-bit significand, bfloat16 an 8-bit one).
    pub fn exact_integer_limit(self) -> f64 {
        match self {
            Dtype::F64 => 2f64.powi(53),
            Dtype::F32 => 2f64.powi(24),
            Dtype::F16 => 2048.0,
            Dtype::Bf16 => 256.0,
            Dtype::I64 => i64::MAX as f64,
        }
    }
}

impl fmt::Display for Dtype {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl FromStr for Dtype {
    type Err = Error;

    fn from_str(s: &str) -> Result<Self> {
        Dtype::ALL
            .iter()
            .copied()
            .find(|d| d.name() == s)
            .ok_or_else(|| Error::param("dtype", "one of f64, f32, f16, bf16, i64", s))
    }
}

/// `2^k` for `-1074 <= k <= 1023`, built from its bits.
fn pow2(k: i32) -> f64 {
    if k >= -1022 {
        f64::from_bits(((k + 1023) as u64) << 52)
    } else {
        f64::from_bits(1u64 << (k + 1074).max(0))
    }
}

/// Distance between `a` and `b` in units in the last place of `dtype` at `b`.
pub fn ulp_distance(a: f64, b: f64, dtype: Dtype) -> f64 {
    if a == b {
        return 0.0;
    }
    if !a.is_finite() || !b.is_finite() {
        return f64::INFINITY;
    }
    (a - b).abs() / dtype.ulp(b)
}

/// `γ_n` for a reduction of `n` terms computed by a kernel of `dtype`, accumulating
/// in f32 or wider (common practice in fused attention kernels: half-precision inputs,
/// f32 accumulators). Once `n·u >= 1/2`, where the deterministic bound degrades, the
/// probabilistic `sqrt(n)·u` (Higham and Mary 2019, "A new approach to probabilistic
/// rounding error analysis", from memory) keeps it finite.
pub fn accumulation_gamma(dtype: Dtype, n: usize) -> f64 {
    let u = dtype.unit_roundoff().min(Dtype::F32.unit_roundoff());
    let nu = n as f64 * u;
    if nu < 0.5 {
        nu / (1.0 - nu)
    } else {
        (n as f64).sqrt() * u
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The spacing of representable values, checked against the next value up, which
    /// the standard library and the `half` crate compute independently.
    #[test]
    fn ulp_is_the_gap_to_the_next_value() {
        for x in [
            1.0, 0.75, 1.5, 3.0, 1e-300, 2.5e-310, 1e300, 1024.0, 1023.999,
        ] {
            assert_eq!(
                Dtype::F64.ulp(x),
                f64::from_bits(x.to_bits() + 1) - x,
                "{x}"
            );
        }
        for x in [1.0f32, 0.75, 3.0, 1e-30, 1e30, 65504.0] {
            let next = f32::from_bits(x.to_bits() + 1);
            assert_eq!(Dtype::F32.ulp(x as f64), (next - x) as f64, "{x}");
        }
        for x in [1.0, 0.5, 2048.0, 6.1e-5, 1e-7] {
            let h = f16::from_f64(x);
            let next = f16::from_bits(h.to_bits() + 1);
            assert_eq!(
                Dtype::F16.ulp(h.to_f64()),
                next.to_f64() - h.to_f64(),
                "{x}"
            );
        }
        assert_eq!(Dtype::F64.ulp(0.0), 5e-324);
        assert_eq!(Dtype::Bf16.ulp(1.0), 2f64.powi(-7));
    }
}
