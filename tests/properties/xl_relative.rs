//! Transformer-XL relative scoring: the efficient form against the naive one, and
//! invariance of relative scores under a global position offset.

use ndarray::{s, Array2, Array3};
use posconform::math::Stream;
use posconform::xl_relative::{
    scores, scores_at_positions, scores_naive, standard_positions, RelativeInputs, RelativeParams,
};
use posconform::{Scale, Sinusoid, SinusoidLayout, Window};
use proptest::prelude::*;

use crate::common::{max_visible_diff, RelativeCase};

/// Agreement bound between two summation orders of length-`d` dot products of values
/// in [-1, 1): far above roundoff (~d·u·|terms|), far below any indexing bug.
const SUMMATION_ORDER: f64 = 1e-12;

/// Checks that `candidate` matches the naive per-pair form on every visible entry and
/// masks exactly the hidden ones.
fn matches_naive(
    case: &RelativeCase,
    params: &RelativeParams,
    candidate: impl Fn(&RelativeInputs<'_>, &RelativeParams) -> Array3<f64>,
) -> Result<(), String> {
    let want = scores_naive(&case.inputs(), params).map_err(|e| e.to_string())?;
    let got = candidate(&case.inputs(), params);
    if got.shape() != want.shape() {
        return Err(format!("shape {:?} vs {:?}", got.shape(), want.shape()));
    }
    for ((idx, g), w) in got.indexed_iter().zip(want.iter()) {
        let ok = if w.is_finite() {
            (g - w).abs() <= SUMMATION_ORDER
        } else {
            *g == f64::NEG_INFINITY
        };
        if !ok {
            return Err(format!("at {idx:?}: got {g}, naive {w}"));
        }
    }
    Ok(())
}

fn shapes() -> impl Strategy<Value = (u64, usize, usize, usize, usize, Option<usize>)> {
    (
        any::<u64>(),
        1usize..4,
        1usize..10,
        prop_oneof![Just(0usize), 0usize..14],
        1usize..9,
        prop_oneof![Just(None), (0usize..8).prop_map(Some)],
    )
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(96))]

    /// The efficient relative-shift form equals the naive per-pair form on every
    /// visible entry (and both mask the same entries), for any H, L, M, d, clamp —
    /// including M = 0, M > L, L = 1 and odd L.
    #[test]
    fn efficient_shift_equals_naive((seed, h, l, m, d, clamp) in shapes()) {
        let case = RelativeCase::random(seed, h, l, m, d);
        let params = RelativeParams { clamp_len: clamp, scale: Scale::Fixed(0.37) };
        matches_naive(&case, &params, |i, p| scores(i, p).unwrap()).map_err(TestCaseError::fail)?;
    }
}

/// Planted bug: the shift is off by one (the kernel reads `r[Δ+1]`), so the efficient
/// form must be caught disagreeing with the naive one.
#[test]
fn planted_off_by_one_shift_is_caught() {
    let case = RelativeCase::random(7, 2, 5, 3, 4);
    let mut longer = Stream::new(8).array((2, 9, 4), 1.0);
    longer.slice_mut(s![.., ..8, ..]).assign(&case.r);
    // Same q, k, u, v; the relative table starts one row late.
    let off_by_one = RelativeCase {
        r: longer.slice(s![.., 1.., ..]).to_owned(),
        ..case.clone()
    };
    let buggy = |_: &RelativeInputs<'_>, params: &RelativeParams| {
        scores(&off_by_one.inputs(), params).unwrap()
    };
    let verdict = matches_naive(&case, &RelativeParams::default(), buggy);
    assert!(verdict.is_err(), "an off-by-one shift went unnoticed");
}

/// Relative scores computed with all absolute positions moved by `offset`.
type PositionalScorer<'a> = dyn Fn(&[i64], &[i64]) -> Array3<f64> + 'a;

/// Checks that scores from `scorer` are bit-identical for query start `p0` and
/// `p0 + offset`.
fn offset_invariant(
    scorer: &PositionalScorer<'_>,
    window: Window,
    p0: i64,
    offset: i64,
) -> Result<(), String> {
    let (q0, k0) = standard_positions(window, p0);
    let (q1, k1) = standard_positions(window, p0 + offset);
    let (a, b) = (scorer(&q0, &k0), scorer(&q1, &k1));
    let diff = max_visible_diff(&a, &b);
    if diff == 0.0 {
        Ok(())
    } else {
        Err(format!("scores moved by {diff:e} under offset {offset}"))
    }
}

/// Scores `(x_i + PE(p_i))·(y_j + PE(p_j)) / sqrt(d)` of absolute-sinusoid attention
/// for one head, with the causal mask.
fn absolute_sinusoid_scores(
    x: &Array2<f64>,
    y: &Array2<f64>,
    qp: &[i64],
    kp: &[i64],
) -> Array3<f64> {
    let d = x.ncols();
    let pe = Sinusoid::new(d, 10_000.0, SinusoidLayout::Interleaved).unwrap();
    let (xq, yk) = (x + &pe.table(qp), y + &pe.table(kp));
    let mut out = Array3::from_elem((1, qp.len(), kp.len()), f64::NEG_INFINITY);
    for (i, &a) in qp.iter().enumerate() {
        for (j, &b) in kp.iter().enumerate() {
            if b <= a {
                out[[0, i, j]] = xq.row(i).dot(&yk.row(j)) / (d as f64).sqrt();
            }
        }
    }
    out
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    /// Adding one offset to every absolute position leaves relative scores unchanged,
    /// while absolute-sinusoid scores of the same inputs change.
    #[test]
    fn global_offset_moves_absolute_scores_only(
        (seed, h, l, m, d, _) in shapes(),
        p0 in -10_000i64..10_000,
        offset in 1i64..1_000_000,
    ) {
        let case = RelativeCase::random(seed, h, l, m, 2 * d);
        let window = Window::new(m, l).unwrap();
        let params = RelativeParams::default();
        let relative = |qp: &[i64], kp: &[i64]| {
            scores_at_positions(&case.inputs(), &params, qp, kp).unwrap()
        };
        offset_invariant(&relative, window, p0, offset).map_err(TestCaseError::fail)?;

        let x = case.q.slice(s![0, .., ..]).to_owned();
        let y = case.k.slice(s![0, .., ..]).to_owned();
        let absolute = |qp: &[i64], kp: &[i64]| absolute_sinusoid_scores(&x, &y, qp, kp);
        prop_assert!(offset_invariant(&absolute, window, p0, offset).is_err(),
            "absolute sinusoid scores did not move under a global offset");
    }
}

/// Planted bug: a "relative" kernel that indexes `r` by the key's absolute position
/// (mod the table length) instead of the distance is caught by the invariance check.
#[test]
fn planted_absolute_indexing_breaks_offset_invariance() {
    let case = RelativeCase::random(11, 1, 4, 2, 4);
    let window = Window::new(2, 4).unwrap();
    let rows = case.r.len_of(ndarray::Axis(1)) as i64;
    let buggy = |qp: &[i64], kp: &[i64]| {
        // Query positions all become 0 and keys keep their absolute index, so the
        // "distance" is -pos_key; fold it into the table with rem_euclid.
        let fake_q = vec![rows - 1; qp.len()];
        let fake_k: Vec<i64> = kp.iter().map(|p| p.rem_euclid(rows)).collect();
        scores_at_positions(&case.inputs(), &RelativeParams::default(), &fake_q, &fake_k).unwrap()
    };
    assert!(offset_invariant(&buggy, window, 100, 3).is_err());
}

/// The efficient form works in blocks of query rows; shapes that cross block
/// boundaries (L = 63..=65, 129, 200 with M = 0, 1, 100) still equal the naive form.
#[test]
fn efficient_shift_equals_naive_across_query_blocks() {
    for l in [63, 64, 65, 129, 200] {
        for m in [0, 1, 100] {
            let case = RelativeCase::random((l * 1000 + m) as u64, 2, l, m, 8);
            for clamp in [None, Some(37)] {
                let params = RelativeParams {
                    clamp_len: clamp,
                    scale: Scale::default(),
                };
                matches_naive(&case, &params, |i, p| scores(i, p).unwrap())
                    .unwrap_or_else(|e| panic!("L={l} M={m} clamp={clamp:?}: {e}"));
            }
        }
    }
}
