//! Clipped relative (Shaw et al. 2018, eqs. 3–5) invariants (docs/conventions.md, "clipped").
//!
//! Each invariant is a plain check function shared by its proptest and by a companion
//! test that feeds it a deliberately wrong implementation and shows the check fails.

use ndarray::{Array3, ArrayView3};
use posconform::clipped::{self, embedding_index, ClippedParams};
use posconform::math::Stream;
use posconform::Scale;
use proptest::prelude::*;

use crate::alibi::{cached_decoding_matches_full, decoding_strategy, random_tokens, RunStep, Step};

fn config() -> ProptestConfig {
    ProptestConfig::with_cases(64)
}

/// Key and value embedding tables `[G, 2k+1, d]`, `G` 1 (shared) or `H` (per head).
struct Tables {
    key: Array3<f64>,
    value: Array3<f64>,
    clip: usize,
}

impl Tables {
    fn random(seed: u64, heads: usize, d: usize, clip: usize, per_head: bool) -> Self {
        let mut stream = Stream::new(seed ^ 0x636c_6970);
        let groups = if per_head { heads } else { 1 };
        Tables {
            key: stream.array((groups, 2 * clip + 1, d), 1.0),
            value: stream.array((groups, 2 * clip + 1, d), 1.0),
            clip,
        }
    }

    fn params(&self) -> ClippedParams {
        ClippedParams {
            clip_distance: self.clip,
            scale: Scale::InverseSqrtDim,
        }
    }
}

/// What a written-out implementation takes as `j - i` for query `i` and key `j` after
/// `memory_len` memory keys.
type RelativeOf = fn(memory_len: usize, query: usize, key: usize) -> i64;

/// docs/conventions.md: `j - i` is `pos_key - pos_query = j - (M + i)`.
fn absolute_relative(memory_len: usize, query: usize, key: usize) -> i64 {
    key as i64 - (memory_len + query) as i64
}

/// Eqs. 3–5 of Shaw et al. 2018 pair by pair, with the relative position passed in so
/// that a planted bug is one changed argument.
fn written_out(
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    v: ArrayView3<'_, f64>,
    tables: &Tables,
    relative_of: RelativeOf,
) -> Step {
    let (heads, l, d) = q.dim();
    let key_len = k.dim().1;
    let memory_len = key_len - l;
    let scale = 1.0 / (d as f64).sqrt();
    let group = |h: usize| if tables.key.dim().0 == 1 { 0 } else { h };
    let mut scores = Array3::from_elem((heads, l, key_len), f64::NEG_INFINITY);
    for h in 0..heads {
        for i in 0..l {
            for j in 0..=memory_len + i {
                let row = embedding_index(relative_of(memory_len, i, j), tables.clip);
                let e: f64 = (0..d)
                    .map(|c| q[[h, i, c]] * (k[[h, j, c]] + tables.key[[group(h), row, c]]))
                    .sum();
                scores[[h, i, j]] = scale * e;
            }
        }
    }
    let probs = posconform::attention::masked_softmax(scores.view()).unwrap();
    let dv = v.dim().2;
    let mut outputs = Array3::zeros((heads, l, dv));
    for h in 0..heads {
        for i in 0..l {
            for j in 0..=memory_len + i {
                let row = embedding_index(relative_of(memory_len, i, j), tables.clip);
                for c in 0..dv {
                    outputs[[h, i, c]] +=
                        probs[[h, i, j]] * (v[[h, j, c]] + tables.value[[group(h), row, c]]);
                }
            }
        }
    }
    Step {
        scores,
        probs,
        outputs,
    }
}

fn library(
    q: ArrayView3<'_, f64>,
    k: ArrayView3<'_, f64>,
    v: ArrayView3<'_, f64>,
    tables: &Tables,
) -> Step {
    let params = tables.params();
    let scores = clipped::scores(q, k, tables.key.view(), &params).unwrap();
    let (probs, outputs) =
        clipped::attention(q, k, v, tables.key.view(), tables.value.view(), &params).unwrap();
    Step {
        scores,
        probs,
        outputs,
    }
}

/// The agreement invariant: same hidden entries, and scores, probabilities and
/// outputs within `1e-12` (relative to magnitude).
fn steps_agree(reference: &Step, candidate: &Step) -> Result<(), String> {
    let pairs = [
        ("scores", &reference.scores, &candidate.scores),
        ("probabilities", &reference.probs, &candidate.probs),
        ("outputs", &reference.outputs, &candidate.outputs),
    ];
    for (name, a, b) in pairs {
        if a.shape() != b.shape() {
            return Err(format!("{name}: shapes {:?} vs {:?}", a.shape(), b.shape()));
        }
        for ((index, x), y) in a.indexed_iter().zip(b.iter()) {
            let both_hidden = *x == f64::NEG_INFINITY && *y == f64::NEG_INFINITY;
            // Written so that a NaN on either side counts as disagreement.
            let agree = both_hidden || (x - y).abs() <= 1e-12 * (1.0 + x.abs());
            if !agree {
                return Err(format!("{name} at {index:?}: {x} vs {y}"));
            }
        }
    }
    Ok(())
}

/// `(seed, heads, L, M, d, k, per_head)` with `k` small enough that clipping happens.
fn case_strategy() -> impl Strategy<Value = (u64, usize, usize, usize, usize, usize, bool)> {
    (
        any::<u64>(),
        1usize..=3,
        1usize..=6,
        0usize..=6,
        1usize..=5,
        0usize..=4,
        any::<bool>(),
    )
}

proptest! {
    #![proptest_config(config())]

    /// The library's scores, probabilities and outputs equal eqs. 3–5 evaluated pair
    /// by pair, with shared or per-head tables.
    #[test]
    fn library_equals_the_per_pair_equations(
        (seed, heads, l, m, d, clip, per_head) in case_strategy(),
    ) {
        let mut stream = Stream::new(seed);
        let q = stream.array((heads, l, d), 1.0);
        let k = stream.array((heads, m + l, d), 1.0);
        let v = stream.array((heads, m + l, d), 1.0);
        let tables = Tables::random(seed, heads, d, clip, per_head);
        let reference = written_out(q.view(), k.view(), v.view(), &tables, absolute_relative);
        let candidate = library(q.view(), k.view(), v.view(), &tables);
        prop_assert_eq!(steps_agree(&reference, &candidate), Ok(()));
    }
}

#[test]
fn agreement_check_fails_with_the_relative_sign_flipped() {
    // Fault 3 (docs/faults.md): i - j instead of j - i, so past keys read the rows meant
    // for future keys.
    fn flipped(memory_len: usize, query: usize, key: usize) -> i64 {
        -absolute_relative(memory_len, query, key)
    }
    let mut stream = Stream::new(3);
    let (heads, l, m, d) = (2, 3, 2, 4);
    let q = stream.array((heads, l, d), 1.0);
    let k = stream.array((heads, m + l, d), 1.0);
    let v = stream.array((heads, m + l, d), 1.0);
    let tables = Tables::random(3, heads, d, 2, false);
    let reference = written_out(q.view(), k.view(), v.view(), &tables, absolute_relative);
    let planted = written_out(q.view(), k.view(), v.view(), &tables, flipped);
    assert_eq!(
        steps_agree(&reference, &library(q.view(), k.view(), v.view(), &tables)),
        Ok(())
    );
    assert!(steps_agree(&reference, &planted).is_err());
}

// ---------------------------------------------------------------------------------
// Cached decoding.

proptest! {
    #![proptest_config(config())]

    /// Cached decoding equals the full computation: prefill, then chunks of 1, 2, 3 or
    /// 5 queries with every earlier token as memory give the full pass's scores,
    /// probabilities and outputs, with shared or per-head tables.
    #[test]
    fn cached_decoding_equals_full_computation(
        seed in any::<u64>(),
        heads in 1usize..=3,
        d in 1usize..=5,
        (prefill, decoded, chunk) in decoding_strategy(),
        clip in 0usize..=5,
        per_head in any::<bool>(),
    ) {
        let (q, k, v) = random_tokens(seed, heads, prefill + decoded, d);
        let tables = Tables::random(seed, heads, d, clip, per_head);
        // j - i does not depend on p0, so the query start is not an input.
        let run: &RunStep<'_> = &|q, k, v, _query_start| library(q, k, v, &tables);
        prop_assert_eq!(cached_decoding_matches_full(run, &q, &k, &v, prefill, chunk), Ok(()));
    }
}

#[test]
fn cached_decoding_check_fails_when_the_cache_offset_is_missing() {
    // Fault 10 (docs/faults.md): j - i from indices within the chunk, forgetting M.
    fn chunk_local(_memory_len: usize, query: usize, key: usize) -> i64 {
        key as i64 - query as i64
    }
    let (q, k, v) = random_tokens(9, 2, 9, 4);
    let tables = Tables::random(9, 2, 4, 2, true);
    let run: &RunStep<'_> = &|q, k, v, _query_start| written_out(q, k, v, &tables, chunk_local);
    for chunk in [1, 2, 3, 5] {
        assert!(
            cached_decoding_matches_full(run, &q, &k, &v, 3, chunk).is_err(),
            "chunk {chunk}"
        );
    }
}
