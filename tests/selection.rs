//! Selecting what a run covers (filters by scheme, operation, dtype and id pattern; one
//! part of N) in `check` and `verify`, and the kernel time `check` records per case.
//!
//! The partition properties have planted-bug companions: a partition that loses the
//! remainder and one that confuses 1-based and 0-based parts, each shown to fail the
//! same property.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Duration;

use posconform::case::{Arrays, Case, OperationKind};
use posconform::check::{check, CheckOptions};
use posconform::compare::{CompareOptions, Verdict};
use posconform::kernel::stdio::StdioKernel;
use posconform::kernel::{Answer, Kernel, KernelInfo, ReferenceKernel};
use posconform::math::Dtype;
use posconform::report::{EXIT_CONFORMING, EXIT_COULD_NOT_RUN};
use posconform::select::{Filter, Part, Selection};
use posconform::suite::suite;
use posconform::Scheme;
use proptest::prelude::*;
use proptest::test_runner::{Config, TestRunner};

fn binary() -> &'static str {
    env!("CARGO_BIN_EXE_posconform")
}

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn scratch(name: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!(
        "posconform-selection-{name}-{}",
        std::process::id()
    ));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

// ---------------------------------------------------------------------------------
// Partition properties

/// Which of the items `0..n` each part takes, for parts `1/count .. count/count`.
type Partition = fn(usize, usize) -> Vec<Vec<usize>>;

/// The library's round-robin parts of a suite-case list.
fn round_robin(n: usize, count: usize) -> Vec<Vec<usize>> {
    (1..=count)
        .map(|i| {
            let selection = Selection {
                filter: Filter::default(),
                part: Part::new(i, count).unwrap(),
            };
            selection.apply((0..n).collect(), |_, _| true).items
        })
        .collect()
}

/// The library's contiguous index ranges of the random cases.
fn index_ranges(n: usize, count: usize) -> Vec<Vec<usize>> {
    (1..=count)
        .map(|i| Part::new(i, count).unwrap().range(n).collect())
        .collect()
}

/// Every item of `0..n` is in exactly one part, and each part keeps the original order.
fn covers_exactly_once(n: usize, parts: &[Vec<usize>]) -> Result<(), String> {
    let mut seen = vec![0usize; n];
    for (i, part) in parts.iter().enumerate() {
        if !part.windows(2).all(|w| w[0] < w[1]) {
            return Err(format!("part {} is out of order: {part:?}", i + 1));
        }
        for &item in part {
            match seen.get_mut(item) {
                Some(count) => *count += 1,
                None => return Err(format!("part {} holds item {item} of {n}", i + 1)),
            }
        }
    }
    match seen.iter().position(|&c| c != 1) {
        Some(item) => Err(format!(
            "item {item} of {n} is in {} of {} parts",
            seen[item],
            parts.len()
        )),
        None => Ok(()),
    }
}

/// The property over random sizes and part counts, as proptest runs it.
fn property_holds(partition: Partition, max_items: usize) -> Result<(), String> {
    let mut runner = TestRunner::new(Config {
        cases: 512,
        failure_persistence: None,
        ..Config::default()
    });
    runner
        .run(&(0..max_items, 1usize..24), |(n, count)| {
            prop_assert_eq!(covers_exactly_once(n, &partition(n, count)), Ok(()));
            Ok(())
        })
        .map_err(|e| e.to_string())
}

/// The N round-robin parts of any list of cases cover every case exactly once, in
/// order.
#[test]
fn parts_cover_every_case_exactly_once() {
    property_holds(round_robin, 400).unwrap();
}

/// The N index ranges of any number of random cases cover every index exactly once.
#[test]
fn random_case_ranges_cover_every_index_exactly_once() {
    property_holds(index_ranges, 5000).unwrap();
}

/// Planted bug: parts of ⌊n/N⌋ consecutive cases lose the last `n mod N` cases; the
/// property fails.
#[test]
fn planted_floor_sized_parts_fail_the_property() {
    fn floor_sized(n: usize, count: usize) -> Vec<Vec<usize>> {
        let size = n / count;
        (0..count)
            .map(|i| (i * size..(i + 1) * size).collect())
            .collect()
    }
    let failure = property_holds(floor_sized, 400).unwrap_err();
    assert!(failure.contains("is in 0 of"), "{failure}");
}

/// Planted bug: part I taking the positions `p mod N == I` (1-based I used as 0-based)
/// loses the positions of residue 0 and gives part N nothing; the property fails.
#[test]
fn planted_off_by_one_parts_fail_the_property() {
    fn off_by_one(n: usize, count: usize) -> Vec<Vec<usize>> {
        (1..=count)
            .map(|i| (0..n).filter(|p| p % count == i).collect())
            .collect()
    }
    let failure = property_holds(off_by_one, 400).unwrap_err();
    assert!(failure.contains("item"), "{failure}");
}

// ---------------------------------------------------------------------------------
// Check: parts and filters over a real run

/// A kernel that records every case it is asked to compute (the reference answers).
struct Recording {
    inner: ReferenceKernel,
    asked: Vec<String>,
}

impl Kernel for Recording {
    fn describe(&mut self) -> posconform::Result<KernelInfo> {
        self.inner.describe()
    }

    fn run(&mut self, case: &Case, dtype: Dtype, inputs: &Arrays) -> posconform::Result<Answer> {
        self.asked.push(format!(
            "{} {}",
            serde_json::to_string(case).unwrap(),
            dtype
        ));
        self.inner.run(case, dtype, inputs)
    }
}

/// Every case `check` sent to the kernel (its full JSON and dtype), and the report's
/// case ids, for a selection.
fn checked(selection: Selection, fuzz: usize) -> (Vec<String>, Vec<String>) {
    let mut kernel = Recording {
        inner: ReferenceKernel::default(),
        asked: Vec::new(),
    };
    let options = CheckOptions {
        fuzz_cases: fuzz,
        seed: 21,
        select: selection,
        ..Default::default()
    };
    let outcome = check(
        &mut kernel,
        &suite("core").unwrap(),
        &options,
        &mut |_, _, _| {},
    )
    .unwrap();
    assert_eq!(outcome.report.exit_code(), EXIT_CONFORMING);
    let ids = outcome
        .report
        .cases
        .iter()
        .map(|c| c.case.clone())
        .collect();
    (kernel.asked, ids)
}

fn sorted(mut items: Vec<String>) -> Vec<String> {
    items.sort();
    items
}

/// Three parts of a check, suite and fuzzing, send the kernel exactly the cases one
/// whole run sends (the same parameters, sizes, seeds and dtypes), none twice.
#[test]
fn parts_of_a_check_send_exactly_the_cases_of_one_run() {
    let (whole, whole_ids) = checked(Selection::everything(), 40);
    let mut together = Vec::new();
    let mut ids = Vec::new();
    for i in 1..=3 {
        let (asked, part_ids) = checked(
            Selection {
                filter: Filter::default(),
                part: Part::new(i, 3).unwrap(),
            },
            40,
        );
        assert!(!asked.is_empty(), "part {i}/3 ran nothing");
        together.extend(asked);
        ids.extend(part_ids);
    }
    assert_eq!(whole.len(), together.len());
    assert_eq!(sorted(whole), sorted(together));
    assert_eq!(sorted(whole_ids), sorted(ids));
}

/// The filters keep exactly the suite cases with that scheme, operation, dtype or id,
/// and random cases of the kept schemes and operations only.
#[test]
fn filters_keep_the_named_cases_and_draw_only_kept_kinds() {
    let core = suite("core").unwrap();
    let filter = Filter {
        schemes: vec![Scheme::Rotary, Scheme::Alibi],
        operations: vec![OperationKind::Attention, OperationKind::Encode],
        ..Default::default()
    };
    let expected: Vec<&str> = core
        .iter()
        .filter(|c| {
            matches!(c.scheme.scheme(), Scheme::Rotary | Scheme::Alibi)
                && matches!(
                    c.operation.kind(),
                    OperationKind::Attention | OperationKind::Encode
                )
        })
        .map(|c| c.id.as_str())
        .collect();
    assert!(expected.len() >= 4, "the core suite changed: {expected:?}");
    let (asked, ids) = checked(
        Selection {
            filter,
            part: Part::whole(),
        },
        30,
    );
    let suite_ids: Vec<&str> = ids
        .iter()
        .map(String::as_str)
        .filter(|id| !id.starts_with("fuzz."))
        .collect();
    assert_eq!(suite_ids, expected);
    assert_eq!(ids.len() - suite_ids.len(), 30, "random cases: {ids:?}");
    for case in &asked {
        // "<case JSON> <dtype>"
        let case: serde_json::Value =
            serde_json::from_str(case.rsplit_once(' ').unwrap().0).unwrap();
        let scheme = case["scheme"]["name"].as_str().unwrap();
        let operation = case["operation"]["kind"].as_str().unwrap();
        assert!(["rotary", "alibi"].contains(&scheme), "{case}");
        assert!(["attention", "encode"].contains(&operation), "{case}");
    }

    let by_dtype = Filter {
        dtypes: vec![Dtype::F32],
        ids: vec!["rotary.*".parse().unwrap()],
        ..Default::default()
    };
    let expected: Vec<&str> = core
        .iter()
        .filter(|c| c.dtype == Dtype::F32 && c.id.starts_with("rotary."))
        .map(|c| c.id.as_str())
        .collect();
    assert!(!expected.is_empty());
    let (_, ids) = checked(
        Selection {
            filter: by_dtype,
            part: Part::whole(),
        },
        0,
    );
    assert_eq!(ids, expected);
}

#[test]
fn a_filter_that_keeps_nothing_is_an_error_that_says_so() {
    let mut kernel = ReferenceKernel::default();
    let options = CheckOptions {
        fuzz_cases: 0,
        select: Selection {
            filter: Filter {
                ids: vec!["no-such-case*".parse().unwrap()],
                ..Default::default()
            },
            part: Part::whole(),
        },
        ..Default::default()
    };
    let error = check(
        &mut kernel,
        &suite("core").unwrap(),
        &options,
        &mut |_, _, _| {},
    )
    .unwrap_err()
    .to_string();
    assert!(error.contains("--id 'no-such-case*'"), "{error}");
    assert!(error.contains("select none of the"), "{error}");
}

// ---------------------------------------------------------------------------------
// Verify on a subset

/// Result files with the reference's own outputs for the core cases of `scheme`.
fn reference_results(dir: &Path, scheme: Scheme) -> usize {
    let mut kernel = ReferenceKernel::default();
    let mut written = 0;
    for case in suite("core").unwrap() {
        if case.scheme.scheme() != scheme {
            continue;
        }
        let inputs = case.inputs().unwrap();
        let Answer::Outputs { outputs, .. } = kernel.run(&case, Dtype::F64, &inputs).unwrap()
        else {
            panic!("the reference declined {}", case.id);
        };
        posconform::vector::write_results(dir, &case.id, &outputs).unwrap();
        written += 1;
    }
    written
}

/// A kernel that implements one scheme verifies just that scheme cleanly; without the
/// filter every other case is an error (no result file).
#[test]
fn verify_on_one_scheme_reports_only_that_scheme() {
    let results = scratch("verify-alibi");
    let written = reference_results(&results, Scheme::Alibi);
    let vectors = root().join("vectors/core");
    let selection = Selection {
        filter: Filter {
            schemes: vec![Scheme::Alibi],
            ..Default::default()
        },
        part: Part::whole(),
    };
    let report = posconform::verify::verify_selected(
        &vectors,
        &results,
        &CompareOptions::default(),
        &selection,
    )
    .unwrap();
    let text = posconform::report::text::render(&report);
    assert_eq!(report.cases.len(), written, "{text}");
    assert_eq!(report.counts().passed, written, "{text}");
    assert_eq!(report.exit_code(), EXIT_CONFORMING, "{text}");
    let total = posconform::vector::vector_files(&vectors).unwrap().len();
    let note = format!(
        "selection: {written} of {total} vector files; the filters (--scheme alibi) keep {written}, leave out {}",
        total - written
    );
    assert!(report.notes.contains(&note), "{:?}", report.notes);
    // No stray-file notes: every result file belongs to a vector.
    assert!(!report.notes.iter().any(|n| n.contains("matches no vector")));

    let whole = posconform::verify::verify(&vectors, &results, &CompareOptions::default()).unwrap();
    assert_eq!(whole.exit_code(), EXIT_COULD_NOT_RUN);
    assert_eq!(whole.counts().errors, total - written);

    // The parts of the same selection verify it exactly once between them.
    let mut seen = Vec::new();
    for i in 1..=2 {
        let part = Selection {
            part: Part::new(i, 2).unwrap(),
            ..selection.clone()
        };
        let report = posconform::verify::verify_selected(
            &vectors,
            &results,
            &CompareOptions::default(),
            &part,
        )
        .unwrap();
        assert_eq!(report.exit_code(), EXIT_CONFORMING);
        seen.extend(report.cases.iter().map(|c| c.case.clone()));
    }
    assert_eq!(seen.len(), written);
    seen.sort();
    seen.dedup();
    assert_eq!(seen.len(), written);
}

fn posconform(args: &[&str]) -> (Option<i32>, String, String) {
    let output = Command::new(binary()).args(args).output().unwrap();
    (
        output.status.code(),
        String::from_utf8_lossy(&output.stdout).into_owned(),
        String::from_utf8_lossy(&output.stderr).into_owned(),
    )
}

#[test]
fn the_command_line_selects_and_refuses_bad_selections() {
    let results = scratch("cli");
    reference_results(&results, Scheme::Alibi);
    let vectors = root().join("vectors/core");
    let (v, r) = (vectors.to_str().unwrap(), results.to_str().unwrap());
    let (code, stdout, stderr) = posconform(&[
        "verify",
        "--vectors",
        v,
        "--results",
        r,
        "--scheme",
        "alibi",
    ]);
    assert_eq!(code, Some(0), "{stdout}\n{stderr}");
    assert!(stdout.contains("selection: "), "{stdout}");

    let (code, _, stderr) = posconform(&[
        "verify",
        "--vectors",
        v,
        "--results",
        r,
        "--scheme",
        "alibi",
        "--id",
        "zzz*",
    ]);
    assert_eq!(code, Some(2));
    assert!(
        stderr.contains("--scheme alibi --id 'zzz*': these filters select none of the"),
        "{stderr}"
    );
    for bad in ["0/0", "3/2", "1/0", "x", "1/2/3"] {
        let (code, _, stderr) =
            posconform(&["verify", "--vectors", v, "--results", r, "--part", bad]);
        assert_eq!(code, Some(2), "{bad}");
        assert!(
            stderr.contains("--part") && stderr.contains("1 <= I <= N"),
            "{bad}: {stderr}"
        );
    }
    let (code, _, stderr) = posconform(&[
        "verify",
        "--vectors",
        v,
        "--results",
        r,
        "--operation",
        "rotate",
    ]);
    assert_eq!(code, Some(2));
    assert!(
        stderr.contains("--operation") && stderr.contains("one of encode"),
        "{stderr}"
    );
}

// ---------------------------------------------------------------------------------
// Time per case

/// Over the protocol, `check` records each answered case's round trip and the kernel's
/// own time, and writes them to JSON and to JUnit `time` attributes (seconds, the
/// kernel's own time; the suite's is the sum).
#[test]
fn check_records_the_kernel_time_of_each_case() {
    let dir = scratch("time");
    let (json, junit) = (dir.join("report.json"), dir.join("report.xml"));
    let kernel = format!("{} __reference-kernel", binary());
    let (code, stdout, stderr) = posconform(&[
        "check",
        "--quiet",
        "--kernel",
        &kernel,
        "--id",
        "alibi.*",
        "--fuzz",
        "0",
        "--json",
        json.to_str().unwrap(),
        "--junit",
        junit.to_str().unwrap(),
        "--save-failures",
        dir.join("failures").to_str().unwrap(),
    ]);
    assert_eq!(code, Some(0), "{stdout}\n{stderr}");
    let report: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    let cases = report["cases"].as_array().unwrap();
    assert!(!cases.is_empty());
    let mut kernel_seconds = BTreeMap::new();
    for case in cases {
        let time = &case["time"];
        let round_trip = time["round_trip_ms"].as_f64().unwrap();
        let own = time["kernel_ms"].as_f64().unwrap();
        // The kernel's own interval lies inside the round trip the harness measured.
        assert!(0.0 <= own && own <= round_trip, "{case}");
        kernel_seconds.insert(case["id"].as_str().unwrap().to_string(), own / 1e3);
    }
    let xml = std::fs::read_to_string(&junit).unwrap();
    let doc = roxmltree::Document::parse(&xml).unwrap();
    let suite = doc
        .descendants()
        .find(|n| n.has_tag_name("testsuite"))
        .unwrap();
    let mut sum = 0.0;
    for case in suite.children().filter(|n| n.has_tag_name("testcase")) {
        let time: f64 = case.attribute("time").unwrap().parse().unwrap();
        let own = kernel_seconds[case.attribute("name").unwrap()];
        // Written to the microsecond.
        assert!((time - own).abs() <= 0.5e-6 + 1e-12, "{time} vs {own}");
        sum += time;
    }
    let total: f64 = suite.attribute("time").unwrap().parse().unwrap();
    assert!(
        (total - sum).abs() <= 0.5e-6 * (kernel_seconds.len() + 1) as f64,
        "{total} vs {sum}"
    );
}

/// `verify` times nothing: no `time` attributes, no `time` in JSON.
#[test]
fn verify_writes_no_made_up_times() {
    let results = scratch("verify-time");
    reference_results(&results, Scheme::Clipped);
    let vectors = root().join("vectors/core");
    let selection = Selection {
        filter: Filter {
            schemes: vec![Scheme::Clipped],
            ..Default::default()
        },
        part: Part::whole(),
    };
    let report = posconform::verify::verify_selected(
        &vectors,
        &results,
        &CompareOptions::default(),
        &selection,
    )
    .unwrap();
    assert!(report
        .cases
        .iter()
        .all(|c| c.time.is_none() && c.verdict == Verdict::Pass));
    let xml = posconform::report::junit::render(&report);
    assert!(!xml.contains("time="), "{xml}");
    let json: serde_json::Value =
        serde_json::from_str(&posconform::report::json::render(&report)).unwrap();
    assert!(json["cases"]
        .as_array()
        .unwrap()
        .iter()
        .all(|c| c.get("time").is_none()));
}

/// In process too: the reference kernel reports no time of its own, so only the round
/// trip is recorded.
#[test]
fn an_in_process_kernel_without_its_own_time_records_the_round_trip() {
    let case = suite("core")
        .unwrap()
        .into_iter()
        .find(|c| c.id.starts_with("rotary."))
        .unwrap();
    let mut kernel = ReferenceKernel::default();
    let info = kernel.describe().unwrap();
    let (report, _) =
        posconform::check::run_case(&mut kernel, &info, &case, &CompareOptions::default());
    let time = report.time.unwrap();
    assert_eq!(time.kernel_ms, None);
    assert!(time.round_trip_ms >= 0.0);
    // Over the protocol the server side reports its own time.
    let mut served = StdioKernel::new(
        vec![binary().to_string(), "__reference-kernel".into()],
        Duration::from_secs(30),
    );
    let info = served.describe().unwrap();
    let (report, _) =
        posconform::check::run_case(&mut served, &info, &case, &CompareOptions::default());
    assert!(report.time.unwrap().kernel_ms.is_some());
}
