//! Absolute sinusoidal encoding (Vaswani et al. 2017, "Attention Is All You Need", §3.5).
//!
//! Convention (docs/conventions.md, "sinusoidal"):
//! `PE(p, 2i) = sin(p·ω_i)`, `PE(p, 2i+1) = cos(p·ω_i)` with `ω_i = base^(-2i/d)`,
//! `i = 0..d/2-1`. That is the paper's *interleaved* layout. The *concatenated* layout
//! `[sin(p·ω_0) … sin(p·ω_{d/2-1}) ‖ cos(p·ω_0) … cos(p·ω_{d/2-1})]` is what the
//! Transformer-XL authors' code builds for its relative embeddings. An odd width is an
//! error: there is no cosine partner for the last sine.
//!
//! Positions are any `i64` with `|p| <= 2^53` (so `p` converts to `f64` exactly). The
//! angles `p·ω_i` are formed in double-double arithmetic and reduced modulo `2π` before
//! the sine and cosine ([`crate::angle`]), so every table entry is within about one unit
//! in the last place of the true value for `|p·ω| <= 2^40`, on every machine.

use ndarray::Array2;

use crate::error::{Error, Result};
use crate::math::angle::{self, DoubleDouble};

/// Where the sine and cosine of one frequency sit in the encoding vector.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum SinusoidLayout {
    /// `[sin ω_0, cos ω_0, sin ω_1, cos ω_1, …]`, the paper's layout.
    Interleaved,
    /// `[sin ω_0, …, sin ω_{d/2-1}, cos ω_0, …, cos ω_{d/2-1}]`.
    Concatenated,
}

impl SinusoidLayout {
    /// The indices of the (sin, cos) pair of frequency `i` in a vector of width `width`.
    pub fn pair_indices(self, i: usize, width: usize) -> (usize, usize) {
        match self {
            SinusoidLayout::Interleaved => (2 * i, 2 * i + 1),
            SinusoidLayout::Concatenated => (i, i + width / 2),
        }
    }
}

/// The sinusoidal encoding of one width, base and layout.
#[derive(Debug, Clone, PartialEq)]
pub struct Sinusoid {
    width: usize,
    base: f64,
    layout: SinusoidLayout,
    frequencies: Vec<f64>,
    precise: Vec<DoubleDouble>,
}

/// The base used by the paper (Vaswani et al. 2017, §3.5).
pub const DEFAULT_BASE: f64 = 10_000.0;

impl Sinusoid {
    /// An encoding of even `width > 0` with frequencies `base^(-2i/width)`.
    ///
    /// Errors: odd or zero `width`; `base` not finite and positive.
    pub fn new(width: usize, base: f64, layout: SinusoidLayout) -> Result<Self> {
        if width == 0 || width % 2 != 0 {
            return Err(Error::param("width", "an even number > 0", width));
        }
        if !(base.is_finite() && base > 0.0) {
            return Err(Error::param("base", "a finite number > 0", base));
        }
        let precise = precise_frequencies(width, DoubleDouble::from_f64(base).ln());
        Ok(Sinusoid {
            width,
            base,
            layout,
            frequencies: precise.iter().map(|w| w.to_f64()).collect(),
            precise,
        })
    }

    /// The paper's encoding: base 10000, interleaved.
    pub fn paper(width: usize) -> Result<Self> {
        Self::new(width, DEFAULT_BASE, SinusoidLayout::Interleaved)
    }

    /// Width of one encoding vector.
    pub fn width(&self) -> usize {
        self.width
    }

    /// The base of the frequency progression.
    pub fn base(&self) -> f64 {
        self.base
    }

    /// The layout of the vector.
    pub fn layout(&self) -> SinusoidLayout {
        self.layout
    }

    /// `ω_i = base^(-2i/width)` for `i = 0..width/2`, rounded to f64 (the table itself
    /// uses them in double-double).
    pub fn frequencies(&self) -> &[f64] {
        &self.frequencies
    }

    /// Writes `PE(position)` into `out` (length `width`).
    fn encode_into(&self, position: i64, out: &mut [f64]) {
        let p = DoubleDouble::from_f64(position as f64);
        for (i, &omega) in self.precise.iter().enumerate() {
            let (s, c) = angle::sin_cos(p, omega);
            let (is, ic) = self.layout.pair_indices(i, self.width);
            out[is] = s;
            out[ic] = c;
        }
    }

    /// `PE(position)` as a vector of length `width`.
    pub fn encode(&self, position: i64) -> Vec<f64> {
        let mut out = vec![0.0; self.width];
        self.encode_into(position, &mut out);
        out
    }

    /// One row `PE(p)` per position: shape `[positions.len(), width]`.
    pub fn table(&self, positions: &[i64]) -> Array2<f64> {
        let mut table = Array2::zeros((positions.len(), self.width));
        for (mut row, &p) in table.rows_mut().into_iter().zip(positions) {
            // Rows of a fresh standard-layout array are contiguous.
            self.encode_into(p, row.as_slice_mut().expect("contiguous row"));
        }
        table
    }
}

/// `base^(-2i/width)` for `i = 0..width/2` in double-double, from `ln base`: the
/// frequency progression shared by the sinusoid and rotary schemes.
pub(crate) fn precise_frequencies(width: usize, ln_base: DoubleDouble) -> Vec<DoubleDouble> {
    (0..width / 2)
        .map(|i| angle::frequency(ln_base, (2 * i) as f64, width as f64))
        .collect()
}
