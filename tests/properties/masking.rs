//! Causal masking over `[memory ; current]` (docs/conventions.md): what a query may see.

use ndarray::{s, Array3};
use posconform::attention::{attention, masked_softmax};
use posconform::math::Stream;
use posconform::xl_relative::{scores, terms, RelativeParams};
use posconform::Window;
use proptest::prelude::*;

use crate::common::RelativeCase;

/// A relative-attention kernel under test: inputs and values to `(probs, output)`.
type Kernel = dyn Fn(&RelativeCase, &Array3<f64>) -> (Array3<f64>, Array3<f64>);

fn reference(case: &RelativeCase, values: &Array3<f64>) -> (Array3<f64>, Array3<f64>) {
    let s = scores(&case.inputs(), &RelativeParams::default()).unwrap();
    attention(s.view(), values.view()).unwrap()
}

/// Planted bug: the mask is dropped (future keys leak in).
fn unmasked(case: &RelativeCase, values: &Array3<f64>) -> (Array3<f64>, Array3<f64>) {
    let t = terms(&case.inputs(), &RelativeParams::default()).unwrap();
    let d = case.q.len_of(ndarray::Axis(2)) as f64;
    // Terms a and c are defined for every pair; leaving b and d at zero outside the
    // causal set still gives the future keys finite scores.
    let leaked =
        (&t.content + &t.global_content + &t.content_position + &t.global_position) / d.sqrt();
    attention(leaked.view(), values.view()).unwrap()
}

/// Planted bug: the causal mask is aligned top-left (`j <= i`), not offset by `M`.
fn top_left_mask(case: &RelativeCase, values: &Array3<f64>) -> (Array3<f64>, Array3<f64>) {
    let mut s = scores(&case.inputs(), &RelativeParams::default()).unwrap();
    for mut head in s.outer_iter_mut() {
        for (i, mut row) in head.outer_iter_mut().enumerate() {
            row.slice_mut(s![i + 1..]).fill(f64::NEG_INFINITY);
        }
    }
    attention(s.view(), values.view()).unwrap()
}

/// Checks that replacing the keys and values no query `<= i` may see (keys `j > M+i`)
/// leaves the outputs of queries `0..=i` unchanged.
fn hidden_keys_are_ignored(
    kernel: &Kernel,
    case: &RelativeCase,
    values: &Array3<f64>,
    i: usize,
    seed: u64,
) -> Result<(), String> {
    let (h, l, _) = case.q.dim();
    let m = case.k.len_of(ndarray::Axis(1)) - l;
    let (_, before) = kernel(case, values);
    let mut noise = Stream::new(seed);
    let mut changed = case.clone();
    let mut changed_values = values.clone();
    for head in 0..h {
        for j in m + i + 1..m + l {
            for c in 0..case.k.len_of(ndarray::Axis(2)) {
                changed.k[[head, j, c]] += noise.symmetric(5.0);
                changed_values[[head, j, c]] += noise.symmetric(5.0);
            }
        }
    }
    let (_, after) = kernel(&changed, &changed_values);
    let diff = (&before.slice(s![.., ..=i, ..]) - &after.slice(s![.., ..=i, ..]))
        .iter()
        .fold(0.0f64, |a, x| a.max(x.abs()));
    if diff == 0.0 {
        Ok(())
    } else {
        Err(format!(
            "output of queries 0..={i} moved by {diff:e} when hidden keys changed"
        ))
    }
}

/// Checks that query `i` gives non-zero weight to every memory key and to exactly
/// `M + i + 1` keys in all.
fn sees_memory_and_exactly_its_keys(
    kernel: &Kernel,
    case: &RelativeCase,
    values: &Array3<f64>,
) -> Result<(), String> {
    let (_, l, _) = case.q.dim();
    let m = case.k.len_of(ndarray::Axis(1)) - l;
    let window = Window::new(m, l).unwrap();
    let (probs, _) = kernel(case, values);
    for (h, head) in probs.outer_iter().enumerate() {
        for (i, row) in head.outer_iter().enumerate() {
            if let Some(j) = (0..m).find(|&j| row[j] <= 0.0) {
                return Err(format!(
                    "head {h} query {i} gives no weight to memory key {j}"
                ));
            }
            let seen = row.iter().filter(|p| **p > 0.0).count();
            if seen != window.visible_keys(i).len() {
                return Err(format!(
                    "head {h} query {i} attends to {seen} keys, expected M+i+1 = {}",
                    m + i + 1
                ));
            }
        }
    }
    Ok(())
}

fn case_strategy() -> impl Strategy<Value = (RelativeCase, Array3<f64>, usize, u64)> {
    (any::<u64>(), 1usize..3, 1usize..8, 0usize..10, 1usize..6).prop_flat_map(
        |(seed, h, l, m, d)| {
            (0..l, any::<u64>()).prop_map(move |(i, noise)| {
                let case = RelativeCase::random(seed, h, l, m, d);
                let values = Stream::new(seed ^ 0x5eed).array((h, m + l, d), 1.0);
                (case, values, i, noise)
            })
        },
    )
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    /// Perturbing the keys and values of positions a query must not see leaves its
    /// output bit-identical.
    #[test]
    fn hidden_keys_do_not_reach_the_output((case, values, i, noise) in case_strategy()) {
        hidden_keys_are_ignored(&reference, &case, &values, i, noise).map_err(TestCaseError::fail)?;
    }

    /// Every query gives non-zero weight to every memory key and attends to exactly
    /// `M + i + 1` keys.
    #[test]
    fn every_query_sees_all_memory_and_exactly_m_plus_i_plus_1_keys((case, values, _, _) in case_strategy()) {
        sees_memory_and_exactly_its_keys(&reference, &case, &values).map_err(TestCaseError::fail)?;
    }
}

/// Planted bug: with no mask, changing future keys moves earlier outputs.
#[test]
fn planted_missing_mask_leaks_future() {
    let case = RelativeCase::random(3, 2, 6, 2, 4);
    let values = Stream::new(4).array((2, 8, 4), 1.0);
    assert!(hidden_keys_are_ignored(&unmasked, &case, &values, 1, 9).is_err());
}

/// Planted bug: a top-left aligned mask hides keys in `(i, M+i]`, so the count fails.
#[test]
fn planted_top_left_mask_is_caught() {
    let case = RelativeCase::random(5, 1, 4, 3, 4);
    let values = Stream::new(6).array((1, 7, 4), 1.0);
    assert!(sees_memory_and_exactly_its_keys(&top_left_mask, &case, &values).is_err());
}

/// A fully masked row yields all-zero probabilities and a zero output row, never NaN
/// (docs/conventions.md, "Visibility and masking").
#[test]
fn fully_masked_row_gives_zeros_not_nan() {
    let mut scores = Stream::new(1).array((1, 2, 3), 1.0);
    scores.slice_mut(s![0, 1, ..]).fill(f64::NEG_INFINITY);
    let probs = masked_softmax(scores.view()).unwrap();
    assert!(probs.slice(s![0, 1, ..]).iter().all(|p| *p == 0.0));
    approx::assert_abs_diff_eq!(probs.slice(s![0, 0, ..]).sum(), 1.0, epsilon = 1e-15);
    let values = Stream::new(2).array((1, 3, 2), 1.0);
    let (_, out) = attention(scores.view(), values.view()).unwrap();
    assert!(out.slice(s![0, 1, ..]).iter().all(|x| *x == 0.0));
}
