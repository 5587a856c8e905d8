//! T5 bucketed relative bias invariants (docs/conventions.md, "bucketed"; Raffel et al. 2020, §2.1).
//!
//! Each invariant is a plain check function shared by its proptest and by a companion
//! test that feeds it a deliberately wrong implementation and shows the check fails.

use ndarray::{Array2, ArrayView3};
use posconform::attention::dot_scores;
use posconform::bucketed::{self, bucket, BucketedParams, Buckets};
use posconform::math::Stream;
use posconform::Scale;
use proptest::prelude::*;

use crate::alibi::{cached_decoding_matches_full, decoding_strategy, random_tokens, Step};

fn config() -> ProptestConfig {
    ProptestConfig::with_cases(64)
}

type BucketFn = fn(i64, &Buckets) -> usize;

/// The T5 rule written out with the direction and the cap as switches, so each
/// planted bug is one changed argument.
fn bucket_written_out(rel: i64, rule: &Buckets, sign: i64, capped: bool) -> usize {
    let mut n = (sign * -rel) as i128;
    let mut per_direction = rule.num_buckets();
    let mut offset = 0;
    if rule.bidirectional() {
        per_direction /= 2;
        if n < 0 {
            offset = per_direction;
        }
        n = n.abs();
    } else {
        n = n.max(0);
    }
    let max_exact = per_direction / 2;
    if n < max_exact as i128 {
        return offset + n as usize;
    }
    let large = max_exact
        + ((n as f64 / max_exact as f64).ln()
            / (rule.max_distance() as f64 / max_exact as f64).ln()
            * (per_direction - max_exact) as f64) as usize;
    offset
        + if capped {
            large.min(per_direction - 1)
        } else {
            large
        }
}

/// Fault 24 (docs/faults.md): the cap at `nb' - 1` is missing.
fn uncapped(rel: i64, rule: &Buckets) -> usize {
    bucket_written_out(rel, rule, 1, false)
}

/// Fault 23 (docs/faults.md): the direction is flipped (`n = rel` instead of `-rel`).
fn direction_flipped(rel: i64, rule: &Buckets) -> usize {
    bucket_written_out(rel, rule, -1, true)
}

/// A valid rule: `nb` in 2..=64, direction, `max_distance` in `max_exact+1 ..= 1000`.
fn rule_strategy() -> impl Strategy<Value = Buckets> {
    (2usize..=64, any::<bool>())
        .prop_filter("bidirectional needs nb >= 4", |(nb, bi)| !bi || *nb >= 4)
        .prop_flat_map(|(nb, bi)| {
            let max_exact = if bi { nb / 4 } else { nb / 2 };
            (Just(nb), Just(bi), (max_exact + 1)..=1000)
        })
        .prop_map(|(nb, bi, md)| Buckets::new(nb, md, bi).unwrap())
}

/// Small and extreme relative positions alike.
fn relative_strategy() -> impl Strategy<Value = i64> {
    prop_oneof![-2000i64..=2000, any::<i64>()]
}

/// The range invariant: every bucket is `< num_buckets`.
fn check_in_range(bucket_of: BucketFn, rule: &Buckets, rel: i64) -> Result<(), String> {
    let b = bucket_of(rel, rule);
    if b >= rule.num_buckets() {
        return Err(format!(
            "rel {rel}: bucket {b} >= {} buckets ({rule:?})",
            rule.num_buckets()
        ));
    }
    Ok(())
}

/// The causal invariant: a key after the query (`rel > 0`) is bucket 0 under a causal
/// rule.
fn check_future_is_bucket_zero(
    bucket_of: BucketFn,
    rule: &Buckets,
    rel: i64,
) -> Result<(), String> {
    if !rule.bidirectional() && rel > 0 && bucket_of(rel, rule) != 0 {
        return Err(format!(
            "rel {rel}: future key in bucket {}",
            bucket_of(rel, rule)
        ));
    }
    Ok(())
}

proptest! {
    #![proptest_config(config())]

    /// Every bucket index is below `num_buckets`, for any rule and relative position.
    #[test]
    fn every_bucket_is_below_num_buckets(rule in rule_strategy(), rel in relative_strategy()) {
        prop_assert_eq!(check_in_range(bucket, &rule, rel), Ok(()));
    }

    /// Under a causal rule every future key (`rel > 0`) maps to bucket 0.
    #[test]
    fn causal_future_keys_map_to_bucket_zero(rule in rule_strategy(), rel in 1i64..=i64::MAX) {
        prop_assert_eq!(check_future_is_bucket_zero(bucket, &rule, rel), Ok(()));
    }
}

#[test]
fn range_check_fails_without_the_cap() {
    let rule = Buckets::t5(false);
    assert!((-5000i64..=0).any(|rel| check_in_range(uncapped, &rule, rel).is_err()));
}

#[test]
fn future_check_fails_with_the_direction_flipped() {
    let rule = Buckets::t5(false);
    assert!(
        (1i64..=100).any(|rel| check_future_is_bucket_zero(direction_flipped, &rule, rel).is_err())
    );
}

#[test]
fn written_out_rule_agrees_with_the_library_when_unplanted() {
    // Guards the planted variants: with no bug switched on, the test's own rule is
    // the library's, so the failures above come from the planted change alone.
    for rule in [
        Buckets::t5(true),
        Buckets::t5(false),
        Buckets::new(10, 40, true).unwrap(),
    ] {
        for rel in -3000i64..=3000 {
            assert_eq!(
                bucket_written_out(rel, &rule, 1, true),
                bucket(rel, &rule),
                "rel {rel}"
            );
        }
    }
}

// ---------------------------------------------------------------------------------
// Cached decoding.

fn library_step(
    table: Array2<f64>,
    rule: Buckets,
) -> impl Fn(ArrayView3<'_, f64>, ArrayView3<'_, f64>, ArrayView3<'_, f64>, i64) -> Step {
    move |q, k, v, _query_start| {
        // Buckets depend only on pos_key - pos_query, so p0 is not an input.
        let params = BucketedParams::t5(rule);
        let scores = bucketed::scores(q, k, table.view(), &params).unwrap();
        let (probs, outputs) = bucketed::attention(q, k, v, table.view(), &params).unwrap();
        Step {
            scores,
            probs,
            outputs,
        }
    }
}

/// Fault 10 (docs/faults.md): the bucket of `j - i` (indices within the chunk) instead
/// of `pos_key - pos_query = j - (M + i)`.
fn step_without_cache_offset(
    table: Array2<f64>,
    rule: Buckets,
) -> impl Fn(ArrayView3<'_, f64>, ArrayView3<'_, f64>, ArrayView3<'_, f64>, i64) -> Step {
    move |q, k, v, _query_start| {
        let (mut scores, window) = dot_scores(q, k, Scale::Fixed(1.0)).unwrap();
        for ((h, i, j), x) in scores.indexed_iter_mut() {
            if window.is_visible(i, j) {
                *x += table[[h, bucket(j as i64 - i as i64, &rule)]];
            }
        }
        Step::from_scores(scores, v)
    }
}

fn random_table(seed: u64, heads: usize, rule: &Buckets) -> Array2<f64> {
    Stream::new(seed ^ 0x7461_626c).array((heads, rule.num_buckets()), 2.0)
}

/// A rule small enough that 17 tokens reach its logarithmic buckets and its cap.
fn small_rule_strategy() -> impl Strategy<Value = Buckets> {
    (4usize..=12, any::<bool>()).prop_flat_map(|(nb, bi)| {
        let max_exact = if bi { nb / 4 } else { nb / 2 };
        ((max_exact + 1)..=(max_exact + 8)).prop_map(move |md| Buckets::new(nb, md, bi).unwrap())
    })
}

proptest! {
    #![proptest_config(config())]

    /// Cached decoding equals the full computation: prefill, then chunks of 1, 2, 3 or
    /// 5 queries with every earlier token as memory give the full pass's scores,
    /// probabilities and outputs.
    #[test]
    fn cached_decoding_equals_full_computation(
        seed in any::<u64>(),
        heads in 1usize..=4,
        d in 1usize..=6,
        (prefill, decoded, chunk) in decoding_strategy(),
        rule in small_rule_strategy(),
    ) {
        let (q, k, v) = random_tokens(seed, heads, prefill + decoded, d);
        let run = library_step(random_table(seed, heads, &rule), rule);
        prop_assert_eq!(cached_decoding_matches_full(&run, &q, &k, &v, prefill, chunk), Ok(()));
    }
}

#[test]
fn cached_decoding_check_fails_when_the_cache_offset_is_missing() {
    let (q, k, v) = random_tokens(5, 2, 9, 4);
    let rule = Buckets::new(8, 6, false).unwrap();
    let run = step_without_cache_offset(random_table(5, 2, &rule), rule);
    for chunk in [1, 2, 3, 5] {
        assert!(
            cached_decoding_matches_full(&run, &q, &k, &v, 3, chunk).is_err(),
            "chunk {chunk}"
        );
    }
}
