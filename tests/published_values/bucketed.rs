//! T5 bucketed relative bias (Raffel et al. 2020, §2.1): the bucket function.

use ndarray::{Array2, Array3};
use posconform::bucketed::{bucket, scores, BucketedParams, Buckets};

const TABLE_RELATIVE_POSITIONS: [i64; 11] = [-200, -128, -20, -8, -1, 0, 1, 8, 20, 128, 200];

#[test]
fn bidirectional_buckets_match_the_quoted_table() {
    // Bidirectional row, nb = 32, max_distance = 128; the bucket function of the T5 authors' released code (from
    // memory; Raffel et al. 2020, §2.1 describes it in words), evaluated independently in
    // Python (vectors/mpmath/quoted_values.py).
    let expected = [15, 15, 10, 8, 1, 0, 17, 24, 26, 31, 31];
    let rule = Buckets::new(32, 128, true).unwrap();
    for (rel, want) in TABLE_RELATIVE_POSITIONS.iter().zip(expected) {
        assert_eq!(bucket(*rel, &rule), want, "rel = {rel}");
    }
}

#[test]
fn causal_buckets_match_the_quoted_table() {
    // Causal row, nb = 32, max_distance = 128; the bucket function of the T5 authors' released code (from
    // memory; Raffel et al. 2020, §2.1 describes it in words), evaluated independently in
    // Python (vectors/mpmath/quoted_values.py).
    let expected = [31, 31, 17, 8, 1, 0, 0, 0, 0, 0, 0];
    let rule = Buckets::new(32, 128, false).unwrap();
    for (rel, want) in TABLE_RELATIVE_POSITIONS.iter().zip(expected) {
        assert_eq!(bucket(*rel, &rule), want, "rel = {rel}");
    }
}

/// `(first n, bucket)` pairs: bucket `b` holds `n` from its first value up to the next
/// entry's first value (exclusive); the last entry runs to infinity (the cap).
type Boundaries = [(u64, usize)];

fn bucket_from_boundaries(n: u64, exact_below: u64, boundaries: &Boundaries) -> usize {
    if n < exact_below {
        return n as usize;
    }
    boundaries
        .iter()
        .rev()
        .find(|(first, _)| n >= *first)
        .map(|(_, b)| *b)
        .expect("boundaries start at exact_below")
}

// First n of each logarithmic bucket: derived with mpmath 1.3.0 at 50 digits from the
// formula of Raffel et al. 2020 (docs/conventions.md, "bucketed"), as the smallest integer n with
// floor(ln(n/max_exact) / ln(max_distance/max_exact) · (nb' - max_exact)) >= b - max_exact,
// i.e. n >= max_exact · (max_distance/max_exact)^((b - max_exact)/(nb' - max_exact)).
// 16, 32 and 64 (bidirectional) are exact integer boundaries; at n = 128 the formula
// reaches nb' exactly in both directions, and the cap at nb' - 1 takes over.

/// Bidirectional, nb = 32 (16 per direction), max_exact = 8, max_distance = 128.
const BIDIRECTIONAL_BOUNDARIES: [(u64, usize); 8] = [
    (8, 8),
    (12, 9),
    (16, 10),
    (23, 11),
    (32, 12),
    (46, 13),
    (64, 14),
    (91, 15),
];

/// Causal, nb = 32, max_exact = 16, max_distance = 128.
const CAUSAL_BOUNDARIES: [(u64, usize); 16] = [
    (16, 16),
    (19, 17),
    (21, 18),
    (24, 19),
    (27, 20),
    (31, 21),
    (35, 22),
    (40, 23),
    (46, 24),
    (52, 25),
    (59, 26),
    (67, 27),
    (77, 28),
    (87, 29),
    (99, 30),
    (113, 31),
];

#[test]
fn bidirectional_buckets_match_the_mpmath_ranges_for_every_offset_to_1000() {
    let rule = Buckets::new(32, 128, true).unwrap();
    for rel in -1000i64..=1000 {
        // Raffel et al. 2020 (docs/conventions.md): n = -rel; keys after the query (n < 0)
        // use the upper half, offset by 16.
        let n = -rel;
        let offset = if n < 0 { 16 } else { 0 };
        let expected =
            offset + bucket_from_boundaries(n.unsigned_abs(), 8, &BIDIRECTIONAL_BOUNDARIES);
        assert_eq!(bucket(rel, &rule), expected, "rel = {rel}");
    }
}

#[test]
fn causal_buckets_match_the_mpmath_ranges_for_every_offset_to_1000() {
    let rule = Buckets::new(32, 128, false).unwrap();
    for rel in -1000i64..=1000 {
        // Raffel et al. 2020 (docs/conventions.md): n = max(-rel, 0), so keys after the query
        // are all bucket 0.
        let n = (-rel).max(0) as u64;
        let expected = bucket_from_boundaries(n, 16, &CAUSAL_BOUNDARIES);
        assert_eq!(bucket(rel, &rule), expected, "rel = {rel}");
    }
}

#[test]
fn scores_look_up_the_head_row_at_the_bucket_of_each_distance() {
    // With q = k = 0 the score is table[h, bucket]; table[h, b] = 100h + b makes the
    // bucket readable. Query 0 after M = 20 memory keys: key j is at distance 20 - j,
    // i.e. rel = j - 20. Buckets from the causal row quoted above: rel -20 → 17,
    // -8 → 8, -1 → 1, 0 → 0.
    let q = Array3::zeros((2, 1, 3));
    let k = Array3::zeros((2, 21, 3));
    let table = Array2::from_shape_fn((2, 32), |(h, b)| (100 * h + b) as f64);
    let params = BucketedParams::t5(Buckets::t5(false));
    let got = scores(q.view(), k.view(), table.view(), &params).unwrap();
    for (h, base) in [(0usize, 0.0), (1, 100.0)] {
        assert_eq!(got[[h, 0, 0]], base + 17.0, "head {h}, rel -20");
        assert_eq!(got[[h, 0, 12]], base + 8.0, "head {h}, rel -8");
        assert_eq!(got[[h, 0, 19]], base + 1.0, "head {h}, rel -1");
        assert_eq!(got[[h, 0, 20]], base, "head {h}, rel 0");
    }
}

#[test]
fn t5_setting_does_not_scale_q_dot_k() {
    // Raffel et al. 2020 (T5) omit the 1/sqrt(d) scale (from memory: the published
    // code folds it into the initialisation). d = 4, q = k = ones: q·k = 4.
    let q = Array3::from_elem((1, 1, 4), 1.0);
    let k = Array3::from_elem((1, 1, 4), 1.0);
    let table = Array2::zeros((1, 32));
    let params = BucketedParams::t5(Buckets::t5(true));
    let got = scores(q.view(), k.view(), table.view(), &params).unwrap();
    assert_eq!(got[[0, 0, 0]], 4.0);
}
