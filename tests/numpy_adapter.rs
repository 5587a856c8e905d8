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
    let outcome = check(
        &mut kernel,
        &suite("core").unwrap(),
        &options,
        &mut |_, _, _| {},
    )
    .unwrap();
    let text = posconform::report::text::render(&outcome.report);
    assert_eq!(outcome.report.exit_code(), EXIT_CONFORMING, "{text}");
    // The 44 core cases, and every random case (each is in the report).
    let fuzz = outcome.fuzz.unwrap();
    assert_eq!(fuzz.cases, 150);
    assert_eq!(fuzz.passed + fuzz.skipped, 150, "{text}");
    assert_eq!(outcome.report.counts().passed, 44 + fuzz.passed, "{text}");
}
