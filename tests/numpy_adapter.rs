//! The example numpy kernel (examples/python/numpy_kernel.py) conforms when driven over
//! the protocol: the core suite plus random cases.
//!
//! Needs python3 with numpy. Under CI (`CI` set) a missing numpy is a failure, since
//! .ci/run installs it; elsewhere the test says it was skipped and why.

use std::path::PathBuf;
use std::time::Duration;

use posconform::check::{check, CheckOptions};
use posconform::kernel::stdio::StdioKernel;
use posconform::report::EXIT_CONFORMING;
use posconform::suite::suite;

fn numpy_available() -> bool {
    std::process::Command::new("python3")
        .args(["-c", "import numpy"])
        .status()
        .is_ok_and(|s| s.success())
}

#[test]
fn numpy_example_kernel_conforms() {
    if !numpy_available() {
        assert!(
            std::env::var_os("CI").is_none(),
            "CI must install numpy (see .ci/run)"
        );
        eprintln!("skipped: python3 with numpy is not available (pip install numpy)");
        return;
    }
    let script = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("examples/python/numpy_kernel.py");
    let mut kernel = StdioKernel::new(
        vec!["python3".into(), script.display().to_string()],
        Duration::from_secs(60),
    );
    let options = CheckOptions {
        fuzz_cases: 150,
        seed: 2026,
        ..Default::default()
    };
    let cases = suite("core").unwrap();
    let outcome = check(&mut kernel, &cases, &options, &mut |_, _, _| {}).unwrap();
    let text = posconform::report::text::render(&outcome.report);
    assert_eq!(outcome.report.exit_code(), EXIT_CONFORMING, "{text}");
    // Every suite case, none skipped (the example implements every scheme and
    // operation), and every random case (each is in the report).
    let fuzz = outcome.fuzz.unwrap();
    assert_eq!(fuzz.cases, 150);
    assert_eq!(fuzz.passed, 150, "{text}");
    assert_eq!(
        outcome.report.counts().passed,
        cases.len() + fuzz.passed,
        "{text}"
    );
}

/// Over the real stdio path: the numpy kernel declaring only half-split rotary
/// (`--declare rotary.pairing=half_split`, docs/protocol.md "Capabilities") is never sent
/// an adjacent case by the suite or the fuzzer (the protocol trace shows every request),
/// and the report lists adjacent pairing as never exercised.
#[test]
fn numpy_kernel_declaring_half_split_only_is_never_sent_adjacent_cases() {
    if !numpy_available() {
        assert!(
            std::env::var_os("CI").is_none(),
            "CI must install numpy (see .ci/run)"
        );
        eprintln!("skipped: python3 with numpy is not available (pip install numpy)");
        return;
    }
    let script = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("examples/python/numpy_kernel.py");
    let trace = std::env::temp_dir().join(format!(
        "posconform-half-split-{}.trace",
        std::process::id()
    ));
    let mut kernel = StdioKernel::new(
        vec![
            "python3".into(),
            script.display().to_string(),
            "--declare".into(),
            "rotary.pairing=half_split".into(),
        ],
        Duration::from_secs(60),
    )
    .with_trace(&trace)
    .unwrap();
    let options = CheckOptions {
        fuzz_cases: 120,
        seed: 5,
        ..Default::default()
    };
    let cases = suite("core").unwrap();
    let outcome = check(&mut kernel, &cases, &options, &mut |_, _, _| {}).unwrap();
    drop(kernel);
    let text = posconform::report::text::render(&outcome.report);
    let lines = std::fs::read_to_string(&trace).unwrap();
    let runs: Vec<&str> = lines
        .lines()
        .filter(|l| l.starts_with("-> ") && l.contains("\"method\":\"run\""))
        .collect();
    assert!(runs.len() > 100, "{} run requests", runs.len());
    assert!(
        runs.iter()
            .any(|l| l.contains("\"pairing\":\"half_split\"")),
        "no rotary case was sent at all"
    );
    assert!(
        !runs.iter().any(|l| l.contains("\"pairing\":\"adjacent\"")),
        "an adjacent case was sent"
    );
    assert_eq!(outcome.fuzz.unwrap().skipped, 0, "{text}");
    assert!(
        text.contains("not declared: rotary pairing \"adjacent\""),
        "{text}"
    );
    assert_eq!(outcome.report.exit_code(), EXIT_CONFORMING, "{text}");
    let _ = std::fs::remove_file(&trace);
}
