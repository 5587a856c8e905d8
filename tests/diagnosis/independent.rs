//! An independent check that each faulty variant implements the fault it claims: where
//! a mistake is the correct scheme run on an equivalently modified case (a bias array
//! zeroed, a parameter changed, inputs permuted), the variant must equal the *reference*
//! run on that modified case, mapped back where the equivalence permutes an axis. Each
//! test states the equivalence and why it holds (the formula, from docs/conventions.md
//! and the fault's own description in docs/faults.md), and runs it on every core case
//! (and the few cases [`cases`] builds from them) that the fault applies to and the
//! equivalence covers; a minimum count keeps it from passing on fewer cases than today. Outputs are compared with `approx` at a relative 1e-12
//! (of the element, or of the output's largest magnitude for elements near 0); masked
//! entries must match exactly (`-inf` scores, 0 probabilities). Each variant must also
//! differ from the unmodified reference on every case checked, so an equivalence cannot
//! hold because nothing changed.

use std::collections::BTreeMap;

use ndarray::{s, ArrayD, Axis, Ix3};
use posconform::case::{Arrays, Case, OperationKind, Output};
use posconform::diagnose;
use posconform::reference::{expected, variant_outputs, Outputs};
use posconform::rotary::{Pairing, RotaryScaling};
use posconform::sinusoidal::SinusoidLayout;
use posconform::tensor::Tensor;
use posconform::{Dtype, Scale, Scheme, SchemeSpec};

// ---------------------------------------------------------------------------------
// The driver

fn core() -> Vec<Case> {
    posconform::suite::suite("core").expect("the core suite builds")
}

/// `case` renamed `id` and changed by `f`, checked valid.
fn derived(case: &Case, id: &str, f: impl FnOnce(&mut Case)) -> Case {
    let mut case = case.clone();
    case.id = id.into();
    f(&mut case);
    case.validate()
        .unwrap_or_else(|e| panic!("{id} is not a valid case: {e}"));
    case
}

/// The core suite, and a few cases built from it for parameters the suite meets only
/// once: ALiBi and padded clipped scores, partial rotary with linear interpolation,
/// bidirectional bucketed scores, and the bucketed cases with a scale other than 1.
fn cases() -> Vec<Case> {
    let core = core();
    let by_id = |id: &str| core.iter().find(|c| c.id == id).unwrap().clone();
    let mut extra = vec![
        derived(&by_id("alibi.attention.h6"), "alibi.scores.h6", |c| {
            c.operation = posconform::Operation::Scores
        }),
        derived(
            &by_id("clipped.scores.k4"),
            "clipped.scores.k4_padded",
            |c| c.hidden_keys = vec![2, 8],
        ),
        derived(
            &by_id("rotary.scores.linear_interpolation"),
            "rotary.scores.partial_linear_interpolation",
            |c| {
                if let SchemeSpec::Rotary(spec) = &mut c.scheme {
                    spec.rotary_dim = 32;
                }
            },
        ),
        derived(
            &by_id("bucketed.scores.beyond_max_distance"),
            "bucketed.scores.bidirectional",
            |c| {
                if let SchemeSpec::Bucketed(spec) = &mut c.scheme {
                    spec.bidirectional = true;
                }
            },
        ),
    ];
    for case in core.iter().filter(|c| is(c, Scheme::Bucketed)) {
        if case.scheme.scale().factor(case.head_dim) == 1.0 {
            let id = format!("{}.scaled", case.id);
            extra.push(derived(case, &id, |c| {
                if let SchemeSpec::Bucketed(spec) = &mut c.scheme {
                    spec.scale = Scale::InverseSqrtDim;
                }
            }));
        }
    }
    core.into_iter().chain(extra).collect()
}

/// Where two sets of outputs differ beyond a relative 1e-12, in words; `None` when
/// they agree.
fn difference(got: &Outputs, want: &Outputs) -> Option<String> {
    for (output, w) in want {
        let Some(g) = got.get(output) else {
            return Some(format!("no `{output}`"));
        };
        if g.shape() != w.shape() {
            return Some(format!(
                "`{output}` has shape {:?}, not {:?}",
                g.shape(),
                w.shape()
            ));
        }
        let scale = w
            .iter()
            .filter(|x| x.is_finite())
            .fold(0.0f64, |m, x| m.max(x.abs()));
        for (n, (&x, &y)) in g.iter().zip(w.iter()).enumerate() {
            let same = if y.is_finite() {
                approx::relative_eq!(x, y, epsilon = 1e-12 * scale, max_relative = 1e-12)
            } else {
                x == y || (x.is_nan() && y.is_nan())
            };
            if !same {
                return Some(format!("`{output}` element {n}: {x} vs {y}"));
            }
        }
    }
    if got.len() != want.len() {
        return Some(format!("{} outputs, not {}", got.len(), want.len()));
    }
    None
}

/// The variant of `fault` on `case`, for an f64 kernel.
fn variant(fault: &str, case: &Case, inputs: &Arrays) -> posconform::Result<Outputs> {
    let fault = diagnose::fault(fault).unwrap_or_else(|| panic!("no fault {fault}"));
    variant_outputs(case, inputs, Dtype::F64, fault.variant)
}

/// What an equivalence yields for a case: the reference on the modified case (mapped
/// back), or `None` when the modified case is not a valid one (the variant must then be
/// undefined too).
type Equivalent = Option<Outputs>;

/// Checks, on every core case `fault` applies to and `on` accepts, that its variant
/// equals `equivalent` and differs from the unmodified reference; at least `min` cases.
fn holds(
    fault: &str,
    min: usize,
    on: impl Fn(&Case) -> bool,
    equivalent: impl Fn(&Case, &Arrays) -> Equivalent,
) {
    let entry = diagnose::fault(fault).unwrap_or_else(|| panic!("no fault {fault}"));
    holds_on(
        fault,
        min,
        |c| entry.variant.applies(c) && on(c),
        equivalent,
        true,
    );
}

fn holds_on(
    fault: &str,
    min: usize,
    on: impl Fn(&Case) -> bool,
    equivalent: impl Fn(&Case, &Arrays) -> Equivalent,
    changes: bool,
) {
    let mut checked = Vec::new();
    for case in cases().iter().filter(|c| on(c)) {
        let inputs = case.inputs().unwrap();
        let got = variant(fault, case, &inputs);
        let Some(want) = equivalent(case, &inputs) else {
            assert!(
                got.is_err(),
                "{fault} on {}: defined where the equivalent case is not",
                case.id
            );
            continue;
        };
        let got = got.unwrap_or_else(|e| panic!("{fault} on {}: {e}", case.id));
        if let Some(d) = difference(&got, &want) {
            panic!(
                "{fault} on {}: the variant differs from its equivalent: {d}",
                case.id
            );
        }
        if changes {
            let reference = expected(case, &inputs).unwrap();
            assert!(
                difference(&got, &reference).is_some(),
                "{fault} on {}: the variant is the reference",
                case.id
            );
        }
        checked.push(case.id.clone());
    }
    assert!(
        checked.len() >= min,
        "{fault}: checked on {} cases ({checked:?}), expected at least {min}",
        checked.len()
    );
}

/// The reference on `case` with `inputs`, `None` if that case is not valid.
fn reference_on(case: &Case, inputs: &Arrays) -> Equivalent {
    case.validate().ok()?;
    Some(expected(case, inputs).expect("the reference runs a valid case"))
}

/// `inputs` with `name` edited by `edit` (kept in f64: no value is rounded).
fn edit(inputs: &Arrays, name: &str, edit: impl FnOnce(&mut ArrayD<f64>)) -> Arrays {
    let mut inputs = inputs.clone();
    let mut values = inputs[name].view().to_owned();
    edit(&mut values);
    inputs.insert(name.to_string(), Tensor::from_f64(Dtype::F64, values));
    inputs
}

fn is(case: &Case, scheme: Scheme) -> bool {
    case.scheme.scheme() == scheme
}

fn op(case: &Case) -> OperationKind {
    case.operation.kind()
}

fn one_window(case: &Case) -> bool {
    matches!(op(case), OperationKind::Scores | OperationKind::Attention)
}

/// Every output mapped by `f`.
fn map_outputs(outputs: Outputs, f: impl Fn(Output, ArrayD<f64>) -> ArrayD<f64>) -> Outputs {
    outputs.into_iter().map(|(o, a)| (o, f(o, a))).collect()
}

/// `a` with its last axis permuted: `out[..., c] = a[..., from[c]]`.
fn take_last(a: &ArrayD<f64>, from: &[usize]) -> ArrayD<f64> {
    a.select(Axis(a.ndim() - 1), from)
}

/// `a` with axis `axis` reversed.
fn reversed(a: &ArrayD<f64>, axis: usize) -> ArrayD<f64> {
    let mut a = a.clone();
    a.invert_axis(Axis(axis));
    a.as_standard_layout().into_owned()
}

/// The case with other scheme parameters.
fn with_scheme(case: &Case, scheme: SchemeSpec) -> Case {
    let mut case = case.clone();
    case.scheme = scheme;
    case
}

// ---------------------------------------------------------------------------------
// Transformer-XL: S = scale · ((q + u)·k + (q + v)·r_δ)

fn is_xl_attending(case: &Case) -> bool {
    is(case, Scheme::XlRelative) && op(case) != OperationKind::Encode
}

fn xl_clamp(case: &Case) -> Option<usize> {
    match &case.scheme {
        SchemeSpec::XlRelative(spec) => spec.clamp_len,
        _ => None,
    }
}

/// Leaving u out is the reference with u = 0: (q + 0)·k = q·k (term c gone).
#[test]
fn content_bias_missing_is_the_reference_with_u_zero() {
    holds(
        "xl-content-bias-missing",
        11,
        is_xl_attending,
        |case, inputs| reference_on(case, &edit(inputs, "content_bias", |u| u.fill(0.0))),
    );
}

/// Leaving v out is the reference with v = 0: (q + 0)·r = q·r (term d gone).
#[test]
fn position_bias_missing_is_the_reference_with_v_zero() {
    holds(
        "xl-position-bias-missing",
        11,
        is_xl_attending,
        |case, inputs| reference_on(case, &edit(inputs, "position_bias", |v| v.fill(0.0))),
    );
}

/// Leaving both out is the reference with u = v = 0: q·k + q·r.
#[test]
fn biases_missing_is_the_reference_with_u_and_v_zero() {
    holds("xl-biases-missing", 11, is_xl_attending, |case, inputs| {
        let inputs = edit(inputs, "content_bias", |u| u.fill(0.0));
        reference_on(case, &edit(&inputs, "position_bias", |v| v.fill(0.0)))
    });
}

/// Swapped biases are the reference with the two arrays exchanged:
/// (q + v)·k + (q + u)·r.
#[test]
fn biases_swapped_is_the_reference_with_the_arrays_exchanged() {
    holds("xl-biases-swapped", 11, is_xl_attending, |case, inputs| {
        let u = inputs["content_bias"].view().to_owned();
        let v = inputs["position_bias"].view().to_owned();
        let inputs = edit(inputs, "content_bias", |x| x.assign(&v));
        reference_on(case, &edit(&inputs, "position_bias", |x| x.assign(&u)))
    });
}

/// Scaling only the content term, scale·(q + u)·k + (q + v)·r_δ, is the reference
/// with r divided by the scale: scale·((q + u)·k + (q + v)·(r_δ / scale)). For clipped
/// scores, scale·q·k + q·w_key is likewise the reference with w_key / scale (values and
/// w_value are not scaled).
#[test]
fn scale_skipping_the_position_term_is_the_reference_with_the_table_unscaled() {
    holds(
        "scale-skips-position-term",
        16,
        |_| true,
        |case, inputs| {
            let factor = case.scheme.scale().factor(case.head_dim);
            let table = if is(case, Scheme::XlRelative) {
                "r"
            } else {
                "w_key"
            };
            reference_on(
                case,
                &edit(inputs, table, |t| t.mapv_inplace(|x| x / factor)),
            )
        },
    );
}

/// A shift padded on the wrong side reads distance Δ - 1 (and distance 0 reads a zero
/// row: the pad column), for both position terms: the reference with r shifted down one
/// row, r'[0] = 0 and r'[δ] = r[δ - 1]. Without a clamp only: with one, distance Δ > c
/// reads r[c] in the variant but r'[c] = r[c - 1] here.
#[test]
fn shift_off_by_one_is_the_reference_with_r_shifted_by_one_row() {
    holds(
        "rel-shift-off-by-one",
        9,
        |c| xl_clamp(c).is_none(),
        |case, inputs| {
            let r = inputs["r"].view().to_owned();
            let shifted = edit(inputs, "r", |x| {
                x.slice_mut(s![.., 0, ..]).fill(0.0);
                let rows = r.shape()[1];
                x.slice_mut(s![.., 1.., ..])
                    .assign(&r.slice(s![.., ..rows - 1, ..]));
            });
            reference_on(case, &shifted)
        },
    );
}

/// An ascending relative sequence makes distance Δ read the embedding of K - 1 - Δ: the
/// reference with the rows of r reversed (one window, where R = K; no clamp, which
/// would apply to the mirrored distance in the variant).
#[test]
fn ascending_sequence_is_the_reference_with_r_reversed() {
    holds(
        "relative-sequence-ascending",
        7,
        |c| xl_clamp(c).is_none() && one_window(c),
        |case, inputs| {
            assert_eq!(inputs["r"].shape()[1], case.key_len());
            reference_on(case, &edit(inputs, "r", |x| *x = reversed(x, 1)))
        },
    );
}

// ---------------------------------------------------------------------------------
// Sinusoids: PE(p)[a_n] = sin(p·ω_n), PE(p)[b_n] = cos(p·ω_n), ω_n = base^(-2n/d)

/// The (sin, cos) pairs of a sinusoid of width `d` (docs/conventions.md, "sinusoidal").
fn sinusoid_pairs(layout: SinusoidLayout, d: usize) -> Vec<(usize, usize)> {
    (0..d / 2)
        .map(|n| match layout {
            SinusoidLayout::Interleaved => (2 * n, 2 * n + 1),
            SinusoidLayout::Concatenated => (n, n + d / 2),
        })
        .collect()
}

/// The column order that swaps each pair: `from[a] = b`, `from[b] = a`.
fn swap_pairs(pairs: &[(usize, usize)], d: usize) -> Vec<usize> {
    let mut from: Vec<usize> = (0..d).collect();
    for &(a, b) in pairs {
        from.swap(a, b);
    }
    from
}

/// The sinusoidal spec of a case.
fn sinusoidal(case: &Case) -> Option<posconform::sinusoidal::SinusoidalSpec> {
    match &case.scheme {
        SchemeSpec::Sinusoidal(spec) => Some(*spec),
        _ => None,
    }
}

fn is_xl_encode(case: &Case) -> bool {
    is(case, Scheme::XlRelative) && op(case) == OperationKind::Encode
}

/// The other layout is the reference with the layout parameter switched. For the
/// concatenated sinusoid Transformer-XL projects (`r = R_δ · w_kr`), the interleaved
/// one is R_cat with its columns reordered (R_int[2n] = R_cat[n], R_int[2n+1] =
/// R_cat[n + d/2]), so it is the reference with the rows of w_kr reordered the same way:
/// w'[n] = w[2n], w'[n + d/2] = w[2n + 1].
#[test]
fn layout_swapped_is_the_reference_with_the_other_layout() {
    holds(
        "sinusoid-layout-swapped",
        8,
        |_| true,
        |case, inputs| {
            if let Some(mut spec) = sinusoidal(case) {
                spec.layout = match spec.layout {
                    SinusoidLayout::Interleaved => SinusoidLayout::Concatenated,
                    SinusoidLayout::Concatenated => SinusoidLayout::Interleaved,
                };
                return reference_on(&with_scheme(case, SchemeSpec::Sinusoidal(spec)), inputs);
            }
            assert!(is_xl_encode(case));
            let d = case.head_dim;
            let mut from = vec![0; d];
            for n in 0..d / 2 {
                from[n] = 2 * n;
                from[n + d / 2] = 2 * n + 1;
            }
            reference_on(
                case,
                &edit(inputs, "w_kr", |w| *w = w.select(Axis(1), &from)),
            )
        },
    );
}

/// Sine and cosine swapped is PE·P with P the permutation exchanging each pair's two
/// columns (an orthogonal involution). Scores: (q + PE·P)·(k + PE·P) = (q·P + PE)·(k·P +
/// PE), so the reference with q and k permuted by P (values untouched). Encode: the
/// reference table permuted by P. Transformer-XL encode: (R·P)·w = R·(P·w), the
/// reference with the rows of w_kr exchanged in pairs (n, n + d/2).
#[test]
fn sine_cosine_swapped_is_the_reference_with_pairs_exchanged() {
    holds(
        "sine-cosine-swapped",
        8,
        |_| true,
        |case, inputs| {
            let d = case.head_dim;
            let layout = sinusoidal(case).map_or(SinusoidLayout::Concatenated, |s| s.layout);
            let from = swap_pairs(&sinusoid_pairs(layout, d), d);
            if is_xl_encode(case) {
                return reference_on(
                    case,
                    &edit(inputs, "w_kr", |w| *w = w.select(Axis(1), &from)),
                );
            }
            if op(case) == OperationKind::Encode {
                let table = reference_on(case, inputs)?;
                return Some(map_outputs(table, |_, a| take_last(&a, &from)));
            }
            let inputs = edit(inputs, "q", |q| *q = take_last(q, &from));
            reference_on(case, &edit(&inputs, "k", |k| *k = take_last(k, &from)))
        },
    );
}

/// base^(-n/d) = (sqrt base)^(-2n/d): the reference with the base square-rooted.
#[test]
fn exponent_not_doubled_is_the_reference_with_the_square_root_base() {
    holds(
        "sinusoid-exponent-not-doubled",
        7,
        |c| is(c, Scheme::Sinusoidal),
        |case, inputs| {
            let mut spec = sinusoidal(case).unwrap();
            spec.base = spec.base.sqrt();
            reference_on(&with_scheme(case, SchemeSpec::Sinusoidal(spec)), inputs)
        },
    );
}

// ---------------------------------------------------------------------------------
// Rotary: pair n of the first d_rot dimensions rotated by p'·θ_n

fn rotary(case: &Case) -> Option<posconform::rotary::RotarySpec> {
    match &case.scheme {
        SchemeSpec::Rotary(spec) => Some(*spec),
        _ => None,
    }
}

fn with_rotary(case: &Case, f: impl FnOnce(&mut posconform::rotary::RotarySpec)) -> Case {
    let mut spec = rotary(case).expect("a rotary case");
    f(&mut spec);
    with_scheme(case, SchemeSpec::Rotary(spec))
}

/// The wrong pairing is the reference with the other pairing parameter.
#[test]
fn pairing_swapped_is_the_reference_with_the_other_pairing() {
    holds(
        "rotary-pairing-swapped",
        16,
        |_| true,
        |case, inputs| {
            let other = with_rotary(case, |s| {
                s.pairing = match s.pairing {
                    Pairing::Adjacent => Pairing::HalfSplit,
                    Pairing::HalfSplit => Pairing::Adjacent,
                }
            });
            reference_on(&other, inputs)
        },
    );
}

/// Rotating the tail too is the reference with rotary_dim = d.
#[test]
fn tail_rotated_is_the_reference_with_the_full_rotary_dim() {
    holds(
        "rotary-tail-rotated",
        3,
        |_| true,
        |case, inputs| reference_on(&with_rotary(case, |s| s.rotary_dim = case.head_dim), inputs),
    );
}

/// Dropping the tail is the reference on inputs whose tail d_rot..d is zero (the tail
/// only passes through, so zeroing it before or after is the same).
#[test]
fn tail_zeroed_is_the_reference_with_the_tail_of_q_and_k_zero() {
    holds(
        "rotary-tail-zeroed",
        3,
        |_| true,
        |case, inputs| {
            let d_rot = rotary(case).unwrap().rotary_dim;
            let mut inputs = inputs.clone();
            for name in ["q", "k", "x"] {
                if inputs.contains_key(name) {
                    inputs = edit(&inputs, name, |a| {
                        a.slice_mut(s![.., .., d_rot..]).fill(0.0)
                    });
                }
            }
            reference_on(case, &inputs)
        },
    );
}

/// Frequencies over the head width, base^(-2n/d) = (base^(d_rot/d))^(-2n/d_rot): the
/// reference with base^(d_rot/d) as its base.
#[test]
fn frequencies_over_head_dim_are_the_reference_with_a_smaller_base() {
    holds(
        "rotary-frequencies-over-head-dim",
        3,
        |_| true,
        |case, inputs| {
            let d = case.head_dim as f64;
            reference_on(
                &with_rotary(case, |s| s.base = s.base.powf(s.rotary_dim as f64 / d)),
                inputs,
            )
        },
    );
}

/// NTK-aware scaling with base·s for base·s^(d_rot/(d_rot-2)) is the reference with no
/// scaling and base·s.
#[test]
fn ntk_exponent_missing_is_the_reference_with_base_times_factor() {
    holds(
        "rotary-ntk-exponent-missing",
        2,
        |_| true,
        |case, inputs| {
            let other = with_rotary(case, |s| {
                let RotaryScaling::NtkAware { factor } = s.scaling else {
                    panic!("an NTK-aware case")
                };
                s.base *= factor;
                s.scaling = RotaryScaling::None;
            });
            reference_on(&other, inputs)
        },
    );
}

/// Ignored scaling is the reference with scaling "none".
#[test]
fn scaling_ignored_is_the_reference_without_scaling() {
    holds(
        "rotary-scaling-ignored",
        5,
        |_| true,
        |case, inputs| {
            reference_on(
                &with_rotary(case, |s| s.scaling = RotaryScaling::None),
                inputs,
            )
        },
    );
}

/// Positions multiplied by s instead of divided are the reference with factor 1/s:
/// p / (1/s) = p·s.
#[test]
fn interpolation_inverted_is_the_reference_with_the_inverse_factor() {
    holds(
        "rotary-interpolation-inverted",
        3,
        |_| true,
        |case, inputs| {
            let other = with_rotary(case, |s| {
                let RotaryScaling::LinearInterpolation { factor } = s.scaling else {
                    panic!("a linear interpolation case")
                };
                s.scaling = RotaryScaling::LinearInterpolation {
                    factor: 1.0 / factor,
                };
            });
            reference_on(&other, inputs)
        },
    );
}

/// The rotary pairs of a case (docs/conventions.md, "rotary").
fn rotary_pairs(case: &Case) -> Vec<(usize, usize)> {
    let spec = rotary(case).unwrap();
    let half = spec.rotary_dim / 2;
    (0..half)
        .map(|n| match spec.pairing {
            Pairing::Adjacent => (2 * n, 2 * n + 1),
            Pairing::HalfSplit => (n, n + half),
        })
        .collect()
}

/// `x` with the second member of every rotary pair negated (F = diag(1, -1) per pair).
fn flip(case: &Case, x: &mut ArrayD<f64>) {
    for (_, b) in rotary_pairs(case) {
        x.slice_mut(s![.., .., b]).mapv_inplace(|v| -v);
    }
}

/// The reversed direction rotates by R(-φ) = F·R(φ)·F with F = diag(1, -1) on each
/// pair: encode is F applied to the reference's rotation of F·x; scores are
/// (R_a·F·q)·(R_b·F·k) since F is orthogonal, so the reference with F applied to q and k
/// (values are not rotated). Independent of how the variant does it (negated positions).
#[test]
fn direction_reversed_is_the_reference_on_reflected_pairs() {
    holds(
        "rotary-direction-reversed",
        16,
        |_| true,
        |case, inputs| {
            if op(case) == OperationKind::Encode {
                let rotated = reference_on(case, &edit(inputs, "x", |x| flip(case, x)))?;
                return Some(map_outputs(rotated, |_, mut a| {
                    flip(case, &mut a);
                    a
                }));
            }
            let inputs = edit(inputs, "q", |q| flip(case, q));
            reference_on(case, &edit(&inputs, "k", |k| flip(case, k)))
        },
    );
}

// ---------------------------------------------------------------------------------
// Absolute positions: query i at p0 + i, key j at p0 - M + j (tokens at p0 + t)

/// Whether moving every position by the same amount can change the case: not for
/// rotary scores, which depend on pos_q - pos_k alone (R(a)ᵀR(b) = R(b - a)), so a shift
/// of every position leaves them (and everything after them) as they are.
fn shift_visible(case: &Case) -> bool {
    [Scheme::Sinusoidal, Scheme::Learned].contains(&case.scheme.scheme())
        || (is(case, Scheme::Rotary) && op(case) == OperationKind::Encode)
}

/// Ignoring p0 places query i at i and key j at j - M: the reference with p0 = 0 (not
/// defined for a learned table where that puts keys at negative positions).
#[test]
fn query_start_ignored_is_the_reference_at_p0_zero() {
    holds("query-start-ignored", 4, shift_visible, |case, inputs| {
        let mut at_zero = case.clone();
        at_zero.query_start = 0;
        reference_on(&at_zero, inputs)
    });
}

/// One-based positions are every position plus one: the reference with p0 + 1, and for
/// encode the reference on positions + 1.
#[test]
fn one_based_positions_are_the_reference_one_position_later() {
    holds("positions-one-based", 18, shift_visible, |case, inputs| {
        if op(case) == OperationKind::Encode {
            return reference_on(
                case,
                &edit(inputs, "positions", |p| p.mapv_inplace(|x| x + 1.0)),
            );
        }
        let mut later = case.clone();
        later.query_start += 1;
        reference_on(&later, inputs)
    });
}

// ---------------------------------------------------------------------------------
// ALiBi: S = scale·q·k - m_h·(pos_q - pos_k)

/// ALiBi slopes written from docs/conventions.md (Press, Smith, Lewis 2022, §3 for a
/// power of two; the authors' released code for other head counts, as the page says).
fn alibi_slopes(heads: usize) -> Vec<f64> {
    let geometric = |n: usize| -> Vec<f64> {
        (1..=n)
            .map(|h| 2f64.powf(-8.0 * h as f64 / n as f64))
            .collect()
    };
    if heads.is_power_of_two() {
        return geometric(heads);
    }
    let c = 1 << (usize::BITS - 1 - heads.leading_zeros());
    let mut slopes = geometric(c);
    slopes.extend(geometric(2 * c).into_iter().step_by(2).take(heads - c));
    slopes
}

/// Slopes in reverse head order are the reference with the heads of q, k and v
/// reversed (head h then gets slope m_{H-1-h} with its own inputs), heads reversed back;
/// encode is the reference's slopes reversed.
#[test]
fn reversed_slopes_are_the_reference_with_the_heads_reversed() {
    holds(
        "alibi-slopes-reversed",
        9,
        |_| true,
        |case, inputs| {
            let mut flipped = inputs.clone();
            for name in ["q", "k", "v"] {
                if flipped.contains_key(name) {
                    flipped = edit(&flipped, name, |a| *a = reversed(a, 0));
                }
            }
            let outputs = reference_on(case, &flipped)?;
            Some(map_outputs(outputs, |_, a| reversed(&a, 0)))
        },
    );
}

/// +m·pos_key = -m·(pos_q - pos_k) + m·pos_q: on scores, the reference plus m_h·(p0 + i)
/// on every visible entry (slopes from the published rule); a per-row constant, so on
/// probabilities and outputs the variant is the reference itself.
#[test]
fn key_position_bias_is_the_reference_plus_a_row_constant() {
    holds(
        "alibi-bias-from-key-position",
        2,
        |_| true,
        |case, inputs| {
            let slopes = alibi_slopes(case.heads);
            let outputs = reference_on(case, inputs)?;
            Some(map_outputs(outputs, |_, a| {
                let mut a = a.into_dimensionality::<Ix3>().unwrap();
                for ((h, i, _), x) in a.indexed_iter_mut() {
                    *x += slopes[h] * (case.query_start + i as i64) as f64;
                }
                a.into_dyn()
            }))
        },
    );
    // The variant is written for scores cases; run on the softmax cases, the row
    // constant cancels and it is the reference.
    holds_on(
        "alibi-bias-from-key-position",
        4,
        |c| {
            is(c, Scheme::Alibi) && op(c) != OperationKind::Encode && op(c) != OperationKind::Scores
        },
        reference_on,
        false,
    );
}

// ---------------------------------------------------------------------------------
// The score scale

/// The case with its scale parameter replaced, for the schemes that have one.
fn with_scale(case: &Case, scale: Scale) -> Option<Case> {
    let scheme = match case.scheme.clone() {
        SchemeSpec::XlRelative(mut s) => {
            s.scale = scale;
            SchemeSpec::XlRelative(s)
        }
        SchemeSpec::Rotary(mut s) => {
            s.scale = scale;
            SchemeSpec::Rotary(s)
        }
        SchemeSpec::Alibi(mut s) => {
            s.scale = scale;
            SchemeSpec::Alibi(s)
        }
        SchemeSpec::Bucketed(mut s) => {
            s.scale = scale;
            SchemeSpec::Bucketed(s)
        }
        SchemeSpec::Clipped(mut s) => {
            s.scale = scale;
            SchemeSpec::Clipped(s)
        }
        SchemeSpec::Sinusoidal(_) | SchemeSpec::Learned(_) => return None,
    };
    Some(with_scheme(case, scheme))
}

fn has_scale_parameter(case: &Case) -> bool {
    with_scale(case, Scale::InverseSqrtDim).is_some()
}

/// No scaling is the reference with scale 1 (a bias that is never scaled stays as it
/// is in both).
#[test]
fn scale_missing_is_the_reference_with_scale_one() {
    holds("scale-missing", 36, has_scale_parameter, |case, inputs| {
        reference_on(&with_scale(case, Scale::Fixed(1.0))?, inputs)
    });
}

/// 1/d for 1/sqrt(d) is the reference with the fixed scale 1/d.
#[test]
fn scale_one_over_d_is_the_reference_with_that_scale() {
    holds(
        "scale-one-over-d",
        32,
        has_scale_parameter,
        |case, inputs| {
            let d = case.head_dim as f64;
            reference_on(&with_scale(case, Scale::Fixed(1.0 / d))?, inputs)
        },
    );
}

/// A fixed scale s applied twice is the reference with scale s².
#[test]
fn scale_applied_twice_is_the_reference_with_the_squared_scale() {
    holds(
        "scale-applied-twice",
        4,
        |_| true,
        |case, inputs| {
            let factor = case.scheme.scale().factor(case.head_dim);
            reference_on(&with_scale(case, Scale::Fixed(factor * factor))?, inputs)
        },
    );
}

/// The bucketed case's spec.
fn bucketed(case: &Case) -> Option<posconform::bucketed::BucketedSpec> {
    match &case.scheme {
        SchemeSpec::Bucketed(spec) => Some(*spec),
        _ => None,
    }
}

/// scale·(q·k + bias) is the reference with the bias table multiplied by the scale:
/// scale·q·k + (scale·bias). (ALiBi has no bias array to scale, so only bucketed; the
/// suite has one scaled bucketed case, [`cases`] adds the others with 1/sqrt(d).)
#[test]
fn scale_applied_to_the_bucket_bias_is_the_reference_with_a_scaled_table() {
    holds(
        "scale-applied-to-bias",
        4,
        |c| is(c, Scheme::Bucketed),
        |case, inputs| {
            let factor = case.scheme.scale().factor(case.head_dim);
            reference_on(
                case,
                &edit(inputs, "bias_table", |t| t.mapv_inplace(|x| x * factor)),
            )
        },
    );
}

// ---------------------------------------------------------------------------------
// Bucketed: S = scale·q·k + bias_table[h, bucket(pos_k - pos_q)]

/// The wrong bidirectional flag is the reference with the flag flipped.
#[test]
fn bidirectional_flag_wrong_is_the_reference_with_the_flag_flipped() {
    holds(
        "bucket-bidirectional-flag-wrong",
        12,
        |_| true,
        |case, inputs| {
            let mut spec = bucketed(case).unwrap();
            spec.bidirectional = !spec.bidirectional;
            reference_on(&with_scheme(case, SchemeSpec::Bucketed(spec)), inputs)
        },
    );
}

/// The direction flipped buckets -rel for rel. Encode lists rel = -R..R, so that is the
/// reference's buckets in reverse order. A causal rule puts every rel' = -rel >= 0 in
/// bucket 0 (n = max(-rel', 0) = 0), and every visible key has rel <= 0: the reference
/// with every column of the bias table equal to column 0.
#[test]
fn direction_flipped_is_the_reference_mirrored() {
    holds(
        "bucket-direction-flipped",
        10,
        |c| op(c) == OperationKind::Encode || !bucketed(c).unwrap().bidirectional,
        |case, inputs| {
            if op(case) == OperationKind::Encode {
                let buckets = reference_on(case, inputs)?;
                return Some(map_outputs(buckets, |_, a| reversed(&a, 0)));
            }
            reference_on(
                case,
                &edit(inputs, "bias_table", |t| {
                    let first = t.slice(s![.., 0..1]).to_owned();
                    t.assign(&first);
                }),
            )
        },
    );
}

/// A bidirectional rule that does not halve the bucket count is, for rel <= 0, the
/// causal rule with all nb buckets (max_exact = nb/2, the logarithmic range over nb - nb/2
/// buckets, capped at nb - 1), and for rel > 0 that bucket of -rel offset by nb/2. Every
/// visible key of an attending case has rel <= 0: the causal reference. Encode (rel =
/// -R..R): the causal reference's bucket at rel <= 0, nb/2 plus its bucket at -rel
/// beyond.
#[test]
fn exact_range_not_halved_is_the_causal_rule_with_every_bucket() {
    holds(
        "bucket-exact-range-not-halved",
        4,
        |_| true,
        |case, inputs| {
            let mut spec = bucketed(case).unwrap();
            spec.bidirectional = false;
            let causal = reference_on(&with_scheme(case, SchemeSpec::Bucketed(spec)), inputs)?;
            if op(case) != OperationKind::Encode {
                return Some(causal);
            }
            let rel = inputs["relative_positions"].view().to_owned();
            let half = (spec.num_buckets / 2) as f64;
            Some(map_outputs(causal, |_, c| {
                let n = c.len();
                ArrayD::from_shape_fn(c.raw_dim(), |ix| {
                    let i = ix[0];
                    if rel[[i]] <= 0.0 {
                        c[[i]]
                    } else {
                        half + c[[n - 1 - i]]
                    }
                })
            }))
        },
    );
}

// ---------------------------------------------------------------------------------
// Clipped: S = scale·q·(k + w_key[idx]), output = Σ p·(v + w_value[idx])

/// Leaving the value embeddings out is the reference with w_value = 0.
#[test]
fn value_embeddings_missing_is_the_reference_with_w_value_zero() {
    holds(
        "clipped-value-embeddings-missing",
        3,
        |_| true,
        |case, inputs| reference_on(case, &edit(inputs, "w_value", |w| w.fill(0.0))),
    );
}

/// clip(i - j) + k = 2k - (clip(j - i) + k): the reference with both tables read back to
/// front; encode is 2k minus the reference's index.
#[test]
fn clip_index_sign_flipped_is_the_reference_with_the_tables_reversed() {
    holds(
        "clip-index-sign-flipped",
        6,
        |_| true,
        |case, inputs| {
            if op(case) == OperationKind::Encode {
                let SchemeSpec::Clipped(spec) = &case.scheme else {
                    panic!("a clipped case")
                };
                let last = 2.0 * spec.clip_distance as f64;
                let indices = reference_on(case, inputs)?;
                return Some(map_outputs(indices, |_, a| a.mapv(|x| last - x)));
            }
            let mut inputs = edit(inputs, "w_key", |w| *w = reversed(w, 1));
            if inputs.contains_key("w_value") {
                inputs = edit(&inputs, "w_value", |w| *w = reversed(w, 1));
            }
            reference_on(case, &inputs)
        },
    );
}

// ---------------------------------------------------------------------------------
// Masking and the key axis

/// Ignoring padding is the reference with no hidden keys.
#[test]
fn padding_ignored_is_the_reference_without_hidden_keys() {
    holds(
        "padding-mask-ignored",
        3,
        |_| true,
        |case, inputs| {
            let mut unpadded = case.clone();
            unpadded.hidden_keys.clear();
            reference_on(&unpadded, inputs)
        },
    );
}

/// Masking the memory is the reference with the memory keys 0..M hidden (on top of the
/// case's own hidden keys), for the one-window operations where keys are indices (and
/// where the case does not hide the whole memory already).
#[test]
fn memory_keys_masked_is_the_reference_with_the_memory_hidden() {
    holds(
        "memory-keys-masked",
        29,
        |c| one_window(c) && (0..c.memory_len).any(|j| !c.hidden_keys.contains(&j)),
        |case, inputs| {
            let mut hidden = case.clone();
            for j in 0..case.memory_len {
                if !hidden.hidden_keys.contains(&j) {
                    hidden.hidden_keys.push(j);
                }
            }
            hidden.hidden_keys.sort_unstable();
            reference_on(&hidden, inputs)
        },
    );
}

/// Reading the key axis as [segment ; memory] takes input key j < L for current token j
/// (position p0 + j, visible to query i iff j <= i) and input key L + t for memory key t
/// (position p0 - M + t, always visible): the reference on keys and values reordered to
/// [k[L..] ; k[..L]] (with the hidden keys renamed alike), its key-indexed outputs read
/// back in the input order.
#[test]
fn memory_after_segment_is_the_reference_on_reordered_keys() {
    holds(
        "memory-placed-after-segment",
        31,
        one_window,
        |case, inputs| {
            let (l, m) = (case.query_len, case.memory_len);
            // Reference key index of input key j.
            let place = |j: usize| if j < l { m + j } else { j - l };
            // Input key at reference index c.
            let order: Vec<usize> = (0..l + m)
                .map(|c| if c < m { l + c } else { c - m })
                .collect();
            let mut reordered = inputs.clone();
            for name in ["k", "v"] {
                if reordered.contains_key(name) {
                    reordered = edit(&reordered, name, |a| *a = a.select(Axis(1), &order));
                }
            }
            let mut renamed = case.clone();
            renamed.hidden_keys = case.hidden_keys.iter().map(|&j| place(j)).collect();
            renamed.hidden_keys.sort_unstable();
            let outputs = reference_on(&renamed, &reordered)?;
            let back: Vec<usize> = (0..l + m).map(place).collect();
            Some(map_outputs(outputs, |o, a| {
                if o.is_key_indexed() {
                    take_last(&a, &back)
                } else {
                    a
                }
            }))
        },
    );
}

// ---------------------------------------------------------------------------------
// The check itself can fail

/// Planted-bug companion: a wrong equivalence is caught. The content-bias variant is
/// not the reference with the *position* bias zeroed, nor is the reversed rotary
/// direction the plain reference, nor the rel-shift variant the reference with r
/// shifted the other way.
#[test]
fn a_wrong_equivalence_is_reported() {
    let cases = core();
    let case = cases
        .iter()
        .find(|c| c.id == "xl_relative.scores.short_memory")
        .unwrap();
    let inputs = case.inputs().unwrap();
    let got = variant("xl-content-bias-missing", case, &inputs).unwrap();
    let wrong = expected(case, &edit(&inputs, "position_bias", |v| v.fill(0.0))).unwrap();
    assert!(difference(&got, &wrong).is_some());

    let got = variant("rel-shift-off-by-one", case, &inputs).unwrap();
    let r = inputs["r"].view().to_owned();
    let up = edit(&inputs, "r", |x| {
        let rows = r.shape()[1];
        x.slice_mut(s![.., ..rows - 1, ..])
            .assign(&r.slice(s![.., 1.., ..]));
    });
    assert!(difference(&got, &expected(case, &up).unwrap()).is_some());

    let case = cases
        .iter()
        .find(|c| c.id == "rotary.scores.scaled")
        .unwrap();
    let inputs = case.inputs().unwrap();
    let got = variant("rotary-direction-reversed", case, &inputs).unwrap();
    assert!(difference(&got, &expected(case, &inputs).unwrap()).is_some());

    // And the comparison itself: one element off by 1e-11 relative is a difference.
    let mut off: BTreeMap<Output, ArrayD<f64>> = got.clone();
    let scores = off.get_mut(&Output::Scores).unwrap();
    let first = scores
        .iter()
        .position(|x| x.is_finite() && *x != 0.0)
        .unwrap();
    let x = &mut scores.as_slice_mut().unwrap()[first];
    *x *= 1.0 + 1e-11;
    assert!(difference(&off, &got).is_some());
}
