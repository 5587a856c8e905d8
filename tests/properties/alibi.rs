//! ALiBi invariants (docs/conventions.md, "alibi"; Press, Smith, Lewis 2022, §3), and the cached
//! decoding check shared with the other relative-bias schemes.
//!
//! Each invariant is a plain check function shared by its proptest and by a companion
//! test that feeds it a deliberately wrong implementation and shows the check fails.

use ndarray::{s, Array3, ArrayView3};
use posconform::alibi::{self, AlibiParams, BiasForm};
use posconform::attention::{attend, dot_scores, masked_softmax};
use posconform::math::Stream;
use posconform::Scale;
use proptest::prelude::*;

fn config() -> ProptestConfig {
    ProptestConfig::with_cases(64)
}

// ---------------------------------------------------------------------------------
// Shared by the cached-decoding properties of alibi, bucketed and clipped.

/// Scores, probabilities and outputs of one causal attention step.
pub(crate) struct Step {
    pub scores: Array3<f64>,
    pub probs: Array3<f64>,
    pub outputs: Array3<f64>,
}

impl Step {
    /// Softmax and value sum of `scores` with the library's shared attention pieces.
    pub fn from_scores(scores: Array3<f64>, v: ArrayView3<'_, f64>) -> Step {
        let probs = masked_softmax(scores.view()).unwrap();
        let outputs = attend(probs.view(), v).unwrap();
        Step {
            scores,
            probs,
            outputs,
        }
    }
}

/// One attention step of a scheme: `(q[H,L,d], k[H,M+L,d], v[H,M+L,d_v], p0)`, where
/// `p0` is the absolute position of the first query (docs/conventions.md).
pub(crate) type RunStep<'a> =
    dyn Fn(ArrayView3<'_, f64>, ArrayView3<'_, f64>, ArrayView3<'_, f64>, i64) -> Step + 'a;

/// Random `(q, k, v)` for `T` tokens, entries in [-1, 1).
pub(crate) fn random_tokens(
    seed: u64,
    heads: usize,
    tokens: usize,
    d: usize,
) -> (Array3<f64>, Array3<f64>, Array3<f64>) {
    let mut stream = Stream::new(seed);
    (
        stream.array((heads, tokens, d), 1.0),
        stream.array((heads, tokens, d), 1.0),
        stream.array((heads, tokens, d), 1.0),
    )
}

fn close(a: f64, b: f64) -> bool {
    (a == f64::NEG_INFINITY && b == f64::NEG_INFINITY) || (a - b).abs() <= 1e-12 * (1.0 + a.abs())
}

/// The cached-decoding check: prefill `prefill` tokens, then decode the rest in chunks
/// of `chunk` (the last may be shorter). A chunk starting at `p` has its queries at
/// positions `p..p+c` and all `p` earlier tokens as memory; every row of its scores,
/// probabilities and outputs must equal row `p + i` of one full causal pass over all
/// tokens (whose columns beyond `p + c` must be hidden).
pub(crate) fn cached_decoding_matches_full(
    run: &RunStep<'_>,
    q: &Array3<f64>,
    k: &Array3<f64>,
    v: &Array3<f64>,
    prefill: usize,
    chunk: usize,
) -> Result<(), String> {
    let tokens = q.dim().1;
    let full = run(q.view(), k.view(), v.view(), 0);
    let mut start = 0;
    let mut size = prefill.min(tokens);
    while start < tokens {
        let end = start + size;
        let step = run(
            q.slice(s![.., start..end, ..]),
            k.slice(s![.., ..end, ..]),
            v.slice(s![.., ..end, ..]),
            start as i64,
        );
        for ((h, i, j), &x) in step.scores.indexed_iter() {
            let y = full.scores[[h, start + i, j]];
            if !close(x, y) {
                return Err(format!(
                    "chunk at {start}: score [{h}, {i}, {j}] = {x}, full pass {y}"
                ));
            }
            let (x, y) = (step.probs[[h, i, j]], full.probs[[h, start + i, j]]);
            if !close(x, y) {
                return Err(format!(
                    "chunk at {start}: probability [{h}, {i}, {j}] = {x}, full pass {y}"
                ));
            }
        }
        for h in 0..q.dim().0 {
            for i in 0..size {
                let beyond = full.scores.slice(s![h, start + i, end..]);
                if beyond.iter().any(|x| *x != f64::NEG_INFINITY) {
                    return Err(format!("full pass row {} sees keys after {end}", start + i));
                }
            }
        }
        for ((h, i, c), &x) in step.outputs.indexed_iter() {
            let y = full.outputs[[h, start + i, c]];
            if !close(x, y) {
                return Err(format!(
                    "chunk at {start}: output [{h}, {i}, {c}] = {x}, full pass {y}"
                ));
            }
        }
        start = end;
        size = chunk.min(tokens - start).max(1);
    }
    Ok(())
}

/// `(prefill, decoded tokens, chunk size)` with chunks of 1, 2, 3 and the odd size 5.
pub(crate) fn decoding_strategy() -> impl Strategy<Value = (usize, usize, usize)> {
    (
        1usize..=6,
        1usize..=11,
        prop::sample::select(vec![1usize, 2, 3, 5]),
    )
}

// ---------------------------------------------------------------------------------
// Slopes.

/// The slope invariant: within each power-of-two block (the whole list when `n` is a
/// power of two; otherwise the first `c = 2^floor(log2 n)` and the remaining `n - c`)
/// slopes strictly decrease with one common ratio `2^(-8/c)`, and a power-of-two count
/// starts at `2^(-8/n)` (so consecutive ratios are `2^(-8/n)`).
fn check_slopes(heads: usize, slopes: &[f64]) -> Result<(), String> {
    if slopes.len() != heads {
        return Err(format!("{} slopes for {heads} heads", slopes.len()));
    }
    let block = 1usize << heads.ilog2();
    let ratio = (-8.0 / block as f64).exp2();
    for (name, part) in [("first", &slopes[..block]), ("second", &slopes[block..])] {
        for pair in part.windows(2) {
            if pair[1] >= pair[0] {
                return Err(format!("{name} block does not decrease: {pair:?}"));
            }
            let got = pair[1] / pair[0];
            if (got - ratio).abs() > 1e-14 {
                return Err(format!("{name} block ratio {got}, expected {ratio}"));
            }
        }
    }
    if heads.is_power_of_two() && (slopes[0] - ratio).abs() > 1e-15 {
        return Err(format!(
            "first slope {}, expected 2^(-8/{heads}) = {ratio}",
            slopes[0]
        ));
    }
    Ok(())
}

proptest! {
    #![proptest_config(config())]

    /// Slopes strictly decrease within each power-of-two block with the ratio
    /// `2^(-8/c)`, and a power-of-two count is geometric from `2^(-8/n)`.
    #[test]
    fn slopes_decrease_geometrically_within_each_block(heads in 1usize..=300) {
        let slopes = alibi::slopes(heads).unwrap();
        prop_assert_eq!(check_slopes(heads, &slopes), Ok(()));
    }
}

/// Fault 21 (docs/faults.md): the power-of-two formula applied to every head count.
fn geometric_for_every_count(heads: usize) -> Vec<f64> {
    (1..=heads)
        .map(|h| (-8.0 * h as f64 / heads as f64).exp2())
        .collect()
}

/// Fault 22 (docs/faults.md): exponent off by one, `2^(-8h/n)` for `h = 0..n`.
fn exponent_off_by_one(heads: usize) -> Vec<f64> {
    (0..heads)
        .map(|h| (-8.0 * h as f64 / heads as f64).exp2())
        .collect()
}

#[test]
fn slope_check_fails_for_geometric_slopes_of_12_heads() {
    assert!(check_slopes(12, &geometric_for_every_count(12)).is_err());
    // The bug is invisible at powers of two, where the two rules agree.
    assert_eq!(check_slopes(8, &geometric_for_every_count(8)), Ok(()));
}

#[test]
fn slope_check_fails_for_an_exponent_off_by_one() {
    assert!(check_slopes(8, &exponent_off_by_one(8)).is_err());
}

// ---------------------------------------------------------------------------------
// Per-row shift.

/// The shift invariant: both score arrays hide the same entries and their softmax
/// probabilities agree.
fn probabilities_agree(reference: &Array3<f64>, candidate: &Array3<f64>) -> Result<(), String> {
    let a = masked_softmax(reference.view()).map_err(|e| e.to_string())?;
    let b = masked_softmax(candidate.view()).map_err(|e| e.to_string())?;
    for ((index, x), y) in a.indexed_iter().zip(b.iter()) {
        let masked = (
            reference[index] == f64::NEG_INFINITY,
            candidate[index] == f64::NEG_INFINITY,
        );
        if masked.0 != masked.1 {
            return Err(format!("mask differs at {index:?}"));
        }
        if (x - y).abs() > 1e-11 {
            return Err(format!("probability at {index:?}: {x} vs {y}"));
        }
    }
    Ok(())
}

fn shift_case_strategy() -> impl Strategy<Value = (u64, usize, usize, usize, usize, i64)> {
    (
        any::<u64>(),
        1usize..=4,
        1usize..=6,
        0usize..=6,
        1usize..=8,
        -1000i64..=1000,
    )
}

fn distance_and_key_only(
    q: &Array3<f64>,
    k: &Array3<f64>,
    slopes: &[f64],
    query_start: i64,
) -> (Array3<f64>, Array3<f64>) {
    let params = |form| AlibiParams {
        scale: Scale::InverseSqrtDim,
        form,
        query_start,
    };
    (
        alibi::scores(q.view(), k.view(), slopes, &params(BiasForm::Distance)).unwrap(),
        alibi::scores(q.view(), k.view(), slopes, &params(BiasForm::KeyOnly)).unwrap(),
    )
}

proptest! {
    #![proptest_config(config())]

    /// A per-row constant shift of the scores leaves the probabilities unchanged: the
    /// key-only form equals the distance form after softmax, at any `p0`, and so does
    /// the distance form plus an arbitrary constant per row.
    #[test]
    fn per_row_shift_leaves_probabilities_unchanged(
        (seed, heads, l, m, d, query_start) in shift_case_strategy(),
    ) {
        let mut stream = Stream::new(seed);
        let q = stream.array((heads, l, d), 1.0);
        let k = stream.array((heads, m + l, d), 1.0);
        let slopes = alibi::slopes(heads).unwrap();
        let (distance, key_only) = distance_and_key_only(&q, &k, &slopes, query_start);
        prop_assert_eq!(probabilities_agree(&distance, &key_only), Ok(()));
        let mut shifted = distance.clone();
        for mut row in shifted.rows_mut() {
            let shift = stream.symmetric(100.0);
            row.mapv_inplace(|x| x + shift);
        }
        prop_assert_eq!(probabilities_agree(&distance, &shifted), Ok(()));
    }
}

#[test]
fn shift_check_fails_for_a_sign_flipped_key_only_bias() {
    // Fault 3 in key-only form: -m·pos_j is the distance bias with its sign flipped
    // (plus a per-row constant), so recent keys are penalised instead of favoured.
    let mut stream = Stream::new(7);
    let (heads, l, m, d, query_start) = (2, 4, 3, 4, 10);
    let q = stream.array((heads, l, d), 1.0);
    let k = stream.array((heads, m + l, d), 1.0);
    let slopes = alibi::slopes(heads).unwrap();
    let (distance, _) = distance_and_key_only(&q, &k, &slopes, query_start);
    let (mut flipped, window) = dot_scores(q.view(), k.view(), Scale::InverseSqrtDim).unwrap();
    for ((h, i, j), x) in flipped.indexed_iter_mut() {
        if window.is_visible(i, j) {
            *x -= slopes[h] * (query_start - m as i64 + j as i64) as f64;
        }
    }
    assert!(probabilities_agree(&distance, &flipped).is_err());
}

// ---------------------------------------------------------------------------------
// Cached decoding.

fn library_step(
    slopes: Vec<f64>,
    form: BiasForm,
) -> impl Fn(ArrayView3<'_, f64>, ArrayView3<'_, f64>, ArrayView3<'_, f64>, i64) -> Step {
    move |q, k, v, query_start| {
        let params = AlibiParams {
            scale: Scale::InverseSqrtDim,
            form,
            query_start,
        };
        let scores = alibi::scores(q, k, &slopes, &params).unwrap();
        let (probs, outputs) = alibi::attention(q, k, v, &slopes, &params).unwrap();
        Step {
            scores,
            probs,
            outputs,
        }
    }
}

proptest! {
    #![proptest_config(config())]

    /// Cached decoding equals the full computation: prefill, then chunks of 1, 2, 3 or
    /// 5 queries at their absolute positions with every earlier token as memory give
    /// the full pass's scores, probabilities and outputs, in both bias forms.
    #[test]
    fn cached_decoding_equals_full_computation(
        seed in any::<u64>(),
        heads in 1usize..=4,
        d in 1usize..=6,
        (prefill, decoded, chunk) in decoding_strategy(),
        key_only in any::<bool>(),
    ) {
        let (q, k, v) = random_tokens(seed, heads, prefill + decoded, d);
        let form = if key_only { BiasForm::KeyOnly } else { BiasForm::Distance };
        let run = library_step(alibi::slopes(heads).unwrap(), form);
        prop_assert_eq!(cached_decoding_matches_full(&run, &q, &k, &v, prefill, chunk), Ok(()));
    }
}

/// Fault 10 (docs/faults.md): the bias uses the query's index within its chunk, as if
/// the chunk started at position 0, instead of its absolute position.
fn step_without_cache_offset(
    slopes: Vec<f64>,
) -> impl Fn(ArrayView3<'_, f64>, ArrayView3<'_, f64>, ArrayView3<'_, f64>, i64) -> Step {
    move |q, k, v, _query_start| {
        let (mut scores, window) = dot_scores(q, k, Scale::InverseSqrtDim).unwrap();
        for ((h, i, j), x) in scores.indexed_iter_mut() {
            if window.is_visible(i, j) {
                *x -= slopes[h] * (i as f64 - j as f64);
            }
        }
        Step::from_scores(scores, v)
    }
}

#[test]
fn cached_decoding_check_fails_when_the_cache_offset_is_missing() {
    let (q, k, v) = random_tokens(11, 2, 9, 4);
    let run = step_without_cache_offset(alibi::slopes(2).unwrap());
    for chunk in [1, 2, 3, 5] {
        assert!(
            cached_decoding_matches_full(&run, &q, &k, &v, 3, chunk).is_err(),
            "chunk {chunk}"
        );
    }
}
