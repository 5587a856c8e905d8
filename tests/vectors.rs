//! Golden vectors and offline verification: the reference passes its own budgets in
//! every dtype, planted logic bugs fail, precision-only deviations pass the right
//! budget and fail a tighter one, emission is deterministic, and bad input gives
//! clear errors while the other cases still run.

use std::path::{Path, PathBuf};

use ndarray::ArrayD;
use posconform::case::{Arrays, Case};
use posconform::compare::{compare, CompareOptions, Verdict};
use posconform::math::Dtype;
use posconform::reference;
use posconform::report::text;
use posconform::scheme::{rotary::RotarySpec, SchemeSpec};
use posconform::suite::suite;
use posconform::tensor::Tensor;
use posconform::vector::{emit_suite, write_results, VectorFile};
use posconform::verify::verify;

/// A fresh, empty directory for one test.
fn scratch(name: &str) -> PathBuf {
    let dir =
        std::env::temp_dir().join(format!("posconform-vectors-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

fn as_results(outputs: &reference::Outputs, dtype: Dtype) -> Arrays {
    posconform::kernel::outputs_in(outputs.clone(), dtype)
}

fn check(case: &Case, got: &Arrays, options: &CompareOptions) -> posconform::compare::CaseReport {
    let inputs = case.inputs().unwrap();
    let expected = reference::expected(case, &inputs).unwrap();
    compare(case, &inputs, &expected, got, options).unwrap()
}

/// The reference's own outputs pass: the f64 oracle declared as f64, and the
/// same-precision reference computed in each dtype declared as that dtype.
#[test]
fn reference_outputs_pass_in_every_dtype() {
    let options = CompareOptions::default();
    for case in suite("core").unwrap() {
        let inputs = case.inputs().unwrap();
        let oracle = reference::expected(&case, &inputs).unwrap();
        let report = check(&case, &as_results(&oracle, Dtype::F64), &options);
        assert_eq!(
            report.verdict,
            Verdict::Pass,
            "{}: {:?}",
            case.id,
            report.outputs
        );
        for dtype in [Dtype::F32, Dtype::F16, Dtype::Bf16] {
            let same_precision = reference::baseline(&case, &inputs, dtype).unwrap();
            let report = check(&case, &as_results(&same_precision, dtype), &options);
            assert_eq!(
                report.verdict,
                Verdict::Pass,
                "{} in {dtype}: {:#?}",
                case.id,
                report.outputs
            );
        }
    }
}

fn core_case(id: &str) -> Case {
    suite("core")
        .unwrap()
        .into_iter()
        .find(|c| c.id == id)
        .unwrap_or_else(|| panic!("no case {id}"))
}

/// Expected outputs of `case` computed on inputs changed by `mutate` (a planted bug
/// expressed as what the buggy kernel effectively computes).
fn outputs_with(case: &Case, mutate: impl Fn(&mut Arrays)) -> Arrays {
    let mut inputs = case.inputs().unwrap();
    mutate(&mut inputs);
    as_results(&reference::expected(case, &inputs).unwrap(), Dtype::F64)
}

fn replace(inputs: &mut Arrays, name: &str, f: impl Fn(ArrayD<f64>) -> ArrayD<f64>) {
    let t = inputs.remove(name).unwrap();
    let dtype = t.dtype();
    inputs.insert(name.into(), Tensor::from_f64(dtype, f(t.into_values())));
}

/// Planted logic bugs fail verification, with a pattern that points at them.
#[test]
fn planted_logic_bugs_fail() {
    let options = CompareOptions::default();
    // Relative table read one row late (a shift off by one, fault 1).
    let case = core_case("xl_relative.scores.short_memory");
    let got = outputs_with(&case, |inputs| {
        replace(inputs, "r", |r| {
            let mut shifted = r.clone();
            let rows = r.shape()[1];
            for h in 0..r.shape()[0] {
                for d in 0..rows - 1 {
                    for c in 0..r.shape()[2] {
                        shifted[[h, d, c]] = r[[h, d + 1, c]];
                    }
                }
            }
            shifted
        })
    });
    let report = check(&case, &got, &options);
    assert_eq!(report.verdict, Verdict::Fail);
    // Position bias zeroed (fault 12): only term d changes, still caught.
    let got = outputs_with(&case, |inputs| {
        replace(inputs, "position_bias", |v| v * 0.0)
    });
    assert_eq!(check(&case, &got, &options).verdict, Verdict::Fail);
    // Rotary evaluated with the other pairing (fault 17).
    let case = core_case("rotary.encode.adjacent");
    let mut other = case.clone();
    if let posconform::scheme::SchemeSpec::Rotary(RotarySpec { pairing, .. }) = &mut other.scheme {
        *pairing = posconform::rotary::Pairing::HalfSplit;
    }
    let got = as_results(
        &reference::expected(&other, &case.inputs().unwrap()).unwrap(),
        Dtype::F64,
    );
    assert_eq!(check(&case, &got, &options).verdict, Verdict::Fail);
}

/// A stream kernel whose memory is wrong only shows it after the first segment; the
/// report says where the errors begin.
#[test]
fn stream_bug_reported_as_beginning_after_first_segment() {
    let case = core_case("xl_relative.stream.memory_longer_than_segment");
    // A kernel with no memory at all: segment-local attention.
    let mut no_memory = case.clone();
    no_memory.memory_len = 0;
    // Same q, k, v; the relative table only needs the rows a segment alone reaches.
    let mut inputs = case.inputs().unwrap();
    let rows = match &no_memory.scheme {
        SchemeSpec::XlRelative(spec) => spec.relative_rows(&no_memory.shape()),
        _ => unreachable!("an xl_relative case"),
    };
    replace(&mut inputs, "r", |r| {
        r.slice_move(ndarray::s![.., ..rows, ..]).into_dyn()
    });
    let got = as_results(
        &reference::expected(&no_memory, &inputs).unwrap(),
        Dtype::F64,
    );
    let report = check(&case, &got, &CompareOptions::default());
    assert_eq!(report.verdict, Verdict::Fail);
    let patterns = &report.outputs[0].patterns;
    assert!(
        patterns.contains(&posconform::compare::Pattern::BeginsAtRow {
            row: case.query_len
        }),
        "{patterns:?}"
    );
}

/// A precision-only deviation (the reference computed in bf16) passes a bf16 budget,
/// fails an f32 one, and a bf16 budget for a kernel claiming f32 is flagged.
#[test]
fn bf16_deviation_passes_bf16_fails_f32_and_is_flagged() {
    let case = core_case("rotary.attention.f32");
    let inputs = case.inputs().unwrap();
    let bf16 = reference::baseline(&case, &inputs, Dtype::Bf16).unwrap();
    let options = CompareOptions::default();
    assert_eq!(
        check(&case, &as_results(&bf16, Dtype::Bf16), &options).verdict,
        Verdict::Pass
    );
    let claimed_f32 = as_results(&bf16, Dtype::F32);
    assert_eq!(check(&case, &claimed_f32, &options).verdict, Verdict::Fail);
    let loose = CompareOptions {
        budget_dtype: Some(Dtype::Bf16),
        ..options
    };
    let report = check(&case, &claimed_f32, &loose);
    assert_eq!(report.verdict, Verdict::Pass);
    assert!(
        report.warnings.iter().any(|w| w
            .to_string()
            .contains("tolerance derived for bf16; your kernel claimed f32")),
        "{:?}",
        report.warnings
    );
    assert!(report.warnings.iter().any(|w| w
        .to_string()
        .contains("every value is representable in bf16")));
}

/// Budgets follow the dtype the kernel declares for the case, not the dtype of the
/// arrays it returns: f32-accurate answers shipped as f64 arrays for an f32 run pass
/// at the f32 budget, with a note saying so; the same answers judged as an f64 kernel
/// (what happened before) fail.
#[test]
fn arrays_wider_than_declared_are_judged_at_the_declared_dtype() {
    let case = core_case("rotary.attention.f32");
    let inputs = case.inputs().unwrap();
    let f32_answers = reference::baseline(&case, &inputs, Dtype::F32).unwrap();
    let shipped_as_f64 = as_results(&f32_answers, Dtype::F64);
    let declared_f32 = CompareOptions {
        declared: Some(Dtype::F32),
        ..CompareOptions::default()
    };
    let report = check(&case, &shipped_as_f64, &declared_f32);
    assert_eq!(report.verdict, Verdict::Pass, "{report:?}");
    assert!(report.outputs.iter().all(|o| o.dtype == Dtype::F32
        && o.budget_dtype == Dtype::F32
        && o.array_dtype == Dtype::F64));
    assert!(
        report.warnings.iter().any(|w| w.to_string().contains(
            "came back as f64 although the kernel computes this case in f32; judged at the f32 budget"
        )),
        "{:?}",
        report.warnings
    );
    let judged_as_f64 = check(&case, &shipped_as_f64, &CompareOptions::default());
    assert_eq!(judged_as_f64.verdict, Verdict::Fail);
}

/// Masking is judged by visibility, never by an expected value of 0: a visible key
/// whose probability underflows to 0 in the reference may get a subnormal from the
/// kernel (a log-sum-exp softmax does), while the same subnormal on a key the query
/// must not see is a leak.
#[test]
fn underflowed_visible_probabilities_are_not_masked_entries() {
    // ALiBi with 8 heads: head 0 has slope 1/2, so with M = 1600 the oldest memory
    // keys carry a bias near -800 and a probability e^-800, below f64's subnormals.
    let mut case = core_case("alibi.attention.h6");
    (case.heads, case.query_len, case.memory_len, case.head_dim) = (8, 2, 1600, 8);
    let inputs = case.inputs().unwrap();
    let expected = reference::expected(&case, &inputs).unwrap();
    let probs = &expected[&posconform::case::Output::Probs];
    assert_eq!(probs[[0, 0, 0]], 0.0, "the oldest key must underflow");
    assert_eq!(probs[[0, 0, 1601]], 0.0, "key M + 1 is in query 0's future");
    let with = |index: [usize; 3]| {
        let mut got = as_results(&expected, Dtype::F64);
        let mut p = got["probs"].view().to_owned();
        p[index] = 5e-324;
        got.insert("probs".into(), Tensor::from_f64(Dtype::F64, p));
        check(&case, &got, &CompareOptions::default())
    };
    let visible = with([0, 0, 0]);
    assert_eq!(visible.verdict, Verdict::Pass, "{visible:?}");
    let future = with([0, 0, 1601]);
    assert_eq!(future.verdict, Verdict::Fail);
    let probs = future
        .outputs
        .iter()
        .find(|o| o.name == posconform::case::Output::Probs)
        .unwrap();
    assert_eq!(
        probs.masking,
        Some(posconform::compare::Masking::Leak { count: 1 })
    );
}

/// Masked scores may hold a finite sentinel when it carries zero probability; a
/// sentinel that does not (e.g. -10) is a leak.
#[test]
fn finite_sentinels_pass_only_when_they_carry_no_probability() {
    let case = core_case("xl_relative.scores.no_memory");
    let inputs = case.inputs().unwrap();
    let oracle = reference::expected(&case, &inputs).unwrap();
    let with_sentinel = |s: f64| {
        let scores = oracle[&posconform::case::Output::Scores].mapv(|x| {
            if x == f64::NEG_INFINITY {
                s
            } else {
                x
            }
        });
        let mut got = Arrays::new();
        got.insert("scores".into(), Tensor::from_f64(Dtype::F64, scores));
        check(&case, &got, &CompareOptions::default())
    };
    let report = with_sentinel(-1e30);
    assert_eq!(report.verdict, Verdict::Pass);
    assert!(matches!(
        report.outputs[0].masking,
        Some(posconform::compare::Masking::Sentinel { .. })
    ));
    let report = with_sentinel(-10.0);
    assert_eq!(report.verdict, Verdict::Fail);
    assert!(matches!(
        report.outputs[0].masking,
        Some(posconform::compare::Masking::Leak { .. })
    ));
    assert!(report.outputs[0]
        .patterns
        .contains(&posconform::compare::Pattern::MaskedEntriesOnly));
}

/// Emitting the same suite twice gives byte-identical files.
#[test]
fn emission_is_deterministic() {
    let cases: Vec<Case> = suite("core").unwrap().into_iter().take(12).collect();
    let (a, b) = (scratch("det-a"), scratch("det-b"));
    let files_a = emit_suite("core", &cases, &a, 2.0).unwrap();
    emit_suite("core", &cases, &b, 2.0).unwrap();
    for file in files_a {
        let name = file.file_name().unwrap();
        assert_eq!(
            std::fs::read(&file).unwrap(),
            std::fs::read(b.join(name)).unwrap(),
            "{name:?}"
        );
    }
}

/// A vector round-trips through its file unchanged.
#[test]
fn vector_file_round_trips() {
    let dir = scratch("roundtrip");
    for case in suite("core").unwrap().into_iter().step_by(5) {
        let v = VectorFile::build(&case, 2.0).unwrap();
        let files = v.write(&dir).unwrap();
        let back = VectorFile::read(files.last().unwrap()).unwrap();
        assert_eq!(back, v, "{}", case.id);
    }
}

/// Writes vectors for a few cases and correct results for all of them.
fn fixture(name: &str) -> (PathBuf, PathBuf, Vec<Case>) {
    let cases: Vec<Case> = [
        "xl_relative.scores.short_memory",
        "rotary.encode.adjacent",
        "alibi.attention.h6",
        "bucketed.encode.causal",
    ]
    .into_iter()
    .map(core_case)
    .collect();
    let (vectors, results) = (scratch(&format!("{name}-v")), scratch(&format!("{name}-r")));
    emit_suite("core", &cases, &vectors, 2.0).unwrap();
    for case in &cases {
        let inputs = case.inputs().unwrap();
        let outputs = as_results(&reference::expected(case, &inputs).unwrap(), Dtype::F64);
        write_results(&results, &case.id, &outputs).unwrap();
    }
    (vectors, results, cases)
}

fn verdict_of<'a>(report: &'a posconform::report::Report, id: &str) -> &'a Verdict {
    &report.cases.iter().find(|c| c.case == id).unwrap().verdict
}

fn error_of(report: &posconform::report::Report, id: &str) -> String {
    match verdict_of(report, id) {
        Verdict::Error(e) => e.clone(),
        other => panic!("{id}: expected an error verdict, got {other:?}"),
    }
}

#[test]
fn correct_results_directory_conforms() {
    let (vectors, results, cases) = fixture("ok");
    let report = verify(&vectors, &results, &CompareOptions::default()).unwrap();
    assert_eq!(report.cases.len(), cases.len());
    assert_eq!(
        report.exit_code(),
        posconform::report::EXIT_CONFORMING,
        "{}",
        text::render(&report)
    );
}

fn edit_result(results: &Path, id: &str, edit: impl Fn(&mut serde_json::Value)) {
    let path = results.join(format!("{id}.json"));
    let mut doc: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&path).unwrap()).unwrap();
    edit(&mut doc);
    std::fs::write(&path, serde_json::to_string(&doc).unwrap()).unwrap();
}

/// Each kind of bad result is an error naming the file and field, and the other cases
/// still run.
#[test]
fn bad_results_are_named_and_the_rest_still_runs() {
    let (vectors, results, _) = fixture("bad");
    let xl = "xl_relative.scores.short_memory";
    let rot = "rotary.encode.adjacent";
    let alibi = "alibi.attention.h6";
    let buckets = "bucketed.encode.causal";
    // Malformed JSON.
    std::fs::write(
        results.join(format!("{xl}.json")),
        "{\"format\": \"posconform.result\", ",
    )
    .unwrap();
    // Unknown format version.
    edit_result(&results, rot, |d| d["version"] = 99.into());
    // Missing array, and an extra one.
    edit_result(&results, alibi, |d| {
        let outputs = d["outputs"].as_object_mut().unwrap();
        outputs.remove("probs");
        outputs.insert("bonus".into(), outputs["output"].clone());
    });
    // NaN in the values encoding.
    edit_result(&results, buckets, |d| {
        d["outputs"]["buckets"] =
            serde_json::json!({"dtype": "i64", "shape": [3], "values": [1, "nan", 2]});
    });
    let report = verify(&vectors, &results, &CompareOptions::default()).unwrap();
    let e = error_of(&report, xl);
    assert!(
        e.contains(&format!("{xl}.json")) && e.contains("malformed JSON"),
        "{e}"
    );
    let e = error_of(&report, rot);
    assert!(e.contains("field `version`") && e.contains("99"), "{e}");
    let e = error_of(&report, alibi);
    assert!(e.contains("missing output `probs`"), "{e}");
    let e = error_of(&report, buckets);
    assert!(e.contains("shape [3]") || e.contains("buckets"), "{e}");
    assert_eq!(report.exit_code(), posconform::report::EXIT_COULD_NOT_RUN);
    let alibi_case = report.cases.iter().find(|c| c.case == alibi).unwrap();
    assert!(
        alibi_case.warnings.is_empty()
            || alibi_case
                .warnings
                .iter()
                .any(|w| w.to_string().contains("bonus"))
    );
}

#[test]
fn wrong_shapes_dtypes_and_non_finite_values_are_reported() {
    let (vectors, results, _) = fixture("shapes");
    let xl = "xl_relative.scores.short_memory";
    let rot = "rotary.encode.adjacent";
    let alibi = "alibi.attention.h6";
    edit_result(&results, xl, |d| {
        d["outputs"]["scores"]["shape"] = serde_json::json!([2, 9, 12]);
    });
    edit_result(&results, rot, |d| {
        d["outputs"]["rotated"]["dtype"] = "i64".into();
    });
    // An inf where a finite output is expected: a failure with a count, not an error.
    let path = results.join(format!("{alibi}.json"));
    let mut got = posconform::vector::read_results(&results, alibi, &["probs", "output"])
        .unwrap()
        .unwrap();
    let mut out = got["output"].view().to_owned();
    out[[0, 1, 2]] = f64::INFINITY;
    got.insert("output".into(), Tensor::from_f64(Dtype::F64, out));
    std::fs::remove_file(&path).unwrap();
    write_results(&results, alibi, &got).unwrap();
    let report = verify(&vectors, &results, &CompareOptions::default()).unwrap();
    let e = error_of(&report, xl);
    assert!(
        e.contains("field `outputs.scores`") && e.contains("needs"),
        "{e}"
    );
    let e = error_of(&report, rot);
    assert!(
        e.contains("rotated") && (e.contains("i64") || e.contains("bytes")),
        "{e}"
    );
    let alibi_report = report.cases.iter().find(|c| c.case == alibi).unwrap();
    assert_eq!(alibi_report.verdict, Verdict::Fail);
    let output = alibi_report
        .outputs
        .iter()
        .find(|o| o.name == posconform::case::Output::Output)
        .unwrap();
    assert_eq!(output.non_finite, 1);
    assert_eq!(output.worst.as_deref(), Some(&[0, 1, 2][..]));
}

#[test]
fn truncated_npy_and_missing_cases_are_reported() {
    let (vectors, results, _) = fixture("npy");
    let rot = "rotary.encode.adjacent";
    let alibi = "alibi.attention.h6";
    // Results as .npy, one of them truncated.
    let got = posconform::vector::read_results(&results, rot, &["rotated"])
        .unwrap()
        .unwrap();
    std::fs::remove_file(results.join(format!("{rot}.json"))).unwrap();
    let bytes = got["rotated"].to_npy().unwrap();
    std::fs::write(
        results.join(format!("{rot}.rotated.npy")),
        &bytes[..bytes.len() - 10],
    )
    .unwrap();
    // A case with no results at all.
    std::fs::remove_file(results.join(format!("{alibi}.json"))).unwrap();
    // A stray result file.
    std::fs::write(results.join("unknown.case.json"), "{}").unwrap();
    let report = verify(&vectors, &results, &CompareOptions::default()).unwrap();
    let e = error_of(&report, rot);
    assert!(
        e.contains(&format!("{rot}.rotated.npy")) && e.contains("truncated"),
        "{e}"
    );
    let e = error_of(&report, alibi);
    assert!(
        e.contains("no results for this case") && e.contains(&format!("{alibi}.json")),
        "{e}"
    );
    assert_eq!(
        *verdict_of(&report, "xl_relative.scores.short_memory"),
        Verdict::Pass
    );
    assert!(
        report.notes.iter().any(|n| n.contains("unknown.case.json")),
        "{:?}",
        report.notes
    );
    // The complete .npy form is accepted.
    std::fs::write(results.join(format!("{rot}.rotated.npy")), &bytes).unwrap();
    let report = verify(&vectors, &results, &CompareOptions::default()).unwrap();
    assert_eq!(*verdict_of(&report, rot), Verdict::Pass);
}

#[test]
fn malformed_vector_files_are_named() {
    let (vectors, results, _) = fixture("badvec");
    let xl = "xl_relative.scores.short_memory";
    let path = vectors.join(format!("{xl}.json"));
    let mut doc: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&path).unwrap()).unwrap();
    doc["case"]["heads"] = 0.into();
    std::fs::write(&path, serde_json::to_string(&doc).unwrap()).unwrap();
    let path = vectors.join("rotary.encode.adjacent.json");
    let mut doc: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&path).unwrap()).unwrap();
    doc["inputs"].as_object_mut().unwrap().remove("x");
    std::fs::write(&path, serde_json::to_string(&doc).unwrap()).unwrap();
    let report = verify(&vectors, &results, &CompareOptions::default()).unwrap();
    let e = error_of(&report, xl);
    assert!(e.contains("field `case`") && e.contains("`heads`"), "{e}");
    let e = error_of(&report, "rotary.encode.adjacent");
    assert!(
        e.contains("field `inputs.x`") && e.contains("missing"),
        "{e}"
    );
    assert_eq!(*verdict_of(&report, "alibi.attention.h6"), Verdict::Pass);
}

/// The text report of a failing case, checked against a reviewed snapshot
/// (tests/golden/failing_report.txt; regenerate with POSCONFORM_BLESS=1).
#[test]
fn text_report_of_a_failing_case_matches_snapshot() {
    let (vectors, results, _) = fixture("golden");
    let case = core_case("xl_relative.scores.short_memory");
    let got = outputs_with(&case, |inputs| replace(inputs, "content_bias", |u| u * 0.0));
    write_results(&results, &case.id, &got).unwrap();
    let mut report = verify(&vectors, &results, &CompareOptions::default()).unwrap();
    report.subject = "VECTORS against RESULTS".into();
    let rendered = text::render(&report);
    let golden = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/golden/failing_report.txt");
    if std::env::var_os("POSCONFORM_BLESS").is_some() {
        std::fs::create_dir_all(golden.parent().unwrap()).unwrap();
        std::fs::write(&golden, &rendered).unwrap();
    }
    let want = std::fs::read_to_string(&golden)
        .expect("snapshot missing: run with POSCONFORM_BLESS=1 and review it");
    assert_eq!(rendered, want);
}

/// The core suite targets every catalogued fault (each id in some case's `faults`),
/// names only catalogued ids, and covers every scheme with the shape variety the suite
/// promises. (tests/diagnosis checks that each case does catch the faults it names.)
#[test]
fn core_suite_covers_every_fault_class_scheme_and_shape_corner() {
    let cases = suite("core").unwrap();
    let tagged: std::collections::BTreeSet<&str> = cases
        .iter()
        .flat_map(|c| c.faults.iter().map(String::as_str))
        .collect();
    let catalogue: Vec<&str> = posconform::diagnose::catalogue()
        .iter()
        .map(|f| f.id)
        .collect();
    let missing: Vec<&&str> = catalogue.iter().filter(|f| !tagged.contains(**f)).collect();
    assert!(missing.is_empty(), "faults no case targets: {missing:?}");
    let unknown: Vec<&&str> = tagged.iter().filter(|f| !catalogue.contains(f)).collect();
    assert!(
        unknown.is_empty(),
        "tags that name no catalogued fault: {unknown:?}"
    );
    for scheme in posconform::Scheme::ALL {
        assert!(
            cases.iter().any(|c| c.scheme.scheme() == *scheme),
            "{scheme:?}"
        );
    }
    let window_ops: Vec<&Case> = cases
        .iter()
        .filter(|c| {
            matches!(
                c.operation,
                posconform::case::Operation::Scores | posconform::case::Operation::Attention
            )
        })
        .collect();
    assert!(window_ops.iter().any(|c| c.memory_len == 0), "M = 0");
    assert!(
        window_ops
            .iter()
            .any(|c| c.memory_len > 0 && c.memory_len < c.query_len),
        "M < L"
    );
    assert!(
        window_ops.iter().any(|c| c.memory_len > c.query_len),
        "M > L"
    );
    assert!(window_ops.iter().any(|c| c.query_len == 1), "L = 1");
    assert!(
        window_ops
            .iter()
            .any(|c| c.query_len % 2 == 1 && c.query_len > 1),
        "odd L"
    );
    for d in [64, 80, 96] {
        assert!(cases.iter().any(|c| c.head_dim == d), "head width {d}");
    }
    assert!(cases
        .iter()
        .any(|c| c.scheme.scale() != posconform::Scale::InverseSqrtDim
            && c.scheme.scale() != posconform::Scale::Fixed(1.0)));
    assert!(cases
        .iter()
        .any(|c| c.scheme.scheme() == posconform::Scheme::Alibi && !c.heads.is_power_of_two()));
    assert!(
        cases.iter().any(|c| !c.hidden_keys.is_empty()),
        "fully masked rows"
    );
    assert!(
        cases.iter().any(|c| c.query_start >= 1000),
        "positions far from 0"
    );
    for dtype in [Dtype::F32, Dtype::F16, Dtype::Bf16] {
        assert!(cases.iter().any(|c| c.dtype == dtype), "{dtype}");
    }
    // Committed vectors stay small (the project's goal: well under 10 MB in all).
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("vectors/core");
    let bytes: u64 = std::fs::read_dir(&dir)
        .unwrap()
        .filter_map(|e| e.ok()?.metadata().ok())
        .map(|m| m.len())
        .sum();
    assert!(bytes < 5_000_000, "vectors/core is {bytes} bytes");
}
