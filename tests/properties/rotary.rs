//! Rotary (RoPE) invariants (docs/conventions.md, "rotary"; Su et al. 2021, RoFormer, eqs. 14–16, 34).
//!
//! Each invariant is a plain check function shared by its proptest and by a companion
//! test that feeds it a deliberately wrong implementation and shows the check fails.
//! Positions in the relative checks stay far from 0, where the rotation is the identity.

use posconform::rotary::{Pairing, Rotary, RotaryParams, RotaryScaling, DEFAULT_BASE};
use proptest::prelude::*;

/// f64 unit roundoff (Higham 2002, §2.1: u = 2^-p for a p-bit significand).
const U: f64 = f64::EPSILON / 2.0;

fn gamma(n: usize) -> f64 {
    let nu = n as f64 * U;
    nu / (1.0 - nu)
}

fn norm(x: &[f64]) -> f64 {
    x.iter().map(|v| v * v).sum::<f64>().sqrt()
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// A bound on `‖fl(R_p x) - R_p x‖`: each pair `(a, b)` is off by at most
/// `2(|a|+|b|)(|Δangle| + 4u)` (see tests/published_values/rotary.rs for the terms),
/// with `|Δangle| <= (ln(base) + 2)·u·|p|` since `θ_j <= 1`; summing
/// `(|a|+|b|)^2 <= 2(a^2+b^2)` over both members of every pair gives `≤ 4‖x‖·(…)`.
fn rotation_error_norm(x: &[f64], position: i64) -> f64 {
    let angle_error = (DEFAULT_BASE.ln() + 2.0) * U * (position as f64).abs();
    4.0 * norm(x) * (angle_error + 4.0 * U)
}

fn rope(d: usize, pairing: Pairing) -> Rotary {
    Rotary::new(RotaryParams::full(d, pairing)).unwrap()
}

/// A rotation written out in the test, with the pair update passed in so that a
/// planted bug is one changed line: `update(x_a, x_b, cos, sin) -> (x_a', x_b')`.
fn rotate_written_out(
    x: &[f64],
    position: i64,
    pairing: Pairing,
    update: fn(f64, f64, f64, f64) -> (f64, f64),
) -> Vec<f64> {
    let d = x.len();
    let mut out = x.to_vec();
    for j in 0..d / 2 {
        let theta = DEFAULT_BASE.powf(-((2 * j) as f64) / d as f64);
        let (s, c) = (position as f64 * theta).sin_cos();
        let (a, b) = pairing.pair_indices(j, d);
        (out[a], out[b]) = update(x[a], x[b], c, s);
    }
    out
}

fn correct_update(a: f64, b: f64, c: f64, s: f64) -> (f64, f64) {
    (a * c - b * s, a * s + b * c)
}

fn pairing_strategy() -> impl Strategy<Value = Pairing> {
    prop_oneof![Just(Pairing::Adjacent), Just(Pairing::HalfSplit)]
}

/// An even head width and a vector of that width with entries in [-4, 4].
fn vector_strategy() -> impl Strategy<Value = Vec<f64>> {
    (1usize..=16).prop_flat_map(|pairs| prop::collection::vec(-4.0f64..4.0, 2 * pairs))
}

fn config() -> ProptestConfig {
    ProptestConfig::with_cases(64)
}

// ---------------------------------------------------------------------------------
// Norm preservation.

/// `‖R_p x‖ = ‖x‖` up to the rounding of the rotation and of the two norms.
fn preserves_norm(rotate: impl Fn(&[f64], i64) -> Vec<f64>, x: &[f64], position: i64) -> bool {
    let rotated = rotate(x, position);
    // The angle's error does not change a rotation's norm; only cos²+sin² = 1 ± 2u and
    // the pair update's roundings do (≤ 4·‖x‖·6u as in `rotation_error_norm`), plus
    // γ_d relative error in each norm.
    let tolerance = norm(x) * (24.0 * U + 2.0 * gamma(x.len() + 1));
    (norm(&rotated) - norm(x)).abs() <= tolerance
}

proptest! {
    #![proptest_config(config())]
    /// RoPE preserves the norm of every vector at every position, in both pairings.
    #[test]
    fn rotation_preserves_norm(
        x in vector_strategy(),
        position in -1_000_000i64..1_000_000,
        pairing in pairing_strategy(),
    ) {
        let rope = rope(x.len(), pairing);
        prop_assert!(preserves_norm(|x, p| rope.rotate(x, p).unwrap(), &x, position));
    }
}

#[test]
fn norm_check_catches_a_sign_typo_in_the_rotation() {
    // [[c, s], [s, c]] instead of [[c, -s], [s, c]]: not orthogonal.
    let typo = |x: &[f64], p: i64| {
        rotate_written_out(x, p, Pairing::Adjacent, |a, b, c, s| {
            (a * c + b * s, a * s + b * c)
        })
    };
    let correct = |x: &[f64], p: i64| rotate_written_out(x, p, Pairing::Adjacent, correct_update);
    let x = [1.0, 2.0, -0.5, 3.0];
    assert!(preserves_norm(correct, &x, 1234));
    assert!(!preserves_norm(typo, &x, 1234));
}

// ---------------------------------------------------------------------------------
// Relative property.

/// `<R_m q, R_n k> = <R_{m+t} q, R_{n+t} k>`: the score depends only on `m - n`
/// (RoFormer eq. 16), within the rotation bounds of both evaluations.
fn depends_only_on_distance(
    rotate_q: impl Fn(&[f64], i64) -> Vec<f64>,
    rotate_k: impl Fn(&[f64], i64) -> Vec<f64>,
    q: &[f64],
    k: &[f64],
    (m, n): (i64, i64),
    shift: i64,
) -> bool {
    let near = dot(&rotate_q(q, m), &rotate_k(k, n));
    let far = dot(&rotate_q(q, m + shift), &rotate_k(k, n + shift));
    let bound = |m: i64, n: i64| {
        rotation_error_norm(q, m) * norm(k)
            + norm(q) * rotation_error_norm(k, n)
            + gamma(q.len()) * norm(q) * norm(k)
    };
    (near - far).abs() <= bound(m, n) + bound(m + shift, n + shift)
}

proptest! {
    #![proptest_config(config())]
    /// `<R_m q, R_n k>` depends only on `m - n`, in both pairings, far from position 0.
    #[test]
    fn scores_depend_only_on_distance(
        (q, k) in vector_strategy().prop_flat_map(|q| {
            let d = q.len();
            (Just(q), prop::collection::vec(-4.0f64..4.0, d))
        }),
        m in 1_000i64..100_000,
        n in 1_000i64..100_000,
        shift in 1i64..100_000,
        pairing in pairing_strategy(),
    ) {
        let rope = rope(q.len(), pairing);
        let rotate = |x: &[f64], p: i64| rope.rotate(x, p).unwrap();
        prop_assert!(depends_only_on_distance(rotate, rotate, &q, &k, (m, n), shift));
    }
}

#[test]
fn distance_check_catches_queries_and_keys_paired_differently() {
    // A kernel whose query path pairs (2j, 2j+1) while its key path pairs (j, j+d/2).
    let adjacent = rope(8, Pairing::Adjacent);
    let half_split = rope(8, Pairing::HalfSplit);
    let rotate_adjacent = |x: &[f64], p: i64| adjacent.rotate(x, p).unwrap();
    let rotate_half = |x: &[f64], p: i64| half_split.rotate(x, p).unwrap();
    let q = [0.5, -1.0, 2.0, 0.25, 1.0, -0.75, 0.3, 1.5];
    let k = [1.5, 0.75, -0.5, 1.0, -0.2, 0.6, 1.1, -1.3];
    let positions = (5_000, 3_000);
    assert!(depends_only_on_distance(
        rotate_adjacent,
        rotate_adjacent,
        &q,
        &k,
        positions,
        777
    ));
    assert!(!depends_only_on_distance(
        rotate_adjacent,
        rotate_half,
        &q,
        &k,
        positions,
        777
    ));
}

// ---------------------------------------------------------------------------------
// Composition.

/// `R_b (R_a x) = R_{a+b} x` within the bounds of the three rotations involved.
fn composes(rotate: impl Fn(&[f64], i64) -> Vec<f64>, x: &[f64], a: i64, b: i64) -> bool {
    let twice = rotate(&rotate(x, a), b);
    let once = rotate(x, a + b);
    let difference: Vec<f64> = twice.iter().zip(&once).map(|(t, o)| t - o).collect();
    let bound =
        rotation_error_norm(x, a) + rotation_error_norm(x, b) + rotation_error_norm(x, a + b);
    norm(&difference) <= bound
}

proptest! {
    #![proptest_config(config())]
    /// Rotating by `a` then by `b` equals rotating by `a + b`.
    #[test]
    fn rotations_compose_additively(
        x in vector_strategy(),
        a in -100_000i64..100_000,
        b in -100_000i64..100_000,
        pairing in pairing_strategy(),
    ) {
        let rope = rope(x.len(), pairing);
        prop_assert!(composes(|x, p| rope.rotate(x, p).unwrap(), &x, a, b));
    }
}

#[test]
fn composition_check_catches_one_based_positions() {
    // Rotating by (p+1)·θ: R_{b+1} R_{a+1} = R_{a+b+2}, not R_{a+b+1}.
    let rope = rope(6, Pairing::HalfSplit);
    let x = [1.0, -2.0, 0.5, 3.0, -1.5, 0.25];
    assert!(composes(|x, p| rope.rotate(x, p).unwrap(), &x, 300, 4000));
    assert!(!composes(
        |x, p| rope.rotate(x, p + 1).unwrap(),
        &x,
        300,
        4000
    ));
}

// ---------------------------------------------------------------------------------
// Partial rotary.

/// Dimensions `d_rot..d` of the output are bit-identical to the input's.
fn tail_untouched(rotated: &[f64], x: &[f64], rotary_dim: usize) -> bool {
    rotated[rotary_dim..]
        .iter()
        .zip(&x[rotary_dim..])
        .all(|(r, x)| r.to_bits() == x.to_bits())
}

proptest! {
    #![proptest_config(config())]
    /// Partial rotary leaves the tail `d_rot..d` bit-exactly unchanged.
    #[test]
    fn partial_rotary_leaves_tail_bit_exact(
        (x, rotary_dim) in vector_strategy().prop_flat_map(|x| {
            let pairs = x.len() / 2;
            (Just(x), (1..=pairs).prop_map(|p| 2 * p))
        }),
        position in -1_000_000i64..1_000_000,
        pairing in pairing_strategy(),
    ) {
        let partial = Rotary::new(RotaryParams {
            rotary_dim,
            ..RotaryParams::full(x.len(), pairing)
        }).unwrap();
        let rotated = partial.rotate(&x, position).unwrap();
        prop_assert!(tail_untouched(&rotated, &x, rotary_dim));
    }
}

#[test]
fn tail_check_catches_rotating_the_whole_head() {
    // Fault 18 (docs/faults.md): the kernel rotates all of d instead of the first d_rot.
    let x = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0];
    let partial = Rotary::new(RotaryParams {
        rotary_dim: 4,
        ..RotaryParams::full(8, Pairing::HalfSplit)
    })
    .unwrap();
    assert!(tail_untouched(&partial.rotate(&x, 9).unwrap(), &x, 4));
    let whole = rope(8, Pairing::HalfSplit);
    assert!(!tail_untouched(&whole.rotate(&x, 9).unwrap(), &x, 4));
}

// ---------------------------------------------------------------------------------
// Scaling by 1.

/// Two encodings give bit-identical rotations of `x` at `position`.
fn same_rotation(left: &Rotary, right: &Rotary, x: &[f64], position: i64) -> bool {
    let (l, r) = (
        left.rotate(x, position).unwrap(),
        right.rotate(x, position).unwrap(),
    );
    l.iter().zip(&r).all(|(a, b)| a.to_bits() == b.to_bits())
}

proptest! {
    #![proptest_config(config())]
    /// Linear interpolation and NTK-aware scaling with factor 1 equal the unscaled
    /// encoding bit for bit (`p/1 = p` and `1^e = 1` exactly).
    #[test]
    fn scaling_by_one_is_the_identity(
        x in (2usize..=16).prop_flat_map(|pairs| prop::collection::vec(-4.0f64..4.0, 2 * pairs)),
        position in -1_000_000i64..1_000_000,
        pairing in pairing_strategy(),
        base in 2.0f64..1e6,
    ) {
        let unscaled = RotaryParams { base, ..RotaryParams::full(x.len(), pairing) };
        let plain = Rotary::new(unscaled).unwrap();
        for scaling in [
            RotaryScaling::LinearInterpolation { factor: 1.0 },
            RotaryScaling::NtkAware { factor: 1.0 },
        ] {
            let scaled = Rotary::new(RotaryParams { scaling, ..unscaled }).unwrap();
            prop_assert!(same_rotation(&plain, &scaled, &x, position), "{scaling:?}");
        }
    }
}

#[test]
fn scaling_check_catches_a_misparenthesised_ntk_base() {
    // b·(s·d/(d-2)) typed for b·s^(d/(d-2)): at s = 1 the base still moves by d/(d-2).
    let d = 16;
    let x: Vec<f64> = (0..d).map(|i| i as f64 - 7.5).collect();
    let plain = rope(d, Pairing::Adjacent);
    let misparenthesised = Rotary::new(RotaryParams {
        base: DEFAULT_BASE * (1.0 * d as f64 / (d as f64 - 2.0)),
        ..RotaryParams::full(d, Pairing::Adjacent)
    })
    .unwrap();
    let correct_ntk = Rotary::new(RotaryParams {
        scaling: RotaryScaling::NtkAware { factor: 1.0 },
        ..RotaryParams::full(d, Pairing::Adjacent)
    })
    .unwrap();
    assert!(same_rotation(&plain, &correct_ntk, &x, 5000));
    assert!(!same_rotation(&plain, &misparenthesised, &x, 5000));
}

// Cached decoding: the checker's own decode path equals the full computation for every
// scheme, rotary included (tests/properties/checker_paths.rs); a pre-rotated KV cache
// is one of the independently written kernels of tests/zoo.
