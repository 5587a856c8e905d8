//! The numerical contract (docs/budgets.md): what a kernel declaring one dtype may do, as
//! the unit roundoffs, angle errors and floors its error budget is built from.

use super::precision::Dtype;

/// The unit roundoff of the reference's own f64 arithmetic.
pub const R64: f64 = f64::EPSILON / 2.0;

/// `γ_n = n·u / (1 - n·u)` (Higham 2002, §3.1), with the probabilistic `sqrt(n)·u` once
/// `n·u >= 1/2` (see [`super::precision::accumulation_gamma`]).
pub fn gamma_of(u: f64, n: usize) -> f64 {
    let nu = n as f64 * u;
    if nu < 0.5 {
        nu / (1.0 - nu)
    } else {
        (n as f64).sqrt() * u
    }
}

/// How a scheme turns positions into angles, for [`Contract::angle_error`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AngleScaling {
    /// `θ = p·ω` (sinusoids, unscaled rotary).
    None,
    /// `θ = (p/s)·ω`: linear position interpolation.
    Linear,
    /// `θ = p·ω'` with `ω'` from an NTK-aware base.
    Ntk,
}

/// What the numerical contract (docs/budgets.md) lets a kernel declaring one dtype do,
/// as the unit roundoffs and floor its budget is built from.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Contract {
    /// `u_s`: tables and every elementwise intermediate may be stored in the dtype.
    pub storage: f64,
    /// `u_acc`: dot products and softmax sums accumulate in f32 or wider (in the dtype
    /// itself for f32 and f64).
    pub accumulation: f64,
    /// `u_a`: frequencies and angles `p·ω` are formed in f32 or wider (in f64 for an
    /// f64 kernel).
    pub angle: f64,
    /// `u_s` when the case's inputs are wider than the declared dtype (the harness
    /// rounds them to it when it sends them), 0 when they are already exact in it.
    pub input: f64,
    /// Absolute error allowed below the dtype's normal range: the smallest normal
    /// number for f64, f32 and bf16 (flushing subnormals to zero is common practice on
    /// accelerators), half the subnormal spacing for f16 (gradual underflow).
    pub floor: f64,
}

impl Contract {
    /// The contract of a kernel declaring `dtype` for a case written for `case_dtype`.
    pub fn for_dtype(dtype: Dtype, case_dtype: Dtype) -> Self {
        let wide = dtype.unit_roundoff().min(Dtype::F32.unit_roundoff());
        let rounds_inputs = dtype.unit_roundoff() > case_dtype.unit_roundoff();
        Contract {
            storage: dtype.unit_roundoff(),
            accumulation: wide,
            angle: wide,
            input: if rounds_inputs {
                dtype.unit_roundoff()
            } else {
                0.0
            },
            floor: match dtype {
                Dtype::F64 => f64::MIN_POSITIVE,
                Dtype::F32 | Dtype::Bf16 => f32::MIN_POSITIVE as f64,
                Dtype::F16 => 2f64.powi(-25),
                Dtype::I64 => 0.0,
            },
        }
    }

    /// `γ_n` of the kernel's accumulation.
    pub fn gamma(&self, n: usize) -> f64 {
        gamma_of(self.accumulation, n)
    }

    /// Relative error of a scaled dot product of length `d` (the scores of every
    /// scheme): `γ_d` of the kernel's accumulation, one rounding of the scale product,
    /// and the reference's own f64 `γ_d`.
    pub fn dot_gamma(&self, d: usize) -> f64 {
        self.gamma(d) + self.accumulation + gamma_of(R64, d)
    }

    /// Bound on the error of an angle `θ = p'·ω` formed at the angle precision, from
    /// the position `p`, the true `θ` and `ω`, and how positions are scaled
    /// (docs/budgets.md, "Angles"):
    ///
    /// - `ω = 1` (the first frequency of every formula) is exact, so `θ = p'` carries
    ///   only the rounding of `p` (when it exceeds the angle precision's exact integers)
    ///   and, under linear interpolation, two roundings (`p/s`, or `1/s` then `p·(1/s)`);
    /// - otherwise `ω` carries up to `(4|ln ω| + 2)·u_a` relative, covering the usual
    ///   correct formulas (`base^(-2i/d)`, `exp(-2i·ln(base)/d)`, `1/base^(2i/d)`: each
    ///   rounds an exponent or a logarithm whose error is multiplied by `|ln ω|`), `6u_a`
    ///   more for an NTK-aware base formed at the angle precision, and the product `p'·ω`
    ///   one more `u_a`.
    pub fn angle_error(&self, position: f64, theta: f64, omega: f64, scaling: AngleScaling) -> f64 {
        let u = self.angle;
        let exact_positions = if u < Dtype::F32.unit_roundoff() {
            Dtype::F64.exact_integer_limit()
        } else {
            Dtype::F32.exact_integer_limit()
        };
        let mut relative = if position.abs() > exact_positions {
            u
        } else {
            0.0
        };
        if scaling == AngleScaling::Linear {
            // p/s, or (ω/s)·p and p·(1/s): two roundings even when ω = 1.
            relative += 2.0 * u;
        }
        if omega < 1.0 {
            let ln = if omega > 0.0 {
                libm::log(omega).abs()
            } else {
                0.0
            };
            relative += (4.0 * ln + 3.0) * u;
            if scaling == AngleScaling::Ntk {
                relative += 6.0 * u;
            }
        }
        relative * theta.abs()
    }

    /// Error of one sinusoid or cos/sin table value besides its angle error: sine or
    /// cosine evaluated at the angle precision (2u_a), stored in the dtype (u_s), and
    /// the reference's own value (within 2 ulps of the truth: src/math/angle.rs).
    pub fn table_value_error(&self) -> f64 {
        2.0 * self.angle + self.storage + 3.0 * R64
    }

    /// Relative error `e` of one rotated component besides the angle error, per unit of
    /// `|x_a| + |x_b|`: cos/sin evaluated and stored (`2u_a + u_s`), the two products
    /// and their difference or sum rounded (`2u_s`), the input rounded to the dtype
    /// when the case is wider, and the reference's own rotation (`6·2^-53`).
    pub fn rotated_component_error(&self) -> f64 {
        2.0 * self.angle + 3.0 * self.storage + self.input + 6.0 * R64
    }
}
