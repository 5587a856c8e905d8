//! Rotation angles `p·ω` and their sines and cosines, formed in double-double
//! arithmetic so the reference's own angle error is negligible and machine-independent.
//!
//! A kernel forms `θ = p·ω` in f32 or f64 and carries an error that grows with the
//! position (docs/budgets.md, "Angles"). If the reference formed its angles in plain f64
//! it would carry the same kind of error, and a kernel using another correct formula for
//! `ω` would disagree with it by more than a tight budget allows. Here:
//!
//! - `ω = base^(-e)` is `exp(-e·ln base)` with `exp` and `ln` in double-double
//!   (about 32 significant digits), so `ω` is known to a relative `~1e-31`;
//! - `θ = p·ω` is an exact-position double-double product (`p` is an integer, or `p/s`
//!   formed in double-double for linear interpolation);
//! - `θ` is reduced modulo `2π` with `2π` held in three doubles (Cody–Waite style), so
//!   the reduced angle is accurate to `~|θ|·2^-104` absolute;
//! - sine and cosine of the reduced angle come from the `libm` crate (pure Rust, the same
//!   bits on every machine), corrected for the low part of the angle.
//!
//! The result is within about one unit in the last place of the true value for
//! `|θ| <= 2^40`; `tests/published_values/angles.rs` checks thousands of random angles
//! against 50-digit mpmath values (`vectors/mpmath/angles.json`).
//!
//! The double-double algorithms are the classic error-free transformations: Knuth's
//! two-sum and Dekker's product with Veltkamp splitting (T. J. Dekker, "A floating-point
//! technique for extending the available precision", Numer. Math. 18, 1971), in the form
//! used by the QD library (Hida, Li, Bailey 2001). No fused multiply-add is used, so the
//! results do not depend on the processor.

use std::cell::Cell;

use crate::math::precision::Dtype;

thread_local! {
    static ANGLE_DTYPE: Cell<Option<Dtype>> = const { Cell::new(None) };
}

/// Runs `f` with angles formed the way a plain f32 kernel forms them: `p` and `ω`
/// rounded to f32, their product in f32, and `sinf`/`cosf` of it. The same-precision
/// baseline of a narrow dtype uses this to emulate a kernel at the edge of the
/// numerical contract (docs/budgets.md); the flag is per thread and restored afterwards.
pub fn with_single_precision_angles<R>(f: impl FnOnce() -> R) -> R {
    with_angles_in(Dtype::F32, f)
}

/// Runs `f` with angles formed in `dtype`: `p` and `ω` rounded to it, their product
/// rounded to it, and the f32 sine and cosine of that angle (f64 ones for f64). The
/// faulty variant "angles formed in half precision" uses f16 and bf16; the setting is
/// per thread and restored afterwards.
pub fn with_angles_in<R>(dtype: Dtype, f: impl FnOnce() -> R) -> R {
    struct Restore(Option<Dtype>);
    impl Drop for Restore {
        fn drop(&mut self) {
            ANGLE_DTYPE.with(|p| p.set(self.0));
        }
    }
    let _restore = Restore(ANGLE_DTYPE.with(|p| p.replace(Some(dtype))));
    f()
}

/// A double-double number `hi + lo` with `|lo| <= ulp(hi)/2`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DoubleDouble {
    /// The leading part (the value rounded to f64).
    pub hi: f64,
    /// The trailing part.
    pub lo: f64,
}

/// `ln 2` as a double-double (mpmath 1.3.0, 60 digits, split into two doubles).
const LN2: DoubleDouble = DoubleDouble {
    hi: std::f64::consts::LN_2,
    lo: 2.319_046_813_846_299_6e-17,
};

/// `2π` as three doubles (mpmath 1.3.0, 60 digits, split into three doubles).
const TWO_PI: [f64; 3] = [
    std::f64::consts::TAU,
    2.449_293_598_294_706_4e-16,
    -5.989_539_619_436_679e-33,
];

/// `s + e = a + b` exactly (Knuth's two-sum).
fn two_sum(a: f64, b: f64) -> (f64, f64) {
    let s = a + b;
    let bb = s - a;
    (s, (a - (s - bb)) + (b - bb))
}

/// `s + e = a + b` exactly, when `|a| >= |b|`.
fn quick_two_sum(a: f64, b: f64) -> (f64, f64) {
    let s = a + b;
    (s, b - (s - a))
}

/// Veltkamp's split of `a` into two halves of 26 bits each.
fn split(a: f64) -> (f64, f64) {
    let c = 134_217_729.0 * a; // 2^27 + 1
    let hi = c - (c - a);
    (hi, a - hi)
}

/// `p + e = a·b` exactly (Dekker's product), for `|a·b|` well inside the f64 range.
fn two_prod(a: f64, b: f64) -> (f64, f64) {
    let p = a * b;
    let (ah, al) = split(a);
    let (bh, bl) = split(b);
    (p, ((ah * bh - p) + ah * bl + al * bh) + al * bl)
}

impl DoubleDouble {
    /// An f64 as a double-double.
    pub const fn from_f64(x: f64) -> Self {
        DoubleDouble { hi: x, lo: 0.0 }
    }

    fn renormalised(hi: f64, lo: f64) -> Self {
        let (hi, lo) = quick_two_sum(hi, lo);
        DoubleDouble { hi, lo }
    }

    /// `self · x` for an f64 `x`.
    pub fn mul_f64(self, x: f64) -> Self {
        let (p, e) = two_prod(self.hi, x);
        Self::renormalised(p, e + self.lo * x)
    }

    /// `e^self`, for `|self| < 700`.
    ///
    /// `x = k·ln 2 + r`; `e^r` from its Taylor series on `r/2^10`, squared ten times.
    pub fn exp(self) -> Self {
        let k = libm::floor(self.hi / LN2.hi + 0.5);
        let r = self - LN2.mul_f64(k);
        let r = DoubleDouble {
            hi: r.hi / 1024.0,
            lo: r.lo / 1024.0,
        };
        // s = e^r - 1 = r + r^2/2! + r^3/3! + ...; |r| < 3.4e-4, so 10 terms reach 1e-40.
        let mut term = r;
        let mut s = r;
        for n in 2..=12 {
            term = term * r / DoubleDouble::from_f64(n as f64);
            s = s + term;
            if term.hi.abs() < 1e-36 {
                break;
            }
        }
        // (1 + s)^2 - 1 = 2s + s^2, ten times: e^(1024 r) - 1.
        for _ in 0..10 {
            s = s.mul_f64(2.0) + s * s;
        }
        let one_plus = s + DoubleDouble::from_f64(1.0);
        let scale = libm::exp2(k);
        DoubleDouble {
            hi: one_plus.hi * scale,
            lo: one_plus.lo * scale,
        }
    }

    /// `ln(self)`, for `self > 0`: one Newton step `x + a·e^(-x) - 1` from the f64 log.
    pub fn ln(self) -> Self {
        let x = DoubleDouble::from_f64(libm::log(self.hi));
        x + self * (-x).exp() - DoubleDouble::from_f64(1.0)
    }

    /// The nearest f64.
    pub fn to_f64(self) -> f64 {
        self.hi + self.lo
    }
}

impl std::ops::Add for DoubleDouble {
    type Output = Self;

    fn add(self, other: Self) -> Self {
        let (s, e) = two_sum(self.hi, other.hi);
        let (t, f) = two_sum(self.lo, other.lo);
        let (s, e) = quick_two_sum(s, e + t);
        Self::renormalised(s, e + f)
    }
}

impl std::ops::Neg for DoubleDouble {
    type Output = Self;

    fn neg(self) -> Self {
        DoubleDouble {
            hi: -self.hi,
            lo: -self.lo,
        }
    }
}

impl std::ops::Sub for DoubleDouble {
    type Output = Self;

    fn sub(self, other: Self) -> Self {
        self + -other
    }
}

impl std::ops::Mul for DoubleDouble {
    type Output = Self;

    fn mul(self, other: Self) -> Self {
        let (p, e) = two_prod(self.hi, other.hi);
        Self::renormalised(p, e + (self.hi * other.lo + self.lo * other.hi))
    }
}

impl std::ops::Div for DoubleDouble {
    type Output = Self;

    /// Three quotient digits, as in the QD library's accurate division.
    fn div(self, other: Self) -> Self {
        let q1 = self.hi / other.hi;
        let r = self - other.mul_f64(q1);
        let q2 = r.hi / other.hi;
        let r = r - other.mul_f64(q2);
        let q3 = r.hi / other.hi;
        let (q1, q2) = quick_two_sum(q1, q2);
        DoubleDouble { hi: q1, lo: q2 } + DoubleDouble::from_f64(q3)
    }
}

/// `base^(-numerator/denominator)` in double-double: the frequency `ω_i = base^(-2i/d)`
/// of the sinusoid and rotary schemes, with `numerator = 2i`, `denominator = d`.
pub fn frequency(ln_base: DoubleDouble, numerator: f64, denominator: f64) -> DoubleDouble {
    let exponent = DoubleDouble::from_f64(numerator) / DoubleDouble::from_f64(denominator);
    (-(ln_base * exponent)).exp()
}

/// `(sin θ, cos θ)` for the angle `θ = position · ω`, both within about one unit in
/// the last place for `|θ| <= 2^40`.
///
/// Inside [`with_angles_in`] (and [`with_single_precision_angles`]), the recipe of that
/// dtype instead.
pub fn sin_cos(position: DoubleDouble, omega: DoubleDouble) -> (f64, f64) {
    match ANGLE_DTYPE.with(|p| p.get()) {
        None => {}
        Some(Dtype::F32) => {
            let theta = position.to_f64() as f32 * omega.to_f64() as f32;
            return (libm::sinf(theta) as f64, libm::cosf(theta) as f64);
        }
        Some(Dtype::F64) => {
            let theta = position.to_f64() * omega.to_f64();
            return (libm::sin(theta), libm::cos(theta));
        }
        Some(dtype) => {
            let round = |x: f64| dtype.round(x);
            let theta = round(round(position.to_f64()) * round(omega.to_f64())) as f32;
            return (libm::sinf(theta) as f64, libm::cosf(theta) as f64);
        }
    }
    reduced_sin_cos(position * omega)
}

/// `(sin θ, cos θ)` of a double-double angle, reduced modulo `2π` first.
pub fn reduced_sin_cos(theta: DoubleDouble) -> (f64, f64) {
    // k is an integer below 2^53 for every angle the schemes form (|p| <= 2^53, ω <= 1),
    // so k·TWO_PI[n] are exact two-products.
    let k = libm::round(theta.hi / TWO_PI[0]);
    let mut r = theta;
    for part in TWO_PI {
        let (p, e) = two_prod(k, part);
        r = r - DoubleDouble::renormalised(p, e);
    }
    let (s, c) = (libm::sin(r.hi), libm::cos(r.hi));
    // sin(h + l) = sin h + l·cos h, cos(h + l) = cos h - l·sin h, to first order in
    // |l| <= ulp(h)/2 (the second-order term is below 2^-106).
    (s + c * r.lo, c - s * r.lo)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn exp_and_ln_invert_each_other_to_double_double_precision() {
        for x in [-9.21, -1.0, -0.3, 1e-5, 0.5, 2.0, 9.21] {
            let y = DoubleDouble::from_f64(x).exp().ln();
            let err = (y - DoubleDouble::from_f64(x)).to_f64().abs();
            assert!(err < 1e-30 * x.abs().max(1.0), "x = {x}: {err:e}");
        }
    }

    #[test]
    fn ln2_constant_matches_its_own_exp() {
        // e^(ln 2) = 2 to double-double precision (constant from mpmath 1.3.0).
        let two = LN2.exp();
        assert!((two - DoubleDouble::from_f64(2.0)).to_f64().abs() < 1e-31);
    }

    #[test]
    fn division_recovers_the_dividend() {
        let a = DoubleDouble::from_f64(1.0) / DoubleDouble::from_f64(3.0);
        let back = a.mul_f64(3.0) - DoubleDouble::from_f64(1.0);
        assert!(back.to_f64().abs() < 1e-31);
    }
}
