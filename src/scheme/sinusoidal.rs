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
//! the sine and cosine ([`crate::math::angle`]), so every table entry is within about one unit
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
        if width == 0 || !width.is_multiple_of(2) {
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

// ---------------------------------------------------------------------------------
// The scheme in cases: parameters, arrays, reference, bounds, random parameters.

/// A sinusoidal case's parameters (`{"name": "sinusoidal", "base": …, "layout": …}`):
/// the sinusoid of width `d` added to queries and keys at their absolute positions,
/// scores scaled by `1/sqrt(d)`.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct SinusoidalSpec {
    /// Frequency base.
    pub base: f64,
    /// Pair layout.
    pub layout: SinusoidLayout,
}

impl SinusoidalSpec {
    fn sinusoid(&self, width: usize) -> Result<Sinusoid> {
        Sinusoid::new(width, self.base, self.layout)
    }
}

/// The frequency index of component `c` in a vector of `width`.
fn pair_of(layout: SinusoidLayout, c: usize, width: usize) -> usize {
    match layout {
        SinusoidLayout::Interleaved => c / 2,
        SinusoidLayout::Concatenated => c % (width / 2),
    }
}

/// Per-element error of a sinusoid table of `pe` at `positions` (the angle error of
/// each entry, its evaluation and storage: docs/budgets.md, "Tables and rotations").
pub(crate) fn table_errors(
    pe: &Sinusoid,
    rows: usize,
    positions: &[i64],
    contract: &crate::math::Contract,
) -> Array2<f64> {
    let width = pe.width();
    Array2::from_shape_fn((rows, width), |(n, c)| {
        let omega = pe.frequencies()[pair_of(pe.layout(), c, width)];
        let p = positions[n] as f64;
        contract.angle_error(p, p * omega, omega, crate::math::AngleScaling::None)
            + contract.table_value_error()
    })
}

impl crate::scheme::absolute::AbsoluteTable for SinusoidalSpec {
    fn rows(
        &self,
        shape: &crate::shape::Shape<'_>,
        _inputs: &crate::scheme::model::Inputs<'_, '_>,
        positions: &[i64],
    ) -> Result<Array2<f64>> {
        Ok(self.sinusoid(shape.head_dim)?.table(positions))
    }

    fn row_errors(
        &self,
        shape: &crate::shape::Shape<'_>,
        rows: &Array2<f64>,
        positions: &[i64],
        contract: &crate::math::Contract,
    ) -> Array2<f64> {
        match self.sinusoid(shape.head_dim) {
            Ok(pe) => table_errors(&pe, rows.nrows(), positions, contract),
            Err(_) => Array2::zeros(rows.raw_dim()),
        }
    }
}

impl crate::scheme::model::SchemeModel for SinusoidalSpec {
    fn scale(&self) -> crate::attention::Scale {
        crate::attention::Scale::InverseSqrtDim
    }

    fn per_head_inputs(&self) -> Option<&'static [&'static str]> {
        Some(&[])
    }

    fn validate(&self, shape: &crate::shape::Shape<'_>) -> Result<()> {
        Sinusoid::new(shape.head_dim, self.base, SinusoidLayout::Interleaved).map(drop)
    }

    fn encode_inputs(&self, shape: &crate::shape::Shape<'_>) -> Vec<crate::shape::InputSpec> {
        vec![crate::shape::InputSpec::positions(shape.query_len)]
    }

    fn encode_output(&self, shape: &crate::shape::Shape<'_>) -> (crate::shape::Output, Vec<usize>) {
        (
            crate::shape::Output::Table,
            vec![shape.query_len, shape.head_dim],
        )
    }

    fn encode(
        &self,
        shape: &crate::shape::Shape<'_>,
        inputs: &crate::scheme::model::Inputs<'_, '_>,
    ) -> Result<ndarray::ArrayD<f64>> {
        let positions = inputs.positions("positions")?;
        Ok(self.sinusoid(shape.head_dim)?.table(&positions).into_dyn())
    }

    fn window_scores(
        &self,
        shape: &crate::shape::Shape<'_>,
        inputs: &crate::scheme::model::Inputs<'_, '_>,
        q: ndarray::ArrayView3<'_, f64>,
        k: ndarray::ArrayView3<'_, f64>,
        p0: i64,
    ) -> Result<ndarray::Array3<f64>> {
        crate::scheme::absolute::window_scores(self, shape, inputs, q, k, p0)
    }

    fn pair_scores(
        &self,
        shape: &crate::shape::Shape<'_>,
        inputs: &crate::scheme::model::Inputs<'_, '_>,
        q: ndarray::ArrayView3<'_, f64>,
        k: ndarray::ArrayView3<'_, f64>,
        positions: &crate::scheme::model::PairPositions,
        scale: crate::attention::Scale,
    ) -> Result<ndarray::Array3<f64>> {
        crate::scheme::absolute::pair_scores(self, shape, inputs, q, k, positions, scale)
    }

    fn score_terms(
        &self,
        shape: &crate::shape::Shape<'_>,
        inputs: &crate::scheme::model::Inputs<'_, '_>,
        q: ndarray::ArrayView3<'_, f64>,
        k: ndarray::ArrayView3<'_, f64>,
        p0: i64,
        contract: &crate::math::Contract,
    ) -> Result<ndarray::Array3<f64>> {
        crate::scheme::absolute::score_terms(self, shape, inputs, q, k, p0, contract)
    }

    fn encode_bounds(
        &self,
        shape: &crate::shape::Shape<'_>,
        inputs: &crate::scheme::model::Inputs<'_, '_>,
        values: &ndarray::ArrayD<f64>,
        contract: &crate::math::Contract,
    ) -> Result<ndarray::ArrayD<f64>> {
        let positions = inputs.positions("positions")?;
        let pe = self.sinusoid(shape.head_dim)?;
        let rows = values.shape().first().copied().unwrap_or(0);
        Ok(table_errors(&pe, rows, &positions, contract)
            .mapv(|e| e + contract.floor)
            .into_dyn())
    }
}

impl crate::scheme::model::SchemeKind for SinusoidalSpec {
    const SOURCE: &'static str = "Vaswani et al. 2017, Attention Is All You Need, §3.5";

    const PARAMETERS: &'static [crate::scheme::model::Parameter] = &[
        crate::scheme::model::Parameter::new("base", crate::scheme::model::ParameterKind::Number),
        crate::scheme::model::Parameter::new(
            "layout",
            crate::scheme::model::ParameterKind::Names(&["interleaved", "concatenated"]),
        ),
    ];

    fn random(stream: &mut crate::math::Stream, _shape: &crate::shape::Shape<'_>) -> Self {
        SinusoidalSpec {
            base: DEFAULT_BASE,
            layout: crate::scheme::model::pick(
                stream,
                &[SinusoidLayout::Interleaved, SinusoidLayout::Concatenated],
            ),
        }
    }
}
