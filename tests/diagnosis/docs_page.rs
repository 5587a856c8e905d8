//! The self-test of the suite's power, and the docs page it generates.

use std::path::Path;

use posconform::run::plant::{catalogue_page, DEFAULT_FUZZ};

/// Every catalogued fault planted in an otherwise correct kernel is caught by the core
/// suite plus the fixed fuzz budget, at least 90% are named first by the diagnosis,
/// and docs/faults.md is exactly the page this run generates (regenerate it with
/// `posconform plant --format markdown --out docs/faults.md`, or POSCONFORM_BLESS=1).
#[test]
fn every_planted_fault_is_caught_and_named_and_the_page_is_current() {
    let (page, results) = catalogue_page("core", DEFAULT_FUZZ, 0x5eed, &mut |_, _, _| {}).unwrap();
    let missed: Vec<&str> = results
        .iter()
        .filter(|r| r.detected_by.is_none())
        .map(|r| r.fault)
        .collect();
    assert!(missed.is_empty(), "faults no case caught: {missed:?}");
    let misnamed: Vec<(&str, Option<&str>)> = results
        .iter()
        .filter(|r| !r.top1)
        .map(|r| (r.fault, r.named))
        .collect();
    assert!(
        10 * (results.len() - misnamed.len()) >= 9 * results.len(),
        "named first for fewer than 90%: {misnamed:?}"
    );
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("docs/faults.md");
    if std::env::var_os("POSCONFORM_BLESS").is_some() {
        std::fs::write(&path, &page).unwrap();
    }
    let committed = std::fs::read_to_string(&path).unwrap_or_default();
    assert!(
        committed == page,
        "docs/faults.md is stale: run `posconform plant --format markdown --out docs/faults.md`"
    );
}

/// Planted-bug companion: the self-test does report a fault no case can catch (an
/// empty suite and no fuzzing catch nothing), so its "every fault caught" can fail.
#[test]
fn a_fault_with_no_case_to_catch_it_is_reported_uncaught() {
    use posconform::run::plant::{options, plant};
    let fault = posconform::diagnose::fault("mask-not-offset-by-memory").unwrap();
    let result = plant(fault, &[], &options(0, 1)).unwrap();
    assert_eq!(result.detected_by, None);
    assert!(!result.top1);
}
