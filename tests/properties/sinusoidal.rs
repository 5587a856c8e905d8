//! The sinusoid's relative property (Vaswani et al. 2017, §3.5): `PE(p+k)` is a fixed
//! linear function of `PE(p)` — a rotation by `k·ω_i` within each frequency pair.

use posconform::{Sinusoid, SinusoidLayout};
use proptest::prelude::*;

/// Checks `[sin((p+k)ω); cos((p+k)ω)] = [[cos kω, sin kω], [-sin kω, cos kω]]·[sin pω; cos pω]`
/// for every frequency pair of `encode`, with the pair layout of `layout`.
fn shift_is_rotation(
    encode: &dyn Fn(i64) -> Vec<f64>,
    sinusoid: &Sinusoid,
    p: i64,
    k: i64,
) -> Result<(), String> {
    let (a, b) = (encode(p), encode(p + k));
    let width = sinusoid.width();
    let u = f64::EPSILON / 2.0;
    for (i, &omega) in sinusoid.frequencies().iter().enumerate() {
        let (is, ic) = sinusoid.layout().pair_indices(i, width);
        let (s, c) = ((k as f64) * omega).sin_cos();
        let rotated = (c * a[is] + s * a[ic], -s * a[is] + c * a[ic]);
        // Each angle x·ω is formed with relative error at most (|2i/d·ln base| + 2)u
        // <= 16u for bases up to 1e6 (derivation in published_values/sinusoidal.rs);
        // three angles enter, and the 2×2 product adds a few ulps.
        let angles = (p.abs() + k.abs() + (p + k).abs()) as f64;
        let tol = 16.0 * u * omega * angles + 16.0 * u;
        if (rotated.0 - b[is]).abs() > tol || (rotated.1 - b[ic]).abs() > tol {
            return Err(format!(
                "pair {i}: rotated {rotated:?}, PE(p+k) ({}, {})",
                b[is], b[ic]
            ));
        }
    }
    Ok(())
}

fn layouts() -> impl Strategy<Value = SinusoidLayout> {
    prop_oneof![
        Just(SinusoidLayout::Interleaved),
        Just(SinusoidLayout::Concatenated)
    ]
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(128))]

    /// For every width, base, layout, position `p` and shift `k`, `PE(p+k)` is `PE(p)`
    /// rotated by `k·ω_i` within pair `i`.
    #[test]
    fn sinusoid_shift_is_a_rotation_per_pair(
        half in 1usize..40,
        base in prop_oneof![Just(10_000.0), 10.0f64..1e6],
        layout in layouts(),
        p in -100_000i64..100_000,
        k in -100_000i64..100_000,
    ) {
        let pe = Sinusoid::new(2 * half, base, layout).unwrap();
        shift_is_rotation(&|x| pe.encode(x), &pe, p, k).map_err(TestCaseError::fail)?;
    }
}

/// Planted bug: sin and cos swapped within each pair (the rotation then runs the other
/// way, which no fixed rotation by `+k·ω` matches).
#[test]
fn planted_sin_cos_swap_is_caught() {
    let pe = Sinusoid::paper(8).unwrap();
    let swapped = |p: i64| {
        let mut e = pe.encode(p);
        for i in 0..4 {
            e.swap(2 * i, 2 * i + 1);
        }
        e
    };
    assert!(shift_is_rotation(&swapped, &pe, 37, 5).is_err());
}

/// Odd widths have no cosine partner and are rejected, naming the parameter.
#[test]
fn odd_width_is_an_error() {
    let err = Sinusoid::paper(7).unwrap_err().to_string();
    assert!(
        err.contains("`width`") && err.contains("even") && err.contains('7'),
        "{err}"
    );
}

/// Positions far beyond 2^32 are accepted and stay on the unit circle per pair.
#[test]
fn positions_up_to_two_to_the_forty() {
    let pe = Sinusoid::paper(16).unwrap();
    for p in [-(1i64 << 40), -1, 0, 1 << 31, 1 << 40] {
        let e = pe.encode(p);
        for i in 0..8 {
            let norm = e[2 * i].powi(2) + e[2 * i + 1].powi(2);
            approx::assert_abs_diff_eq!(norm, 1.0, epsilon = 1e-15);
        }
    }
    assert_eq!(pe.encode(0)[..2], [0.0, 1.0]);
}
