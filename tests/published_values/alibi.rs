//! ALiBi (Press, Smith, Lewis 2022, §3): head slopes and the linear bias.

use std::f64::consts::FRAC_1_SQRT_2;

use ndarray::{s, Array3};
use posconform::alibi::{bias, scores, slopes, AlibiParams, BiasForm};
use posconform::{Scale, Window};

#[test]
fn slopes_for_8_heads_are_halvings_from_one_half() {
    // Press et al. 2022, §3: for 8 heads the slopes are the geometric sequence
    // 1/2^1, 1/2^2, ..., 1/2^8. Powers of two are exact in f64, so equality is exact.
    let expected = [
        0.5, 0.25, 0.125, 0.0625, 0.03125, 0.015625, 0.0078125, 0.00390625,
    ];
    assert_eq!(slopes(8).unwrap(), expected);
}

#[test]
// The literals are the quoted 15-digit values, kept as quoted rather than replaced by
// the std constants they approximate.
#[allow(clippy::approx_constant)]
fn slopes_for_12_heads_interleave_the_16_head_sequence() {
    // The rule for a head count that is not a power of two, as in the authors' released
    // code (from memory; the paper's §3 gives the power-of-two sequence): the 8 slopes of
    // 8 heads, then slopes 1, 3, 5, 7 of 16 heads, 2^-0.5 .. 2^-3.5. Values recomputed with
    // mpmath 1.3.0 at 50 digits (vectors/mpmath/quoted_values.py), quoted to 15
    // significant digits, hence the 1e-15 tolerance.
    let expected = [
        0.5,
        0.25,
        0.125,
        0.0625,
        0.03125,
        0.015625,
        0.0078125,
        0.00390625,
        0.707106781186548,
        0.353553390593274,
        0.176776695296637,
        0.0883883476483184,
    ];
    let got = slopes(12).unwrap();
    assert_eq!(got.len(), expected.len());
    for (g, e) in got.iter().zip(expected) {
        approx::assert_abs_diff_eq!(*g, e, epsilon = 1e-15);
    }
}

#[test]
fn slopes_for_16_heads_are_powers_of_root_one_half() {
    // Press et al. 2022, §3, the power-of-two rule: m_k = 2^(-8k/16) = 2^(-0.5k),
    // k = 1..16. Written here as an exact power of two, times 1/sqrt(2) for odd k, so
    // the only rounding is that of the constant FRAC_1_SQRT_2.
    let got = slopes(16).unwrap();
    assert_eq!(got.len(), 16);
    for (h, &g) in got.iter().enumerate() {
        let k = h as i32 + 1;
        let whole = 0.5f64.powi(k / 2);
        let expected = if k % 2 == 0 {
            whole
        } else {
            whole * FRAC_1_SQRT_2
        };
        assert!(
            (g - expected).abs() <= expected * f64::EPSILON,
            "k = {k}: {g} vs {expected}"
        );
    }
}

#[test]
fn bias_is_minus_slope_times_distance_below_the_diagonal() {
    // Press et al. 2022, §3, Figure 3: the bias added to row i is
    // m · [-(i-1), ..., -2, -1, 0] over the keys up to the query; later keys are masked.
    let got = bias(&[0.5], Window::new(0, 4).unwrap(), BiasForm::Distance, 0).unwrap();
    let hidden = f64::NEG_INFINITY;
    let expected = [
        [0.0, hidden, hidden, hidden],
        [-0.5, 0.0, hidden, hidden],
        [-1.0, -0.5, 0.0, hidden],
        [-1.5, -1.0, -0.5, 0.0],
    ];
    for (i, row) in expected.iter().enumerate() {
        assert_eq!(got.slice(s![0, i, ..]).to_vec(), row.to_vec(), "row {i}");
    }
}

#[test]
fn memory_keys_carry_their_full_distance() {
    // docs/conventions.md: query i sits at p0 + i, key j at p0 - M + j, so with M = 3 memory
    // keys the first query is at distance 3, 2, 1, 0 from keys 0..=3.
    let got = bias(&[0.25], Window::new(3, 2).unwrap(), BiasForm::Distance, 100).unwrap();
    let expected = [
        [-0.75, -0.5, -0.25, 0.0, f64::NEG_INFINITY],
        [-1.0, -0.75, -0.5, -0.25, 0.0],
    ];
    for (i, row) in expected.iter().enumerate() {
        assert_eq!(got.slice(s![0, i, ..]).to_vec(), row.to_vec(), "row {i}");
    }
}

#[test]
fn key_only_form_adds_slope_times_key_position() {
    // The key-only form used by some implementations (common practice): m · pos_j with
    // pos_j = p0 - M + j (docs/conventions.md). p0 = 10, M = 1: keys at 9, 10, 11.
    let got = bias(&[0.5], Window::new(1, 2).unwrap(), BiasForm::KeyOnly, 10).unwrap();
    let expected = [[4.5, 5.0, f64::NEG_INFINITY], [4.5, 5.0, 5.5]];
    for (i, row) in expected.iter().enumerate() {
        assert_eq!(got.slice(s![0, i, ..]).to_vec(), row.to_vec(), "row {i}");
    }
}

#[test]
fn scale_applies_to_q_dot_k_but_not_to_the_bias() {
    // Press et al. 2022, §3: softmax(q·k / sqrt(d) + m · (-distance)).
    // d = 4, q = k = all ones: q·k = 4, scaled by 1/2 → 2; slope 0.25, distance 1 → -0.25.
    let q = Array3::from_elem((1, 1, 4), 1.0);
    let k = Array3::from_elem((1, 2, 4), 1.0);
    let got = scores(q.view(), k.view(), &[0.25], &AlibiParams::default()).unwrap();
    assert_eq!(got.slice(s![0, 0, ..]).to_vec(), vec![1.75, 2.0]);
    let unscaled = AlibiParams {
        scale: Scale::Fixed(1.0),
        ..AlibiParams::default()
    };
    let got = scores(q.view(), k.view(), &[0.25], &unscaled).unwrap();
    assert_eq!(got.slice(s![0, 0, ..]).to_vec(), vec![3.75, 4.0]);
}
