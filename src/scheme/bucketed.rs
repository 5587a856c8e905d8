//! Bucketed relative position bias, as in T5 (Raffel et al. 2020, "Exploring the Limits
//! of Transfer Learning with a Unified Text-to-Text Transformer", §2.1).
//!
//! Convention (docs/conventions.md, "bucketed"; layout and positions as in
//! [`crate::attention`]): `rel = pos_key - pos_query = -(M + i - j)` and `n = -rel`.
//! - Bidirectional: half the buckets per sign; `n < 0` (a key after the query) adds
//!   `nb/2`, then `n = |n|`. Causal: `n = max(n, 0)`, so every future key is bucket 0.
//! - Of the remaining `nb'` buckets (`nb/2` or `nb`), `max_exact = nb'/2`; `n <
//!   max_exact` maps to itself; larger `n` to
//!   `max_exact + int(ln(n / max_exact) / ln(max_distance / max_exact) · (nb' - max_exact))`,
//!   capped at `nb' - 1`.
//!
//! The large-`n` branch is evaluated in `f64` in exactly that operation order, as the
//! published code does. Mathematically it is an integer at some `n` (16, 32, 64 and
//! 128 for the T5 defaults): a different order (say `ln n - ln max_exact`, or
//! multiplying before dividing) can land just below the integer and truncate to the
//! bucket beneath. Integer division of odd counts follows the published code too.
//!
//! Scores add a per-head learned scalar `table[h, bucket]` to `scale · q·k`. T5 uses no
//! `1/sqrt(d)` scaling (it folds it into the weight initialisation), so the T5 setting
//! is `Scale::Fixed(1.0)`; [`BucketedParams::t5`] uses it. Hidden keys are `-inf`, so in
//! scores only distances `Δ >= 0` are looked up; bidirectional buckets still differ
//! from causal ones there (`nb/2` instead of `nb` buckets for the past).
//!
//! # Example
//!
//! ```
//! use posconform::bucketed::{bucket, Buckets};
//!
//! let causal = Buckets::new(32, 128, false)?;
//! let bidirectional = Buckets::new(32, 128, true)?;
//! // docs/conventions.md table: a key 20 positions back, and one 20 positions ahead.
//! assert_eq!(bucket(-20, &causal), 17);
//! assert_eq!(bucket(20, &causal), 0);
//! assert_eq!(bucket(20, &bidirectional), 26);
//! # Ok::<(), posconform::Error>(())
//! ```

use ndarray::{s, Array1, Array3, ArrayD, ArrayView2, ArrayView3, Axis, Zip};

use crate::attention::{attend, masked_softmax, window_for, Scale, Window};
use crate::error::{expect_finite, expect_shape, Error, Result};
use crate::math::{Contract, Stream};
use crate::scheme::alibi::expect_values;
use crate::scheme::model::{
    finite_or_zero, head_products, pick, range, Inputs, PairPositions, Parameter, ParameterKind,
    SchemeKind, SchemeModel,
};
use crate::shape::{InputSpec, Output, Shape};

/// A validated bucketing rule: bucket count, max distance, direction.
///
/// Deserialising goes through [`Buckets::new`], so a file cannot smuggle in an invalid
/// rule.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize, serde::Deserialize)]
#[serde(try_from = "UncheckedBuckets")]
pub struct Buckets {
    num_buckets: usize,
    max_distance: usize,
    bidirectional: bool,
}

/// The serialised fields of [`Buckets`], before validation.
#[derive(serde::Deserialize)]
struct UncheckedBuckets {
    num_buckets: usize,
    max_distance: usize,
    bidirectional: bool,
}

impl TryFrom<UncheckedBuckets> for Buckets {
    type Error = Error;

    fn try_from(raw: UncheckedBuckets) -> Result<Self> {
        Buckets::new(raw.num_buckets, raw.max_distance, raw.bidirectional)
    }
}

impl Buckets {
    /// `num_buckets` buckets in all; distances from `max_distance` on share the last
    /// bucket (of their direction, when `bidirectional`).
    ///
    /// Errors: fewer than one exact bucket (`max_exact = nb'/2 >= 1`, so `nb >= 2`
    /// causal, `nb >= 4` bidirectional), or `max_distance <= max_exact` (the
    /// logarithmic branch would divide by `ln 1 = 0` or run backwards).
    pub fn new(num_buckets: usize, max_distance: usize, bidirectional: bool) -> Result<Self> {
        let minimum = if bidirectional { 4 } else { 2 };
        if num_buckets < minimum {
            return Err(Error::param(
                "num_buckets",
                format!(
                    "num_buckets >= {minimum} ({} buckets leave max_exact >= 1)",
                    if bidirectional {
                        "bidirectional"
                    } else {
                        "causal"
                    }
                ),
                num_buckets,
            ));
        }
        let rule = Buckets {
            num_buckets,
            max_distance,
            bidirectional,
        };
        if max_distance <= rule.max_exact() {
            return Err(Error::param(
                "max_distance",
                format!("max_distance > max_exact = {}", rule.max_exact()),
                max_distance,
            ));
        }
        Ok(rule)
    }

    /// The T5 defaults: 32 buckets, max distance 128. T5's decoder self-attention is
    /// causal (`bidirectional = false`), its encoder bidirectional.
    pub fn t5(bidirectional: bool) -> Self {
        Buckets {
            num_buckets: 32,
            max_distance: 128,
            bidirectional,
        }
    }

    /// `nb`, the number of buckets (the width of the bias table).
    pub fn num_buckets(&self) -> usize {
        self.num_buckets
    }

    /// Distances from this one on share the last bucket.
    pub fn max_distance(&self) -> usize {
        self.max_distance
    }

    /// Whether keys after the query get their own half of the buckets.
    pub fn bidirectional(&self) -> bool {
        self.bidirectional
    }

    /// `nb'`: the buckets available to one direction.
    fn per_direction(&self) -> usize {
        if self.bidirectional {
            self.num_buckets / 2
        } else {
            self.num_buckets
        }
    }

    /// Distances below this map to themselves.
    pub fn max_exact(&self) -> usize {
        self.per_direction() / 2
    }
}

/// The bucket of `relative_position = pos_key - pos_query` (docs/conventions.md).
///
/// Always `< rule.num_buckets()`; for a causal rule every `relative_position > 0` is
/// bucket 0.
pub fn bucket(relative_position: i64, rule: &Buckets) -> usize {
    let per_direction = rule.per_direction();
    // n = -rel, widened so that rel = i64::MIN cannot overflow.
    let n = -(relative_position as i128);
    let (direction_offset, n) = if rule.bidirectional {
        (if n < 0 { per_direction } else { 0 }, n.unsigned_abs())
    } else {
        (0, n.max(0) as u128)
    };
    let max_exact = rule.max_exact();
    let within = if n < max_exact as u128 {
        n as usize
    } else {
        // The published operation order; see the module docs for why it matters.
        let fraction = libm::log(n as f64 / max_exact as f64)
            / libm::log(rule.max_distance as f64 / max_exact as f64)
            * (per_direction - max_exact) as f64;
        // `as` truncates toward zero like `int()` and saturates instead of wrapping.
        max_exact
            .saturating_add(fraction as usize)
            .min(per_direction - 1)
    };
    direction_offset + within
}

/// Parameters of bucketed relative-bias scoring.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct BucketedParams {
    /// The bucketing rule.
    pub buckets: Buckets,
    /// Scale of `q·k` (never applied to the bias). T5 uses `Scale::Fixed(1.0)`.
    pub scale: Scale,
}

impl BucketedParams {
    /// The T5 setting for `buckets`: no score scaling (`Scale::Fixed(1.0)`).
    pub fn t5(buckets: Buckets) -> Self {
        BucketedParams {
            buckets,
            scale: Scale::Fixed(1.0),
        }
    }
}

/// The bias alone, `[H, L, M+L]`: `table[h, bucket(-Δ)]` on visible pairs, `-inf`
/// elsewhere, for `table[H, nb]`.
///
/// Errors: a table of the wrong width, no heads, or non-finite entries.
pub fn bias(table: ArrayView2<'_, f64>, window: Window, rule: &Buckets) -> Result<Array3<f64>> {
    check_table(table, table.nrows(), rule)?;
    let mut out = Array3::zeros((table.nrows(), window.query_len(), window.key_len()));
    let by_distance = descending_buckets(window, rule);
    for (head, row) in out.outer_iter_mut().zip(table.outer_iter()) {
        add_bias_and_mask(
            head,
            window,
            &by_distance,
            row.as_standard_layout().as_slice(),
        );
    }
    Ok(out)
}

/// Bucketed relative-bias scores `[H, L, M+L]`: `scale · q·k + table[h, bucket(-Δ)]` on
/// visible pairs, `-inf` elsewhere.
///
/// Shapes (docs/conventions.md): `q[H, L, d]`, `k[H, M+L, d]`, `table[H, nb]`.
///
/// Errors: shapes that disagree, non-finite inputs or scale.
pub fn scores(
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    table: ArrayView2<'_, f64>,
    params: &BucketedParams,
) -> Result<Array3<f64>> {
    let window = window_for(q, k)?;
    let (heads, l, d) = q.dim();
    check_table(table, heads, &params.buckets)?;
    params.scale.validate()?;
    expect_finite("q", q.iter())?;
    expect_finite("k", k.iter())?;
    let factor = params.scale.factor(d);
    // Buckets depend only on the distance, so they are computed once for all heads.
    let by_distance = descending_buckets(window, &params.buckets);
    let mut out = Array3::zeros((heads, l, window.key_len()));
    Zip::from(out.outer_iter_mut())
        .and(q.outer_iter())
        .and(k.outer_iter())
        .and(table.outer_iter())
        .for_each(|mut head, qh, kh, row| {
            crate::math::product::gemm(factor, &qh, &kh.t(), 0.0, &mut head);
            add_bias_and_mask(
                head,
                window,
                &by_distance,
                row.as_standard_layout().as_slice(),
            );
        });
    Ok(out)
}

/// Bucketed relative-bias attention: `(probabilities[H, L, M+L], outputs[H, L, d_v])`
/// for values `v[H, M+L, d_v]`.
pub fn attention(
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    v: ArrayView3<'_, f64>,
    table: ArrayView2<'_, f64>,
    params: &BucketedParams,
) -> Result<(Array3<f64>, Array3<f64>)> {
    let scores = scores(q, k, table, params)?;
    expect_values(v, q.len_of(Axis(0)), k.len_of(Axis(1)))?;
    let probs = masked_softmax(scores.view())?;
    let out = attend(probs.view(), v)?;
    Ok((probs, out))
}

fn check_table(table: ArrayView2<'_, f64>, heads: usize, rule: &Buckets) -> Result<()> {
    let (th, tb) = table.dim();
    if th == 0 {
        return Err(Error::shape("table", "[H, nb] with H >= 1", &[th, tb]));
    }
    expect_shape("table", &["H", "nb"], &[heads, rule.num_buckets], &[th, tb])?;
    expect_finite("table", table.iter())
}

/// `out[c]` is the bucket of distance `K-1-c` (descending), so that query `i`, whose
/// distances over keys `0..=M+i` run from `M+i` down to 0, reads `out[L-1-i..]`.
fn descending_buckets(window: Window, rule: &Buckets) -> Vec<usize> {
    let key_len = window.key_len();
    (0..key_len)
        .map(|c| bucket(-((key_len - 1 - c) as i64), rule))
        .collect()
}

/// Adds `table_row[bucket]` to one head's visible scores and masks the hidden keys.
fn add_bias_and_mask(
    mut scores: ndarray::ArrayViewMut2<'_, f64>,
    window: Window,
    descending: &[usize],
    table_row: Option<&[f64]>,
) {
    let table_row = table_row.expect("as_standard_layout rows are contiguous");
    let (l, m) = (window.query_len(), window.memory_len());
    // Looked up once per distance, not per pair.
    let bias: Vec<f64> = descending.iter().map(|&b| table_row[b]).collect();
    for (i, mut row) in scores.outer_iter_mut().enumerate() {
        let visible = m + i + 1;
        let start = l - 1 - i;
        Zip::from(row.slice_mut(s![..visible]))
            .and(&bias[start..start + visible])
            .for_each(|x, &b| *x += b);
        row.slice_mut(s![visible..]).fill(f64::NEG_INFINITY);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

    #[test]
    fn max_distance_at_or_below_max_exact_is_an_error() {
        let err = Buckets::new(32, 8, true).unwrap_err().to_string();
        assert!(
            err.contains("`max_distance`") && err.contains("max_exact = 8"),
            "{err}"
        );
        assert!(Buckets::new(32, 16, false).is_err());
        assert!(Buckets::new(32, 17, false).is_ok());
    }

    #[test]
    fn too_few_buckets_is_an_error() {
        assert!(Buckets::new(3, 100, true).is_err());
        assert!(Buckets::new(1, 100, false).is_err());
        assert!(Buckets::new(0, 100, false).is_err());
    }

    #[test]
    fn extreme_relative_positions_do_not_overflow() {
        for rule in [Buckets::t5(true), Buckets::t5(false)] {
            assert!(bucket(i64::MIN, &rule) < 32);
            assert!(bucket(i64::MAX, &rule) < 32);
        }
    }

    #[test]
    fn table_width_and_values_are_checked() {
        let q = Array3::zeros((2, 1, 2));
        let k = Array3::zeros((2, 1, 2));
        let params = BucketedParams::t5(Buckets::t5(false));
        let narrow = Array2::zeros((2, 31));
        let err = scores(q.view(), k.view(), narrow.view(), &params).unwrap_err();
        assert!(err.to_string().contains("`table`"), "{err}");
        let mut table = Array2::zeros((2, 32));
        table[[1, 3]] = f64::NAN;
        assert!(scores(q.view(), k.view(), table.view(), &params).is_err());
        let no_heads = Array2::zeros((0, 32));
        assert!(bias(
            no_heads.view(),
            Window::new(0, 1).unwrap(),
            &Buckets::t5(false)
        )
        .is_err());
    }

    #[test]
    fn deserialising_validates_the_rule() {
        let bad = r#"{"num_buckets": 32, "max_distance": 4, "bidirectional": true}"#;
        assert!(serde_json::from_str::<Buckets>(bad).is_err());
        let good = r#"{"num_buckets": 32, "max_distance": 128, "bidirectional": false}"#;
        assert_eq!(
            serde_json::from_str::<Buckets>(good).unwrap(),
            Buckets::t5(false)
        );
    }
}

// ---------------------------------------------------------------------------------
// The scheme in cases: parameters, arrays, reference, bounds, random parameters.

/// A bucketed case's parameters (`{"name": "bucketed", "num_buckets": …,
/// "max_distance": …, "bidirectional": …, "scale": …}`); the per-head bias table
/// `bias_table[H, num_buckets]` is an input.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct BucketedSpec {
    /// Number of buckets.
    pub num_buckets: usize,
    /// Distance where the logarithmic buckets end.
    pub max_distance: usize,
    /// Whether keys after the query get their own buckets.
    pub bidirectional: bool,
    /// Scale of `q·k` (T5 uses 1).
    pub scale: Scale,
}

impl BucketedSpec {
    fn rule(&self) -> Result<Buckets> {
        Buckets::new(self.num_buckets, self.max_distance, self.bidirectional)
    }

    /// How far the relative positions of `encode` reach on each side of 0: twice the
    /// last logarithmic distance, or the key length if longer (saturating).
    fn reach(&self, shape: &Shape<'_>) -> u64 {
        let sat = |x: usize| u64::try_from(x).unwrap_or(u64::MAX);
        sat(self.max_distance)
            .saturating_mul(2)
            .max(sat(shape.key_len()))
    }
}

impl SchemeModel for BucketedSpec {
    fn scale(&self) -> Scale {
        self.scale
    }

    fn per_head_inputs(&self) -> Option<&'static [&'static str]> {
        Some(&["bias_table"])
    }

    fn validate(&self, _shape: &Shape<'_>) -> Result<()> {
        self.scale.validate()?;
        self.rule().map(drop)
    }

    fn encode_inputs(&self, shape: &Shape<'_>) -> Vec<InputSpec> {
        vec![InputSpec::relative_positions(self.reach(shape))]
    }

    fn window_inputs(&self, shape: &Shape<'_>) -> Vec<InputSpec> {
        vec![InputSpec::uniform(
            "bias_table",
            vec![shape.heads, self.num_buckets],
            2.0,
        )]
    }

    fn encode_output(&self, shape: &Shape<'_>) -> (Output, Vec<usize>) {
        let len = InputSpec::relative_positions(self.reach(shape)).shape;
        (Output::Buckets, len)
    }

    fn encode(&self, _shape: &Shape<'_>, inputs: &Inputs<'_, '_>) -> Result<ArrayD<f64>> {
        let rule = self.rule()?;
        let relative = inputs.positions("relative_positions")?;
        Ok(Array1::from_iter(relative.iter().map(|&r| bucket(r, &rule) as f64)).into_dyn())
    }

    fn window_scores(
        &self,
        _shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        _p0: i64,
    ) -> Result<Array3<f64>> {
        let params = BucketedParams {
            buckets: self.rule()?,
            scale: self.scale,
        };
        scores(q, k, inputs.get2("bias_table")?, &params)
    }

    fn pair_scores(
        &self,
        shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        positions: &PairPositions,
        scale: Scale,
    ) -> Result<Array3<f64>> {
        positions.check(q, k)?;
        let rule = self.rule()?;
        let table = inputs.get2("bias_table")?;
        check_table(table, shape.heads, &rule)?;
        let mut out = head_products(&q.to_owned(), &k.to_owned(), scale.factor(shape.head_dim));
        for ((h, i, j), s) in out.indexed_iter_mut() {
            *s += table[[h, bucket(-positions.distance(i, j), &rule)]];
        }
        Ok(out)
    }

    fn score_terms(
        &self,
        shape: &Shape<'_>,
        inputs: &Inputs<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        _p0: i64,
        contract: &Contract,
    ) -> Result<Array3<f64>> {
        let d = shape.head_dim;
        let factor = self.scale.factor(d).abs();
        let gamma = contract.dot_gamma(d);
        let window = window_for(q, k)?;
        let bias = bias(inputs.get2("bias_table")?, window, &self.rule()?)?;
        let (qa, ka) = (q.mapv(f64::abs), k.mapv(f64::abs));
        Ok(
            head_products(&qa, &ka, factor) * (gamma + contract.storage + 2.0 * contract.input)
                + bias.mapv(|b| finite_or_zero(b).abs()) * (contract.storage + contract.input),
        )
    }

    fn encode_bounds(
        &self,
        _shape: &Shape<'_>,
        _inputs: &Inputs<'_, '_>,
        values: &ArrayD<f64>,
        _contract: &Contract,
    ) -> Result<ArrayD<f64>> {
        Ok(ArrayD::zeros(values.raw_dim()))
    }
}

impl SchemeKind for BucketedSpec {
    const SOURCE: &'static str = "Raffel et al. 2020, T5, §2.1";

    const PARAMETERS: &'static [Parameter] = &[
        Parameter::new("num_buckets", ParameterKind::Number),
        Parameter::new("max_distance", ParameterKind::Number),
        Parameter::new("bidirectional", ParameterKind::Bool),
        Parameter::SCALE,
    ];

    fn random(stream: &mut Stream, _shape: &Shape<'_>) -> Self {
        let num_buckets = pick(stream, &[8usize, 16, 32]);
        BucketedSpec {
            num_buckets,
            max_distance: num_buckets * range(stream, 1, 4),
            bidirectional: stream.below(2) == 0,
            // T5 itself does not scale q·k (1); 1/√d one case in three.
            scale: if stream.below(3) == 0 {
                Scale::InverseSqrtDim
            } else {
                Scale::Fixed(1.0)
            },
        }
    }
}
