//! Rotary (RoPE) against published check values and the mpmath table.
//!
//! Every quoted 15-digit value used here was recomputed with mpmath 1.3.0 at 50 digits
//! (vectors/mpmath/quoted_values.py; the long rotations in vectors/mpmath/rope.py) and
//! agrees to every quoted digit.

use ndarray::Array3;
use posconform::rotary::{
    self, ntk_base, Pairing, Rotary, RotaryParams, RotaryScaling, DEFAULT_BASE,
};
use posconform::Scale;

/// f64 unit roundoff (Higham 2002, §2.1: u = 2^-p for a p-bit significand).
const U: f64 = f64::EPSILON / 2.0;

/// Half a unit in the last place of a value quoted to `significant` digits: how far the
/// quoted decimal may sit from the true value.
fn quote_error(x: f64, significant: i32) -> f64 {
    if x == 0.0 {
        return 0.0;
    }
    let exponent = x.abs().log10().floor() as i32;
    0.5 * 10f64.powi(exponent - significant + 1)
}

/// A first-order bound on the f64 error of each rotated element, against the exact
/// rotation of the same (exactly representable) input.
///
/// For pair `j` at position `p`, with `e = 2j/d_rot`:
/// - `θ_j = base.powf(-e)`: the exponent is rounded (relative error `u·e`, which `pow`
///   magnifies by `ln(base)`), and `powf` adds about one ulp: `(e·ln(base) + 1)·u`;
/// - the angle `p·θ_j` adds one rounding: `|Δangle| <= (e·ln(base) + 2)·u·|p·θ_j|`;
/// - `sin`/`cos` are within an ulp (`<= u` absolute for results in [-1, 1]) of the
///   rounded angle, and `x_a·c - x_b·s` adds three roundings of size `<= u·(|x_a|+|x_b|)`.
///
/// So `|Δy| <= (|x_a|+|x_b|)·(|Δangle| + 4u)`. The factor 2 covers second-order
/// terms and libm's ulp claims being approximate, not a fudge for observed misses.
fn rotation_bounds(x: &[f64], position: i64, base: f64, pairing: Pairing) -> Vec<f64> {
    let d = x.len();
    let mut bounds = vec![0.0; d];
    for j in 0..d / 2 {
        let exponent = (2 * j) as f64 / d as f64;
        let angle = (position as f64 * base.powf(-exponent)).abs();
        let angle_error = (exponent * base.ln() + 2.0) * U * angle;
        let (a, b) = pairing.pair_indices(j, d);
        let bound = 2.0 * (x[a].abs() + x[b].abs()) * (angle_error + 4.0 * U);
        bounds[a] = bound;
        bounds[b] = bound;
    }
    bounds
}

fn rope(d: usize, pairing: Pairing) -> Rotary {
    Rotary::new(RotaryParams::full(d, pairing)).expect("valid parameters")
}

fn assert_rotation(pairing: Pairing, position: i64, expected: [f64; 4]) {
    let x = [1.0, 2.0, 3.0, 4.0];
    let got = rope(4, pairing).rotate(&x, position).unwrap();
    let bounds = rotation_bounds(&x, position, DEFAULT_BASE, pairing);
    for (i, ((g, e), b)) in got.iter().zip(expected).zip(bounds).enumerate() {
        let tolerance = b + quote_error(e, 15);
        assert!(
            (g - e).abs() <= tolerance,
            "{pairing:?} m={position} [{i}]: got {g}, expected {e}, |diff| {} > {tolerance}",
            (g - e).abs()
        );
    }
}

#[test]
fn frequencies_of_d4_base_10000_are_1_and_one_hundredth() {
    // The d = 4 checks use θ = [1, 0.01]: 10000^(-0/4) = 1, 10000^(-2/4) = 0.01.
    let theta = rope(4, Pairing::Adjacent).frequencies().to_vec();
    assert_eq!(theta[0], 1.0);
    assert!((theta[1] - 0.01).abs() <= 2.0 * 0.01 * f64::EPSILON);
}

#[test]
fn adjacent_pairs_at_m1_match_the_mpmath_values() {
    // RoFormer eq. 34 (adjacent pairs), x = [1, 2, 3, 4]; recomputed with mpmath 1.3.0 at 50 digits (vectors/mpmath/quoted_values.py).
    assert_rotation(
        Pairing::Adjacent,
        1,
        [
            -1.14263966374765,
            1.92207559654418,
            2.95985066791333,
            4.02979950166916,
        ],
    );
}

#[test]
fn adjacent_pairs_at_m10_match_the_mpmath_values() {
    // RoFormer eq. 34 (adjacent pairs), x = [1, 2, 3, 4]; recomputed with mpmath 1.3.0 at 50 digits (vectors/mpmath/quoted_values.py).
    assert_rotation(
        Pairing::Adjacent,
        10,
        [
            0.248970692702287,
            -2.22216416904227,
            2.58567882924676,
            4.27951691105259,
        ],
    );
}

#[test]
fn half_split_pairs_at_m1_match_the_mpmath_values() {
    // Half-split pairs (common practice), x = [1, 2, 3, 4]; recomputed with mpmath 1.3.0 at 50 digits (vectors/mpmath/quoted_values.py).
    assert_rotation(
        Pairing::HalfSplit,
        1,
        [
            -1.98411064855555,
            1.95990066749666,
            2.46237790241232,
            4.01979966833499,
        ],
    );
}

#[test]
fn half_split_pairs_at_m10_match_the_mpmath_values() {
    // Half-split pairs (common practice), x = [1, 2, 3, 4]; recomputed with mpmath 1.3.0 at 50 digits (vectors/mpmath/quoted_values.py).
    assert_rotation(
        Pairing::HalfSplit,
        10,
        [
            0.792991803591657,
            1.59067466396874,
            -3.06123569811873,
            4.17968349440576,
        ],
    );
}

/// `<R_m q, R_n k>` in f64 and a bound on its error from the rotation bounds plus the
/// dot product's own `γ_d Σ|q̃_i k̃_i|` (Higham, 2nd ed., §3.1).
fn relative_dot(pairing: Pairing, m: i64, n: i64) -> (f64, f64) {
    let q = [0.5, -1.0, 2.0, 0.25];
    let k = [1.5, 0.75, -0.5, 1.0];
    let rope = rope(4, pairing);
    let (qr, kr) = (rope.rotate(&q, m).unwrap(), rope.rotate(&k, n).unwrap());
    let (qb, kb) = (
        rotation_bounds(&q, m, DEFAULT_BASE, pairing),
        rotation_bounds(&k, n, DEFAULT_BASE, pairing),
    );
    let dot: f64 = qr.iter().zip(&kr).map(|(a, b)| a * b).sum();
    let gamma = 4.0 * U / (1.0 - 4.0 * U);
    let bound: f64 = (0..4)
        .map(|i| {
            qb[i] * (kr[i].abs() + kb[i]) + kb[i] * qr[i].abs() + gamma * (qr[i] * kr[i]).abs()
        })
        .sum();
    (dot, bound)
}

#[test]
fn relative_check_depends_only_on_distance() {
    // Relative property (RoFormer eq. 16: <R_m q, R_n k> = q^T R_{n-m} k), adjacent
    // pairing, q = [0.5, -1, 2, 0.25], k = [1.5, 0.75, -0.5, 1]; recomputed with mpmath 1.3.0 at 50 digits (vectors/mpmath/quoted_values.py).
    for (m, n, expected) in [
        (5, 3, 0.997579837021553),
        (2, 0, 0.997579837021553),
        (102, 100, 0.997579837021553),
        (3, 5, -2.49727984702142),
    ] {
        let (dot, bound) = relative_dot(Pairing::Adjacent, m, n);
        let tolerance = bound + quote_error(expected, 15);
        assert!(
            (dot - expected).abs() <= tolerance,
            "(m, n) = ({m}, {n}): got {dot}, expected {expected}, tolerance {tolerance}"
        );
    }
}

#[test]
fn ntk_aware_base_for_d128_matches_the_mpmath_values() {
    // NTK-aware base b' = b·s^(d/(d-2)) (Peng et al. 2023, YaRN, Def. 1),
    // d = 128, b = 10000; recomputed with mpmath 1.3.0 at 50 digits (vectors/mpmath/quoted_values.py).
    for (factor, expected) in [
        (2.0, 20221.2616897379),
        (4.0, 40889.9424324862),
        (8.0, 82684.6226405622),
    ] {
        let got = ntk_base(DEFAULT_BASE, factor, 128).unwrap();
        // Exponent rounding magnified by ln(s), powf's ulp, the product's rounding:
        // relative (ln(s)·d/(d-2) + 2)·u, doubled for second-order terms.
        let e: f64 = 128.0 / 126.0;
        let tolerance = 2.0 * (factor.ln() * e + 2.0) * U * expected + quote_error(expected, 15);
        assert!(
            (got - expected).abs() <= tolerance,
            "s = {factor}: got {got}, expected {expected}"
        );
    }
}

#[test]
fn ntk_aware_scaling_slows_the_lowest_frequency_by_exactly_the_factor() {
    // YaRN (Peng et al. 2023), Def. 1 rationale: the exponent d/(d-2) is chosen so that
    // θ'_{d/2-1} = θ_{d/2-1}/s while θ'_0 = θ_0 = 1.
    let plain = rope(128, Pairing::HalfSplit);
    let scaled = Rotary::new(RotaryParams {
        scaling: RotaryScaling::NtkAware { factor: 4.0 },
        ..RotaryParams::full(128, Pairing::HalfSplit)
    })
    .unwrap();
    assert_eq!(scaled.frequencies()[0], 1.0);
    let (low, low_scaled) = (plain.frequencies()[63], scaled.frequencies()[63]);
    // b' carries ~4u, the exponent's rounding is magnified by ln(b') ≈ 10.6 and powf
    // adds an ulp, in both θ and θ': about 2·16u; 64u is that doubled.
    assert!(
        (low_scaled - low / 4.0).abs() <= 64.0 * U * low,
        "{low_scaled} vs {}",
        low / 4.0
    );
}

#[test]
fn linear_interpolation_by_4_at_position_4_matches_the_m1_check() {
    // Chen et al. 2023, position interpolation f'(x, m) = f(x, m/s): with s = 4, m = 4
    // the angles are exactly those of m = 1, so the m = 1 values above apply.
    let scaled = Rotary::new(RotaryParams {
        scaling: RotaryScaling::LinearInterpolation { factor: 4.0 },
        ..RotaryParams::full(4, Pairing::Adjacent)
    })
    .unwrap();
    let got = scaled.rotate(&[1.0, 2.0, 3.0, 4.0], 4).unwrap();
    let expected = [
        -1.14263966374765,
        1.92207559654418,
        2.95985066791333,
        4.02979950166916,
    ];
    let bounds = rotation_bounds(&[1.0, 2.0, 3.0, 4.0], 1, DEFAULT_BASE, Pairing::Adjacent);
    for ((g, e), b) in got.iter().zip(expected).zip(bounds) {
        assert!((g - e).abs() <= b + quote_error(e, 15), "{g} vs {e}");
    }
}

#[test]
fn partial_rotary_rotates_the_head_and_passes_the_tail_through() {
    // The m = 1 adjacent values above (mpmath) on the rotated part (d_rot = 4); the tail
    // (dims >= d_rot) passes through exactly (docs/conventions.md, "rotary").
    let partial = Rotary::new(RotaryParams {
        rotary_dim: 4,
        ..RotaryParams::full(6, Pairing::Adjacent)
    })
    .unwrap();
    let got = partial.rotate(&[1.0, 2.0, 3.0, 4.0, 5.0, 0.1], 1).unwrap();
    let expected = [
        -1.14263966374765,
        1.92207559654418,
        2.95985066791333,
        4.02979950166916,
    ];
    let bounds = rotation_bounds(&[1.0, 2.0, 3.0, 4.0], 1, DEFAULT_BASE, Pairing::Adjacent);
    for ((g, e), b) in got.iter().zip(expected).zip(bounds) {
        assert!((g - e).abs() <= b + quote_error(e, 15), "{g} vs {e}");
    }
    assert_eq!(got[4].to_bits(), 5.0f64.to_bits());
    assert_eq!(got[5].to_bits(), 0.1f64.to_bits());
}

#[test]
fn rotary_scores_equal_the_relative_check_times_scale() {
    // The relative check above through the attention path: one memory key at
    // position 3 and a query at 5 (p0 = 5, M = 2, a zero key at 4), adjacent pairing; the
    // value recomputed with mpmath 1.3.0 at 50 digits (vectors/mpmath/quoted_values.py).
    // Scale 1/sqrt(4) = 0.5 exactly.
    let q = Array3::from_shape_vec((1, 1, 4), vec![0.5, -1.0, 2.0, 0.25]).unwrap();
    let k = Array3::from_shape_vec(
        (1, 3, 4),
        vec![1.5, 0.75, -0.5, 1.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0],
    )
    .unwrap();
    let (scores, window) = rotary::scores(
        &rope(4, Pairing::Adjacent),
        q.view(),
        k.view(),
        5,
        Scale::default(),
    )
    .unwrap();
    assert_eq!((window.memory_len(), window.query_len()), (2, 1));
    let (_, bound) = relative_dot(Pairing::Adjacent, 5, 3);
    let expected = 0.5 * 0.997579837021553;
    assert!((scores[[0, 0, 0]] - expected).abs() <= bound + quote_error(expected, 15));
}

mod mpmath_table {
    //! vectors/mpmath/rope.json: rotations at positions up to 10^6 from mpmath at 50
    //! digits (the file records the mpmath version); inputs are read from the file.

    use super::*;

    fn table() -> serde_json::Value {
        let path = concat!(env!("CARGO_MANIFEST_DIR"), "/vectors/mpmath/rope.json");
        let text = std::fs::read_to_string(path).expect("vectors/mpmath/rope.json is committed");
        serde_json::from_str(&text).expect("valid JSON")
    }

    fn numbers(value: &serde_json::Value) -> Vec<f64> {
        value
            .as_array()
            .expect("array of decimal strings")
            .iter()
            .map(|s| {
                s.as_str()
                    .expect("decimal string")
                    .parse()
                    .expect("a number")
            })
            .collect()
    }

    fn pairing(name: &str) -> Pairing {
        match name {
            "adjacent" => Pairing::Adjacent,
            "half_split" => Pairing::HalfSplit,
            other => panic!("unknown pairing {other}"),
        }
    }

    #[test]
    fn rotations_up_to_position_one_million_match_mpmath() {
        let table = table();
        assert_eq!(table["digits"], 50);
        assert_eq!(table["base"], 10000);
        let rotations = table["rotations"].as_array().unwrap();
        // 2 widths × 2 pairings × 6 positions: a truncated file must not pass quietly.
        assert_eq!(rotations.len(), 24);
        for case in rotations {
            let d = case["head_dim"].as_u64().unwrap() as usize;
            let position = case["position"].as_i64().unwrap();
            let pairing = pairing(case["pairing"].as_str().unwrap());
            let x = numbers(&table["inputs"][d.to_string()]);
            let expected = numbers(&case["rotated"]);
            let got = rope(d, pairing).rotate(&x, position).unwrap();
            let bounds = rotation_bounds(&x, position, DEFAULT_BASE, pairing);
            for i in 0..d {
                // 17 stored digits: the decimal itself is within 1e-16 relative.
                let tolerance = bounds[i] + quote_error(expected[i], 17);
                assert!(
                    (got[i] - expected[i]).abs() <= tolerance,
                    "d={d} {pairing:?} p={position} [{i}]: got {}, mpmath {}, tolerance {tolerance}",
                    got[i],
                    expected[i]
                );
            }
        }
    }

    #[test]
    fn half_split_relative_check_matches_mpmath() {
        // The half-split counterpart of the relative check above: vectors/mpmath/rope.json
        // (mpmath 1.3.0, 50 digits).
        let table = table();
        for entry in table["relative"]["dots"].as_array().unwrap() {
            let pairing = pairing(entry["pairing"].as_str().unwrap());
            let (m, n) = (entry["m"].as_i64().unwrap(), entry["n"].as_i64().unwrap());
            let expected: f64 = entry["dot"].as_str().unwrap().parse().unwrap();
            let (dot, bound) = relative_dot(pairing, m, n);
            assert!(
                (dot - expected).abs() <= bound + quote_error(expected, 17),
                "{pairing:?} ({m}, {n}): got {dot}, mpmath {expected}"
            );
        }
    }
}
