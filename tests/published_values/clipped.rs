//! Clipped relative positions (Shaw, Uszkoreit, Vaswani 2018, eqs. 3–5).

use ndarray::{s, Array3};
use posconform::clipped::{attention, embedding_index, scores, ClippedParams};
use posconform::Scale;

/// Shaw et al. 2018, eqs. 3–4 with k = 16: row clip(j - i, -16, 16) + 16 for
/// j - i = -20..=20, written out.
const ROWS_AT_CLIP_16: [usize; 41] = [
    0, 0, 0, 0, 0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15, 16, 17, 18, 19, 20, 21, 22,
    23, 24, 25, 26, 27, 28, 29, 30, 31, 32, 32, 32, 32, 32,
];

#[test]
fn relative_positions_clip_at_16() {
    for (rel, want) in (-20i64..=20).zip(ROWS_AT_CLIP_16) {
        assert_eq!(embedding_index(rel, 16), want, "j - i = {rel}");
    }
}

#[test]
fn scores_read_the_clipped_key_embedding_of_each_past_key() {
    // Shaw et al. 2018, eq. 5 with q = 1, k_j = 0, d = 1: e_ij = a^K_ij, and
    // w^K[r] = r makes the row readable. One query after M = 20 memory keys: key j has
    // j - i = j - 20 = -20..=0 (docs/conventions.md positions), rows ROWS_AT_CLIP_16[0..=20].
    let q = Array3::from_elem((1, 1, 1), 1.0);
    let k = Array3::zeros((1, 21, 1));
    let w_key = Array3::from_shape_fn((1, 33, 1), |(_, r, _)| r as f64);
    let params = ClippedParams {
        clip_distance: 16,
        scale: Scale::Fixed(1.0),
    };
    let got = scores(q.view(), k.view(), w_key.view(), &params).unwrap();
    let expected: Vec<f64> = ROWS_AT_CLIP_16[..=20].iter().map(|&r| r as f64).collect();
    assert_eq!(got.slice(s![0, 0, ..]).to_vec(), expected);
}

fn hand_example() -> (Array3<f64>, Array3<f64>, Array3<f64>) {
    // k = 1, d = 2, M = 1, L = 2. w^K rows: 0 for j-i <= -1, 1 for j-i = 0, 2 for +1.
    let q = Array3::from_shape_vec((1, 2, 2), vec![1.0, 0.0, 0.0, 1.0]).unwrap();
    let k = Array3::from_shape_vec((1, 3, 2), vec![1.0, 1.0, 2.0, 0.0, 0.0, 3.0]).unwrap();
    let w_key = Array3::from_shape_vec((1, 3, 2), vec![0.5, 0.0, 0.0, 0.5, 1.0, 1.0]).unwrap();
    (q, k, w_key)
}

#[test]
fn scores_follow_equation_5_on_a_hand_example() {
    // Shaw et al. 2018, eq. 5, computed by hand: e_ij = q_i·(k_j + w^K[clip(j-i)+1]).
    // Query 0 (keys 0, 1 visible; j-i = -1, 0): [1,0]·[1.5,1] = 1.5, [1,0]·[2,0.5] = 2.
    // Query 1 (j-i = -2, -1, 0): [0,1]·[1.5,1] = 1, [0,1]·[2.5,0] = 0, [0,1]·[0,3.5] = 3.5.
    let (q, k, w_key) = hand_example();
    let unscaled = ClippedParams {
        clip_distance: 1,
        scale: Scale::Fixed(1.0),
    };
    let got = scores(q.view(), k.view(), w_key.view(), &unscaled).unwrap();
    assert_eq!(
        got.slice(s![0, 0, ..]).to_vec(),
        vec![1.5, 2.0, f64::NEG_INFINITY]
    );
    assert_eq!(got.slice(s![0, 1, ..]).to_vec(), vec![1.0, 0.0, 3.5]);

    // Eq. 5 divides the whole of q·(k + a) by sqrt(d_z), here sqrt(2).
    let scaled = ClippedParams {
        clip_distance: 1,
        scale: Scale::InverseSqrtDim,
    };
    let got = scores(q.view(), k.view(), w_key.view(), &scaled).unwrap();
    approx::assert_abs_diff_eq!(got[[0, 1, 2]], 3.5 / 2f64.sqrt(), epsilon = 1e-15);
}

#[test]
fn outputs_follow_equation_3_on_a_hand_example() {
    // Shaw et al. 2018, eq. 3, computed by hand. q = 0 makes α uniform over the visible
    // keys. v = [1, 2, 4], w^V = [10, 20, 30], k = 1, M = 1:
    // query 0 sees keys 0 (row 0), 1 (row 1): ((1+10) + (2+20)) / 2 = 16.5;
    // query 1 sees keys 0, 1 (row 0), 2 (row 1): ((1+10) + (2+10) + (4+20)) / 3 = 47/3.
    let (_, k, w_key) = hand_example();
    let q = Array3::zeros((1, 2, 2));
    let v = Array3::from_shape_vec((1, 3, 1), vec![1.0, 2.0, 4.0]).unwrap();
    let w_value = Array3::from_shape_vec((1, 3, 1), vec![10.0, 20.0, 30.0]).unwrap();
    let params = ClippedParams {
        clip_distance: 1,
        scale: Scale::InverseSqrtDim,
    };
    let (_, out) = attention(
        q.view(),
        k.view(),
        v.view(),
        w_key.view(),
        w_value.view(),
        &params,
    )
    .unwrap();
    approx::assert_abs_diff_eq!(out[[0, 0, 0]], 16.5, epsilon = 1e-14);
    approx::assert_abs_diff_eq!(out[[0, 1, 0]], 47.0 / 3.0, epsilon = 1e-14);
}
