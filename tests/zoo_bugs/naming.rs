//! Every specimen through the checker and scored (score.rs); the table printed; the
//! rates asserted at what was measured.
//!
//! Measured with `FUZZ_CASES = 200`, `FUZZ_SEED = 0xb06` (score.rs) on 54 specimens:
//! all caught; 53 named (98%), 31 of them as the full explanation (57%); none
//! misleading; the one not named is listed in [`KNOWN_MISSES`] with what the report
//! says and what is true (first
//! measurement, before the diagnosis fixes it prompted: 51 specimens, 3 never caught,
//! 48 named, 9 misleading). The team's aim is a named rate of at least 80%.

use std::collections::BTreeSet;

use serde_json::json;

use crate::kernel::Mistake;
use crate::score::{self, Score};
use crate::specimens::{self, Expected, Specimen};

/// Named rate floor: 53 of 54 measured (see the module docs).
const NAMED_FLOOR: f64 = 0.98;
/// Rate of specimens whose expected fault is stated as the full explanation: 31 of 54
/// measured.
const NAMED_FULLY_FLOOR: f64 = 0.57;

/// Specimens the diagnosis misleads on or does not name, as measured. Each is a
/// finding for the diagnosis (never fixed here by changing `src/`); the test fails when
/// one of them is named without misleading (remove it from this list) or when any other
/// specimen starts to mislead or goes unnamed.
const KNOWN_MISSES: &[(&str, &str)] = &[
    // Not named first. The one diagnosed failing case (xl_relative.attention.padded_rows,
    // run in f16) is reproduced alike by masked-row-nan, mask-sentinel-overflows-in-half
    // and softmax-without-max-subtraction; the run now reports the three-way tie (no
    // fault stated as the explanation, so not misleading), with masked-row-nan listed
    // first. The truth: a -1e9 sentinel that is -inf in f16.
    (
        "xl-f16-only-mask-sentinel",
        "not named first: a three-way tie, reported as one",
    ),
];

fn print_details(scores: &[Score]) {
    for s in scores {
        if s.named_fully() && !s.misleading() {
            continue;
        }
        println!(
            "---- {} (expected {}; {:.2} s, {} over budget, {} errors)",
            s.name,
            s.expected.label(),
            s.seconds,
            s.failing,
            s.errors
        );
        println!("{}", s.diagnosis_text.trim_end());
        for c in &s.misleading_cases {
            println!("  case misleads: {c}");
        }
        for c in &s.cases_naming_another {
            println!("  case names another (values matched on that case): {c}");
        }
        for c in &s.case_findings {
            println!("  case {c}");
        }
    }
}

fn rate(n: usize, of: usize) -> f64 {
    n as f64 / of.max(1) as f64
}

#[test]
fn bug_zoo_naming() {
    let main: Vec<Score> = specimens::all()
        .iter()
        .map(|sp| score::run(sp, sp.expected).0)
        .collect();
    let gaps: Vec<Score> = specimens::gaps()
        .iter()
        .map(|sp| score::run(sp, sp.expected).0)
        .collect();
    println!("{}", score::table(&main));
    println!("Not caught by core and the fuzz budget (coverage gaps):");
    println!("{}", score::table(&gaps));
    print_details(&main);

    let n = main.len();
    let caught = main.iter().filter(|s| s.caught()).count();
    let named = main.iter().filter(|s| s.named()).count();
    let fully = main.iter().filter(|s| s.named_fully()).count();
    let misleading = main.iter().filter(|s| s.misleading()).count();
    let seconds: f64 = main.iter().chain(&gaps).map(|s| s.seconds).sum();
    println!(
        "{n} specimens: caught {caught}, named {named} ({:.0}%), named as the full explanation \
         {fully} ({:.0}%), misleading {misleading}; {} coverage gaps; {seconds:.1} s of checks",
        100.0 * rate(named, n),
        100.0 * rate(fully, n),
        gaps.len()
    );

    let not_caught: Vec<&str> = main
        .iter()
        .filter(|s| !s.caught())
        .map(|s| s.name.as_str())
        .collect();
    assert!(not_caught.is_empty(), "not caught: {not_caught:?}");
    let closed: Vec<&str> = gaps
        .iter()
        .filter(|s| s.caught())
        .map(|s| s.name.as_str())
        .collect();
    assert!(
        closed.is_empty(),
        "coverage gaps now caught (move them into specimens::all()): {closed:?}"
    );

    let missed: BTreeSet<&str> = main
        .iter()
        .filter(|s| s.misleading() || !s.named())
        .map(|s| s.name.as_str())
        .collect();
    let known: BTreeSet<&str> = KNOWN_MISSES.iter().map(|(name, _)| *name).collect();
    let new: Vec<&&str> = missed.difference(&known).collect();
    assert!(
        new.is_empty(),
        "misled or not named, not a known miss: {new:?}"
    );
    let fixed: Vec<&&str> = known.difference(&missed).collect();
    assert!(
        fixed.is_empty(),
        "known misses now named without misleading (remove them from KNOWN_MISSES): {fixed:?}"
    );

    assert!(
        rate(named, n) >= NAMED_FLOOR,
        "named {named} of {n}, below the floor {NAMED_FLOOR}"
    );
    assert!(
        rate(fully, n) >= NAMED_FULLY_FLOOR,
        "named in full {fully} of {n}, below the floor {NAMED_FULLY_FLOOR}"
    );
}

fn find(name: &str) -> Specimen {
    specimens::all()
        .into_iter()
        .find(|s| s.name == name)
        .unwrap_or_else(|| panic!("no specimen {name}"))
}

/// The scoring fails wrong answers: a specimen the report names in full, scored against
/// another fault or against `none`, is not named and is misleading; the kernel without
/// a mistake is not caught and not named.
#[test]
fn scoring_fails_wrong_labels() {
    let reversed = find("alibi-slopes-reversed");
    let (right, _) = score::run(&reversed, reversed.expected);
    assert!(right.named_fully() && !right.misleading(), "{right:?}");

    let (wrong, _) = score::run(&reversed, Expected::Fault("alibi-bias-sign-flipped"));
    assert!(!wrong.named(), "{wrong:?}");
    assert!(wrong.misleading_run(), "{wrong:?}");

    let (as_none, _) = score::run(&reversed, Expected::None);
    assert!(!as_none.named(), "{as_none:?}");
    assert!(as_none.misleading_run(), "{as_none:?}");

    let clean = Specimen {
        name: "alibi-without-mistake",
        mistake: Mistake::None,
        ..reversed
    };
    let (control, _) = score::run(&clean, reversed.expected);
    assert!(!control.caught() && !control.named(), "{control:?}");
}

/// The case-level rule: a case explained only by a precision fault other than the
/// expected one is misleading; one explained by another fault that matched its values
/// is listed, not counted; a case that names the expected fault among others is fine.
#[test]
fn case_level_statements_are_scored() {
    let case = |id: &str, faults: &[&str]| {
        json!({
            "id": id,
            "verdict": {"kind": "fail"},
            "diagnosis": {"finding": {"kind": "explained", "faults": faults}, "candidates": []}
        })
    };
    let report = json!({
        "cases": [
            case("a", &["computes-in-bfloat16"]),
            case("b", &["diagonal-masked"]),
            case("c", &["sine-cosine-swapped", "computes-in-bfloat16"]),
        ],
        "diagnosis": {"conclusive": "sine-cosine-swapped", "diagnosed": 3, "ranked": []}
    });
    let s = score::score(
        "synthetic",
        Expected::Fault("sine-cosine-swapped"),
        &report,
        0.0,
    );
    assert!(s.caught() && s.named_fully() && !s.misleading_run());
    assert_eq!(
        s.misleading_cases,
        vec!["a: computes-in-bfloat16".to_string()]
    );
    assert_eq!(
        s.cases_naming_another,
        vec!["b: diagonal-masked".to_string()]
    );
    assert!(s.misleading());

    let s = score::score(
        "synthetic",
        Expected::Fault("computes-in-bfloat16"),
        &report,
        0.0,
    );
    assert!(s.misleading_cases.is_empty());
    assert!(!s.named() && s.misleading_run());
}
