//! The sentences of the text report that used to mislead, each pinned on a real case
//! and a kernel output with exactly that defect: what the report says, and what it
//! must not say. Where a negative assertion alone could never fail, a companion renders
//! a report for an input where the sentence is true and shows it appears.
//!
//! Kernel outputs are built from the case's own inputs: either the reference run on an
//! input that carries the defect (a bias left out, embeddings the kernel reads past a
//! clamp), or the expected outputs edited exactly where the defect lies. The sentences
//! and numbers asserted are worked out here from the case geometry
//! (docs/conventions.md: query i sees key j iff j <= M + i, Δ = M + i - j).

use ndarray::{s, Array3, ArrayD, Ix3};
use posconform::case::{Arrays, Case, Output};
use posconform::compare::{compare, CaseReport, CompareOptions, Verdict};
use posconform::diagnose::{self, Matching};
use posconform::kernel::Support;
use posconform::kernel::{Answer, Kernel, KernelInfo};
use posconform::math::Stream;
use posconform::reference::{self, Outputs};
use posconform::report::{text, Report};
use posconform::run::check::run_case;
use posconform::tensor::Tensor;
use posconform::{Dtype, Scheme, SchemeSpec};

// ---------------------------------------------------------------------------------
// Building reports

fn core_case(id: &str) -> Case {
    posconform::suite::suite("core")
        .expect("the core suite builds")
        .into_iter()
        .find(|c| c.id == id)
        .unwrap_or_else(|| panic!("core suite has no case {id}"))
}

/// Outputs as the arrays a kernel returns, in `dtype`.
fn as_arrays(outputs: &Outputs, dtype: Dtype) -> Arrays {
    outputs
        .iter()
        .map(|(o, a)| (o.name().to_string(), Tensor::from_f64(dtype, a.clone())))
        .collect()
}

/// Compares `got` (returned in the case's dtype) with the reference on `inputs`.
fn judge(case: &Case, inputs: &Arrays, got: &Outputs) -> CaseReport {
    judge_with(case, inputs, got, case.dtype, &CompareOptions::default())
}

fn judge_with(
    case: &Case,
    inputs: &Arrays,
    got: &Outputs,
    dtype: Dtype,
    options: &CompareOptions,
) -> CaseReport {
    let expected = reference::expected(case, inputs).expect("expected outputs");
    compare(case, inputs, &expected, &as_arrays(got, dtype), options).expect("comparison")
}

/// The case's expected outputs after `edit`.
fn edited(case: &Case, inputs: &Arrays, edit: impl FnOnce(&mut Outputs)) -> Outputs {
    let mut outputs = reference::expected(case, inputs).expect("expected outputs");
    edit(&mut outputs);
    outputs
}

/// One output as `[H, L, X]`, mutable.
fn three(outputs: &mut Outputs, output: Output) -> ndarray::ArrayViewMut3<'_, f64> {
    outputs
        .get_mut(&output)
        .expect("the case has the output")
        .view_mut()
        .into_dimensionality::<Ix3>()
        .expect("three axes")
}

/// The text report of a run with this one case.
fn rendered(case: &CaseReport) -> String {
    text::render(&Report {
        mode: "check".into(),
        subject: "pattern test kernel".into(),
        cases: vec![case.clone()],
        notes: Vec::new(),
        never_exercised: Vec::new(),
        random: Default::default(),
        diagnosis: None,
    })
}

/// The inputs with `name` replaced (kept in f64, so no value is rounded).
fn with_input(inputs: &Arrays, name: &str, values: ArrayD<f64>) -> Arrays {
    let mut inputs = inputs.clone();
    inputs.insert(name.to_string(), Tensor::from_f64(Dtype::F64, values));
    inputs
}

fn input(inputs: &Arrays, name: &str) -> ArrayD<f64> {
    inputs[name].view().to_owned()
}

/// The text with every run of whitespace (a wrapped line's break and indent included)
/// as one space, so a sentence is found wherever the report wraps it.
fn flat(text: &str) -> String {
    text.split_whitespace().collect::<Vec<_>>().join(" ")
}

fn assert_says(text: &str, sentence: &str) {
    assert!(
        flat(text).contains(sentence),
        "the report does not say {sentence:?}:\n{text}"
    );
}

fn assert_does_not_say(text: &str, sentence: &str) {
    assert!(
        !flat(text).contains(sentence),
        "the report says {sentence:?}:\n{text}"
    );
}

// ---------------------------------------------------------------------------------
// 1. "only memory keys are wrong" needs current keys at the same distances that pass

/// `xl_relative.scores.scaled_clamped_d96` (clamp c = 5, M = 6, L = 6, K = 12) run by a
/// kernel that ignores the clamp: distance Δ > 5 reads an embedding of its own instead
/// of row c. Those distances (6..11) exist only between a query and a memory key (a
/// current key is at most L - 1 = 5 away), so every error sits in the memory columns,
/// but no current key at the same distance exists to show the memory is to blame. The
/// report names the distances, not the memory.
#[test]
fn an_ignored_clamp_is_a_distance_band_not_a_memory_fault() {
    let case = core_case("xl_relative.scores.scaled_clamped_d96");
    let SchemeSpec::XlRelative(spec) = &case.scheme else {
        panic!("an xl_relative case")
    };
    assert_eq!(spec.clamp_len, Some(5));
    assert_eq!((case.memory_len, case.query_len), (6, 6));
    let inputs = case.inputs().unwrap();
    let r = input(&inputs, "r");
    let (heads, rows, d) = (r.shape()[0], r.shape()[1], r.shape()[2]);
    assert_eq!(rows, 6, "c + 1 rows of r");
    // The kernel's own table: the case's rows for 0..=c, other embeddings beyond.
    let extra = Stream::new(77).array(ndarray::IxDyn(&[heads, case.key_len(), d]), 1.0);
    let mut table = extra.clone();
    table.slice_mut(s![.., ..rows, ..]).assign(&r);
    let mut unclamped = case.clone();
    let mut ignored = *spec;
    ignored.clamp_len = None;
    unclamped.scheme = SchemeSpec::XlRelative(ignored);
    let got = reference::expected(&unclamped, &with_input(&inputs, "r", table)).unwrap();

    let report = judge(&case, &inputs, &got);
    assert_eq!(report.verdict, Verdict::Fail);
    let text = rendered(&report);
    assert_does_not_say(&text, "only memory keys");
    assert_says(
        &text,
        "only distances Δ = 6..11 are wrong; other visible distances are right",
    );
}

/// The bucket of `rel = pos_key - pos_query`, written from docs/conventions.md
/// ("bucketed", the T5 rule), truncating the logarithmic part or (the bug) rounding it.
fn t5_bucket(
    rel: i64,
    num_buckets: i64,
    max_distance: i64,
    bidirectional: bool,
    round: bool,
) -> i64 {
    let mut n = -rel;
    let (per_direction, offset) = if bidirectional {
        let half = num_buckets / 2;
        let offset = if n < 0 { half } else { 0 };
        n = n.abs();
        (half, offset)
    } else {
        n = n.max(0);
        (num_buckets, 0)
    };
    let max_exact = per_direction / 2;
    let b = if n < max_exact {
        n
    } else {
        let x = (n as f64 / max_exact as f64).ln() / (max_distance as f64 / max_exact as f64).ln()
            * (per_direction - max_exact) as f64;
        let x = if round { x.round() } else { x.trunc() };
        (max_exact + x as i64).min(per_direction - 1)
    };
    offset + b
}

/// `bucketed.scores.beyond_max_distance` (32 buckets, max distance 128, causal,
/// M = 200, L = 6) run by a kernel that rounds the logarithmic bucket part instead of
/// truncating it: only distances of at least max_exact = 16 can move, and every such
/// distance is between a query and a memory key (current keys are at most 5 away).
/// The report must not blame the memory; the diagnosis names the rounding.
#[test]
fn rounded_t5_buckets_are_not_called_a_memory_fault() {
    let case = core_case("bucketed.scores.beyond_max_distance");
    let SchemeSpec::Bucketed(spec) = &case.scheme else {
        panic!("a bucketed case")
    };
    assert_eq!(
        (spec.num_buckets, spec.max_distance, spec.bidirectional),
        (32, 128, false)
    );
    let inputs = case.inputs().unwrap();
    let table = input(&inputs, "bias_table");
    let m = case.memory_len;
    let got = edited(&case, &inputs, |outputs| {
        for ((h, i, j), x) in three(outputs, Output::Scores).indexed_iter_mut() {
            if x.is_finite() {
                let rel = j as i64 - (m + i) as i64;
                let right = t5_bucket(rel, 32, 128, false, false) as usize;
                let wrong = t5_bucket(rel, 32, 128, false, true) as usize;
                *x += table[[h, wrong]] - table[[h, right]];
            }
        }
    });
    let report = judge(&case, &inputs, &got);
    assert_eq!(report.verdict, Verdict::Fail);
    let text = rendered(&report);
    assert_does_not_say(&text, "only memory keys");
    assert_says(
        &text,
        "`bucket-log-rounded` reproduces every output element within budget",
    );
}

/// Companion: where current keys at the same distances do pass (head 0's memory scores
/// of the same case as above off by 1e-3; memory keys are 1..11 away, current keys
/// 0..5), the memory sentence is true and the report says it.
#[test]
fn a_memory_only_error_is_called_one() {
    let case = core_case("xl_relative.scores.scaled_clamped_d96");
    let inputs = case.inputs().unwrap();
    let m = case.memory_len;
    let got = edited(&case, &inputs, |outputs| {
        for ((h, _, j), x) in three(outputs, Output::Scores).indexed_iter_mut() {
            if h == 0 && j < m {
                *x += 1e-3;
            }
        }
    });
    let text = rendered(&judge(&case, &inputs, &got));
    assert_says(
        &text,
        "only memory keys (key < M = 6) are wrong; current keys at the same distances are right",
    );
}

// ---------------------------------------------------------------------------------
// 2. No distance band when the band is every visible distance

/// `xl_relative.scores.short_memory` cut to L = 3 with its M = 3 memory keys hidden
/// (padding): query i sees keys 3..=3 + i, so the only visible distances are 0..2.
fn padded_three_queries() -> Case {
    let mut case = core_case("xl_relative.scores.short_memory");
    case.id = "xl_relative.scores.padded_three_queries".into();
    case.query_len = 3;
    case.memory_len = 3;
    case.hidden_keys = vec![0, 1, 2];
    case.validate().expect("a valid case");
    case
}

/// A kernel without the content bias u on the case above: every visible score is
/// wrong, so "only distances 0..2 are wrong" would name every distance there is.
#[test]
fn no_distance_band_when_every_visible_distance_is_wrong() {
    let case = padded_three_queries();
    let inputs = case.inputs().unwrap();
    let u = input(&inputs, "content_bias");
    let got = reference::expected(
        &case,
        &with_input(&inputs, "content_bias", ArrayD::zeros(u.raw_dim())),
    )
    .unwrap();
    let report = judge(&case, &inputs, &got);
    // Every visible score: 1 + 2 + 3 per head.
    assert_eq!(report.outputs[0].over_budget, case.heads * 6);
    let text = rendered(&report);
    assert_does_not_say(&text, "only distance");
}

/// Companion: the same case with only the distance-0 scores (key M + i) wrong: the
/// band is one of three visible distances and the report names it.
#[test]
fn a_band_narrower_than_the_visible_distances_is_named() {
    let case = padded_three_queries();
    let inputs = case.inputs().unwrap();
    let m = case.memory_len;
    let got = edited(&case, &inputs, |outputs| {
        for ((_, i, j), x) in three(outputs, Output::Scores).indexed_iter_mut() {
            if j == m + i {
                *x += 1e-3;
            }
        }
    });
    let text = rendered(&judge(&case, &inputs, &got));
    assert_says(
        &text,
        "only distance Δ = 0 is wrong; other visible distances are right",
    );
}

// ---------------------------------------------------------------------------------
// 3. No growth ratio against an error-free start

/// `sinusoidal.encode.interleaved` (a table of 9 rows) with rows 0..2 exact and an
/// error growing from row 3 on: a ratio to the first third would divide by nothing.
/// The report says where the errors begin instead.
#[test]
fn no_growth_ratio_when_the_first_third_is_exact() {
    let case = core_case("sinusoidal.encode.interleaved");
    let inputs = case.inputs().unwrap();
    let got = edited(&case, &inputs, |outputs| {
        let table = outputs.get_mut(&Output::Table).unwrap();
        assert_eq!(table.shape()[0], 9);
        for ((row, _), x) in table
            .view_mut()
            .into_dimensionality::<ndarray::Ix2>()
            .unwrap()
            .indexed_iter_mut()
        {
            if row >= 3 {
                *x += 1e-6 * ((row - 2) * (row - 2)) as f64;
            }
        }
    });
    let text = rendered(&judge(&case, &inputs, &got));
    assert_does_not_say(&text, "grows with position");
    assert_does_not_say(&text, "x the first");
    assert_says(&text, "rows before 3 are right; errors begin at row 3");
}

/// Companion: the same table with an error in every row, growing as (row + 1)³: the
/// first third has an error of its own and the growth is stated.
#[test]
fn growth_from_a_wrong_start_is_stated() {
    let case = core_case("sinusoidal.encode.interleaved");
    let inputs = case.inputs().unwrap();
    let got = edited(&case, &inputs, |outputs| {
        let table = outputs.get_mut(&Output::Table).unwrap();
        for ((row, _), x) in table
            .view_mut()
            .into_dimensionality::<ndarray::Ix2>()
            .unwrap()
            .indexed_iter_mut()
        {
            *x += 1e-9 * ((row + 1).pow(3)) as f64;
        }
    });
    let text = rendered(&judge(&case, &inputs, &got));
    assert_says(&text, "the error grows with position (last third ");
    assert_says(&text, "x the first)");
}

// ---------------------------------------------------------------------------------
// 4. NaN in fully masked rows is not a leaking mask

/// The two core cases with padding that hides every key of some query
/// (`hidden_keys` [0, 1, 2] with M = 2: query 0 sees keys 0..=2, all hidden), answered
/// by a textbook softmax: NaN probabilities and a NaN output row for those queries.
#[test]
fn nan_in_fully_masked_rows_is_named_and_counted_not_called_a_leak() {
    for id in [
        "xl_relative.attention.padded_rows",
        "alibi.attention.padded_f16",
    ] {
        let case = core_case(id);
        let (h, l, m, k, d) = (
            case.heads,
            case.query_len,
            case.memory_len,
            case.key_len(),
            case.head_dim,
        );
        // Queries whose every visible key is hidden.
        let empty: Vec<usize> = (0..l)
            .filter(|&i| (0..=m + i).all(|j| case.hidden_keys.contains(&j)))
            .collect();
        assert_eq!(empty, [0], "{id}");
        let inputs = case.inputs().unwrap();
        let got = edited(&case, &inputs, |outputs| {
            for output in [Output::Probs, Output::Output] {
                let mut a = three(outputs, output);
                for &i in &empty {
                    a.slice_mut(s![.., i, ..]).fill(f64::NAN);
                }
            }
        });
        let report = judge(&case, &inputs, &got);
        let text = rendered(&report);
        let rows = h * empty.len();
        let (nan_probs, nan_output) = (rows * k, rows * d);
        assert_says(
            &text,
            &format!(
                "probs [{h}, {l}, {k}] ({}): {nan_probs} of {} elements over budget",
                case.dtype,
                h * l * k
            ),
        );
        assert_says(
            &text,
            &format!(
                "only {rows} rows whose keys are all masked are wrong: NaN where zeros are expected"
            ),
        );
        assert_says(
            &text,
            &format!("{nan_probs} non-finite values where finite ones were expected"),
        );
        assert_says(
            &text,
            &format!("{nan_output} non-finite values where finite ones were expected"),
        );
        assert_says(
            &text,
            &format!(
                "masking: {nan_probs} masked entries hold NaN or +inf where zero (or -inf) is expected"
            ),
        );
        assert_does_not_say(&text, "leak");
        assert_does_not_say(&text, "carry probability");
        let probs = report
            .outputs
            .iter()
            .find(|o| o.name == Output::Probs)
            .unwrap();
        assert_eq!(probs.non_finite, nan_probs, "{id}");
        let output = report
            .outputs
            .iter()
            .find(|o| o.name == Output::Output)
            .unwrap();
        assert_eq!(output.non_finite, nan_output, "{id}");
        assert!(
            text.contains("`masked-row-nan`"),
            "{id}: the diagnosis names the NaN rows:\n{text}"
        );
    }
}

/// Companion: a mask that does leak (one masked score of
/// `xl_relative.scores.short_memory` returned as 0, which carries probability) is
/// called a leak, one entry in the singular.
#[test]
fn a_leaking_mask_is_called_one() {
    let case = core_case("xl_relative.scores.short_memory");
    let inputs = case.inputs().unwrap();
    let got = edited(&case, &inputs, |outputs| {
        let mut scores = three(outputs, Output::Scores);
        // Query 0 sees keys 0..=M = 4; key 12 is in its future.
        assert_eq!(scores[[1, 0, 12]], f64::NEG_INFINITY);
        scores[[1, 0, 12]] = 0.0;
    });
    let text = rendered(&judge(&case, &inputs, &got));
    assert_says(
        &text,
        "only masked entries are wrong: masked keys carry probability (the mask leaks)",
    );
    assert_says(&text, "masking: 1 masked entry carries probability (leak)");
}

// ---------------------------------------------------------------------------------
// 5. The worst element never reads got == expected

/// The `got` and `expected` strings of the first "worst at" line.
fn worst_values(text: &str) -> (String, String) {
    let line = text
        .lines()
        .find(|l| l.contains("worst at"))
        .unwrap_or_else(|| panic!("no worst element in:\n{text}"));
    let after = |key: &str| {
        let start = line.find(key).unwrap() + key.len();
        line[start..].split(',').next().unwrap().trim().to_string()
    };
    (after("got "), after("expected "))
}

/// `learned.attention.f32` from a kernel that declares f32 (so values are printed with
/// f32's 9 significant digits) judged at the f64 budget (`--budget-dtype f64`), one
/// probability off by a relative 1e-12: over the f64 budget, and equal to 9 digits.
/// The printed values must still differ.
#[test]
fn the_worst_element_never_prints_got_equal_to_expected() {
    let case = core_case("learned.attention.f32");
    let inputs = case.inputs().unwrap();
    for declared in [Dtype::F32, Dtype::F16, Dtype::Bf16] {
        let mut true_got = 0.0;
        let mut true_expected = 0.0;
        let got = edited(&case, &inputs, |outputs| {
            let mut probs = three(outputs, Output::Probs);
            true_expected = probs[[1, 2, 3]];
            assert!(true_expected > 0.0);
            probs[[1, 2, 3]] *= 1.0 + 1e-12;
            true_got = probs[[1, 2, 3]];
        });
        let options = CompareOptions {
            declared: Some(declared),
            budget_dtype: Some(Dtype::F64),
            ..CompareOptions::default()
        };
        let report = judge_with(&case, &inputs, &got, Dtype::F64, &options);
        assert_eq!(report.verdict, Verdict::Fail, "{declared}");
        let text = rendered(&report);
        assert_says(&text, "worst at head 1, query 2, key 3");
        let (shown_got, shown_expected) = worst_values(&text);
        assert_ne!(shown_got, shown_expected, "{declared}:\n{text}");
        let (g, e): (f64, f64) = (shown_got.parse().unwrap(), shown_expected.parse().unwrap());
        // The shown values are the true ones to the digits shown, and tell them apart.
        assert!((g - true_got).abs() < (true_got - true_expected).abs() / 2.0);
        assert!((e - true_expected).abs() < (true_got - true_expected).abs() / 2.0);
    }
}

/// The digit rule itself: two different values never print alike, whatever the dtype.
#[test]
fn values_that_differ_never_print_alike() {
    use posconform::report::text::format_pair;
    for dtype in [Dtype::F64, Dtype::F32, Dtype::F16, Dtype::Bf16] {
        for (got, expected) in [
            (0.5, 0.5 + 1e-12),
            (1.0, f64::from_bits(1.0f64.to_bits() + 1)),
            (-3.25e-7, -3.2500001e-7),
            (1e300, 1.0000000000001e300),
        ] {
            let (g, e) = format_pair(got, expected, dtype);
            assert_ne!(g, e, "{dtype}: {got} vs {expected}");
        }
        // Equal values print equal (nothing is invented to tell them apart).
        let (g, e) = format_pair(0.25, 0.25, dtype);
        assert_eq!(g, e);
    }
}

// ---------------------------------------------------------------------------------
// 6. Grammar of the masked-visible-keys sentence

/// `alibi.scores.h12` (H = 12, L = 5, M = 3) with the diagonal (key M + i, distance 0)
/// masked: 60 keys that the query must see, and one such key in the singular.
#[test]
fn visible_keys_masked_reads_as_a_sentence() {
    let case = core_case("alibi.scores.h12");
    let inputs = case.inputs().unwrap();
    let m = case.memory_len;
    let got = edited(&case, &inputs, |outputs| {
        for ((_, i, j), x) in three(outputs, Output::Scores).indexed_iter_mut() {
            if j == m + i {
                *x = f64::NEG_INFINITY;
            }
        }
    });
    let text = rendered(&judge(&case, &inputs, &got));
    assert_says(&text, "60 keys that the query must see are masked");
    assert_does_not_say(&text, "keys are the query must see");

    let got = edited(&case, &inputs, |outputs| {
        three(outputs, Output::Scores)[[3, 2, 1]] = f64::NEG_INFINITY;
    });
    let text = rendered(&judge(&case, &inputs, &got));
    assert_says(&text, "1 key that the query must see is masked");
    assert_does_not_say(&text, "key is the query must see");
}

// ---------------------------------------------------------------------------------
// 7. ALiBi written as +m·pos_key: a row constant on scores, nothing on attention

/// ALiBi slopes from docs/conventions.md (Press, Smith, Lewis 2022, §3 for powers of
/// two; the authors' released code for other head counts, as the page says).
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

/// An in-process ALiBi kernel with the bias in the key-position form:
/// `S = scale·q·k + m_h·pos_key`, written from the formula, not from the reference.
struct KeyFormAlibi;

impl Kernel for KeyFormAlibi {
    fn describe(&mut self) -> posconform::Result<KernelInfo> {
        use posconform::case::OperationKind;
        Ok(KernelInfo {
            name: "alibi key form".into(),
            version: "1".into(),
            supports: vec![Support::new(
                Scheme::Alibi,
                &[OperationKind::Scores, OperationKind::Attention],
            )],
            dtypes: vec![Dtype::F64],
            conventions: Vec::new(),
        })
    }

    fn run(&mut self, case: &Case, _dtype: Dtype, inputs: &Arrays) -> posconform::Result<Answer> {
        let SchemeSpec::Alibi(spec) = &case.scheme else {
            panic!("an alibi case")
        };
        let scale = spec.scale.factor(case.head_dim);
        let get = |name: &str| -> Array3<f64> {
            inputs[name]
                .view()
                .to_owned()
                .into_dimensionality()
                .unwrap()
        };
        let (q, k) = (get("q"), get("k"));
        let (h, l, m, kk) = (case.heads, case.query_len, case.memory_len, case.key_len());
        let slopes = alibi_slopes(h);
        let mut scores = Array3::from_elem((h, l, kk), f64::NEG_INFINITY);
        for head in 0..h {
            for i in 0..l {
                for j in 0..=m + i {
                    let dot: f64 = (0..case.head_dim)
                        .map(|c| q[[head, i, c]] * k[[head, j, c]])
                        .sum();
                    let key_position = case.query_start - m as i64 + j as i64;
                    scores[[head, i, j]] = scale * dot + slopes[head] * key_position as f64;
                }
            }
        }
        let mut outputs = Arrays::new();
        if case.operation.kind() == posconform::case::OperationKind::Attention {
            let v = get("v");
            let mut probs = Array3::zeros((h, l, kk));
            let mut out = Array3::zeros((h, l, case.head_dim));
            for head in 0..h {
                for i in 0..l {
                    let row = scores.slice(s![head, i, ..]);
                    let top = row.fold(f64::NEG_INFINITY, |a, &b| a.max(b));
                    let e: Vec<f64> = row.iter().map(|&x| (x - top).exp()).collect();
                    let sum: f64 = e.iter().sum();
                    for j in 0..kk {
                        probs[[head, i, j]] = e[j] / sum;
                        for c in 0..case.head_dim {
                            out[[head, i, c]] += e[j] / sum * v[[head, j, c]];
                        }
                    }
                }
            }
            outputs.insert(
                "probs".into(),
                Tensor::from_f64(Dtype::F64, probs.into_dyn()),
            );
            outputs.insert(
                "output".into(),
                Tensor::from_f64(Dtype::F64, out.into_dyn()),
            );
        } else {
            outputs.insert(
                "scores".into(),
                Tensor::from_f64(Dtype::F64, scores.into_dyn()),
            );
        }
        Ok(Answer::Outputs {
            outputs,
            elapsed_ms: None,
        })
    }
}

/// On `alibi.scores.h12` (p0 = 500, L = 5) the key form differs from -m·(i - j) by
/// m_h·pos_query, one constant per row, largest for the largest slope (2^-0.5, head 8
/// of 12 by the rule of docs/conventions.md) at query 4: 504 · 2^-0.5 = 356.38. The
/// report says so and that probabilities would agree; on `alibi.attention.h6` the same
/// kernel passes.
#[test]
fn alibi_in_key_position_form_is_a_row_shift_on_scores_and_passes_attention() {
    let mut kernel = KeyFormAlibi;
    let info = kernel.describe().unwrap();
    let scores_case = core_case("alibi.scores.h12");
    assert_eq!((scores_case.query_start, scores_case.query_len), (500, 5));
    let (report, _) = run_case(&mut kernel, &info, &scores_case, &CompareOptions::default());
    assert_eq!(report.verdict, Verdict::Fail);
    let text = rendered(&report);
    assert_says(
        &text,
        "the scores differ from the reference by one constant per query row (up to 3.564e2): \
         probabilities and outputs would agree",
    );
    assert_says(
        &text,
        "matches `alibi-bias-from-key-position`, an equivalent convention rather than a broken model",
    );
    // Nothing else is claimed about where the errors lie: every visible score is off.
    assert_does_not_say(&text, "only distance");
    assert_does_not_say(&text, "only memory keys");
    assert_does_not_say(&text, "must see");
    assert_does_not_say(&text, "leak");

    let attention_case = core_case("alibi.attention.h6");
    let (report, _) = run_case(
        &mut kernel,
        &info,
        &attention_case,
        &CompareOptions::default(),
    );
    assert_eq!(report.verdict, Verdict::Pass, "{}", rendered(&report));
}

/// Companion: a shift that is not constant along the row (ALiBi with the sign of the
/// bias flipped, +m·(i - j)) is not called a row shift.
#[test]
fn a_shift_that_varies_along_the_row_is_not_called_constant() {
    let case = core_case("alibi.scores.h12");
    let inputs = case.inputs().unwrap();
    let slopes = alibi_slopes(case.heads);
    let m = case.memory_len;
    let got = edited(&case, &inputs, |outputs| {
        for ((h, i, j), x) in three(outputs, Output::Scores).indexed_iter_mut() {
            if x.is_finite() {
                *x += 2.0 * slopes[h] * (m + i - j) as f64;
            }
        }
    });
    let text = rendered(&judge(&case, &inputs, &got));
    assert_does_not_say(&text, "one constant per query row");
    assert_says(
        &text,
        "`alibi-bias-sign-flipped` reproduces every output element",
    );
}

// ---------------------------------------------------------------------------------
// 8. Structured corruption is not a precision fault

/// The precision faults of the catalogue (matched by error size alone).
fn precision_faults() -> Vec<&'static str> {
    diagnose::catalogue()
        .iter()
        .filter(|f| f.matching == Matching::ErrorSize)
        .map(|f| f.id)
        .collect()
}

fn assert_no_precision_fault(report: &CaseReport, what: &str) {
    let diagnosis = report
        .diagnosis
        .as_ref()
        .expect("a failing case is diagnosed");
    let text = rendered(report);
    for id in precision_faults() {
        assert!(
            !diagnosis.named().contains(&id),
            "{what}: named {id}: {diagnosis:?}"
        );
        assert_does_not_say(&text, &format!("`{id}`"));
    }
}

/// Attention outputs with the two heads swapped, and with the output written query
/// major ([L, H, d]) where [H, L, d] is read: every value is a right value in the wrong
/// place, and the error has nothing of rounding about it.
#[test]
fn swapped_heads_and_a_transposed_output_are_not_precision_faults() {
    assert_eq!(precision_faults().len(), 3);
    for id in [
        "xl_relative.attention.f32",
        "learned.attention.f32",
        "sinusoidal.attention.offset",
    ] {
        let case = core_case(id);
        let inputs = case.inputs().unwrap();
        let swapped = edited(&case, &inputs, |outputs| {
            for output in [Output::Probs, Output::Output] {
                let mut a = three(outputs, output);
                let first = a.slice(s![0, .., ..]).to_owned();
                let second = a.slice(s![1, .., ..]).to_owned();
                a.slice_mut(s![0, .., ..]).assign(&second);
                a.slice_mut(s![1, .., ..]).assign(&first);
            }
        });
        let report = judge(&case, &inputs, &swapped);
        assert_eq!(report.verdict, Verdict::Fail, "{id}");
        assert_no_precision_fault(&report, &format!("{id}, heads swapped"));

        let transposed = edited(&case, &inputs, |outputs| {
            let out = outputs.get_mut(&Output::Output).unwrap();
            let shape = out.shape().to_vec();
            let query_major: Vec<f64> = out
                .view()
                .permuted_axes(vec![1, 0, 2])
                .iter()
                .copied()
                .collect();
            *out = ArrayD::from_shape_vec(shape, query_major).unwrap();
        });
        let report = judge(&case, &inputs, &transposed);
        assert_eq!(report.verdict, Verdict::Fail, "{id}");
        assert_no_precision_fault(&report, &format!("{id}, output transposed"));
    }
}

/// Companion: a kernel that really computes in f16 while declaring f32 (the
/// same-precision f16 baseline returned for `xl_relative.attention.f32`) is named a
/// precision fault, so the check above can fail.
#[test]
fn a_kernel_computing_in_half_precision_is_named_one() {
    let case = core_case("xl_relative.attention.f32");
    let inputs = case.inputs().unwrap();
    let got = reference::baseline(&case, &inputs, Dtype::F16).unwrap();
    let options = CompareOptions {
        declared: Some(Dtype::F32),
        ..CompareOptions::default()
    };
    let report = judge_with(&case, &inputs, &got, Dtype::F32, &options);
    assert_eq!(report.verdict, Verdict::Fail);
    let named = report.diagnosis.as_ref().unwrap().named().to_vec();
    assert!(named.contains(&"computes-in-half-precision"), "{named:?}");
}
