//! The live-kernel path: one suite run against in-process kernels and against the same
//! kernels behind the stdio protocol, and a misbehaving kernel for every way a process
//! can fail (crash, hang, garbage, wrong sizes, wrong id, unsupported, bad handshake).

use std::path::PathBuf;
use std::time::Duration;

use posconform::case::Case;
use posconform::check::{check, CheckOptions, CheckOutcome};
use posconform::compare::Verdict;
use posconform::demo::TernKernel;
use posconform::kernel::stdio::{split_command, StdioKernel};
use posconform::kernel::{Answer, Kernel, ReferenceKernel};
use posconform::math::Dtype;
use posconform::report::{EXIT_CONFORMING, EXIT_COULD_NOT_RUN, EXIT_NONCONFORMING};
use posconform::suite::suite;
use posconform::vector::VectorFile;

fn binary() -> String {
    env!("CARGO_BIN_EXE_posconform").to_string()
}

fn stdio(args: &[&str], timeout: f64) -> StdioKernel {
    StdioKernel::new(
        args.iter().map(|s| s.to_string()).collect(),
        Duration::from_secs_f64(timeout),
    )
}

fn run(kernel: &mut dyn Kernel, cases: &[Case], options: &CheckOptions) -> CheckOutcome {
    check(kernel, cases, options, &mut |_, _, _| {}).unwrap()
}

fn options(fuzz: usize) -> CheckOptions {
    CheckOptions {
        fuzz_cases: fuzz,
        seed: 11,
        ..Default::default()
    }
}

/// The conforming reference conforms on the whole core suite and under fuzzing.
fn conforms(kernel: &mut dyn Kernel) {
    let outcome = run(kernel, &suite("core").unwrap(), &options(60));
    let report = &outcome.report;
    let text = posconform::report::text::render(report);
    assert_eq!(report.counts().passed, report.cases.len(), "{text}");
    assert_eq!(report.exit_code(), EXIT_CONFORMING, "{text}");
    assert_eq!(outcome.fuzz.unwrap().failed, 0);
}

#[test]
fn reference_conforms_in_process() {
    conforms(&mut ReferenceKernel::default());
}

#[test]
fn reference_conforms_over_stdio() {
    conforms(&mut stdio(&[&binary(), "__reference-kernel"], 30.0));
}

/// The demo kernel's verdicts are the same in process and over the protocol: the
/// transport changes nothing.
#[test]
fn demo_kernel_gives_the_same_verdicts_in_process_and_over_stdio() {
    let cases = suite("core").unwrap();
    let local = run(&mut TernKernel, &cases, &options(0));
    let remote = run(
        &mut stdio(&[&binary(), "__demo-kernel"], 30.0),
        &cases,
        &options(0),
    );
    let verdicts = |o: &CheckOutcome| {
        o.report
            .cases
            .iter()
            .map(|c| (c.case.clone(), c.verdict.clone()))
            .collect::<Vec<_>>()
    };
    assert_eq!(verdicts(&local), verdicts(&remote));
    assert_eq!(local.report.exit_code(), EXIT_NONCONFORMING);
}

/// Fuzzing finds the demo bug, shrinks it to one query and one memory key, saves it as
/// a vector that replays the failure, and does the same again for the same seed.
#[test]
fn fuzzing_shrinks_the_demo_bug_deterministically_and_saves_a_replayable_case() {
    let dir =
        std::env::temp_dir().join(format!("posconform-protocol-shrink-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    let opts = CheckOptions {
        save_dir: Some(dir.clone()),
        ..options(80)
    };
    let first = run(&mut TernKernel, &[], &opts);
    let again = run(
        &mut TernKernel,
        &[],
        &CheckOptions {
            save_dir: None,
            ..options(80)
        },
    );
    assert!(!first.minimal.is_empty(), "the bug was not found");
    let cases: Vec<&Case> = first.minimal.iter().map(|m| &m.case).collect();
    let repeated: Vec<&Case> = again.minimal.iter().map(|m| &m.case).collect();
    assert_eq!(
        cases, repeated,
        "shrinking is not deterministic for a fixed seed"
    );
    for m in &first.minimal {
        assert_eq!(
            (m.case.query_len, m.case.memory_len, m.case.heads),
            (1, 1, 1),
            "not minimal: {:?}",
            m.case
        );
        let saved = m.saved.as_ref().expect("saved");
        let replay = VectorFile::read(saved).unwrap().case;
        assert_eq!(replay, m.case);
        let outcome = run(&mut TernKernel, &[replay], &options(0));
        assert_eq!(outcome.report.cases[0].verdict, Verdict::Fail);
    }
}

fn fixture() -> String {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures/misbehaving_kernel.py")
        .display()
        .to_string()
}

fn misbehaving(mode: &str, extra: &[&str], timeout: f64) -> StdioKernel {
    let mut args = vec!["python3".to_string(), fixture(), mode.to_string()];
    args.extend(extra.iter().map(|s| s.to_string()));
    StdioKernel::new(args, Duration::from_secs_f64(timeout))
}

fn three_cases() -> Vec<Case> {
    suite("core")
        .unwrap()
        .into_iter()
        .filter(|c| c.scheme.scheme().name() == "alibi")
        .take(3)
        .collect()
}

fn error_text(outcome: &CheckOutcome, n: usize) -> String {
    match &outcome.report.cases[n].verdict {
        Verdict::Error(e) => e.clone(),
        other => panic!("case {n}: expected an error, got {other:?}"),
    }
}

#[test]
fn a_crash_is_an_error_with_stderr_and_the_run_goes_on_after_a_restart() {
    let state = std::env::temp_dir().join(format!("posconform-crash-once-{}", std::process::id()));
    let _ = std::fs::remove_file(&state);
    let mut kernel = misbehaving("crash-once", &[&state.display().to_string()], 10.0);
    let outcome = run(&mut kernel, &three_cases(), &options(0));
    let e = error_text(&outcome, 0);
    assert!(
        e.contains("exited") && e.contains("about to crash on alibi"),
        "{e}"
    );
    assert!(matches!(
        outcome.report.cases[1].verdict,
        Verdict::Skipped(_)
    ));
    assert!(matches!(
        outcome.report.cases[2].verdict,
        Verdict::Skipped(_)
    ));
    assert!(
        outcome.report.notes.iter().any(|n| n.contains("restarted")),
        "{:?}",
        outcome.report.notes
    );
    assert_eq!(kernel.starts(), 2);
    assert_eq!(outcome.report.exit_code(), EXIT_COULD_NOT_RUN);
}

#[test]
fn repeated_crashes_stop_the_run_and_keep_every_result() {
    let mut cases = three_cases();
    cases.extend(suite("core").unwrap().into_iter().take(3));
    let outcome = run(
        &mut misbehaving("crash-always", &[], 10.0),
        &cases,
        &options(0),
    );
    assert_eq!(outcome.report.cases.len(), cases.len(), "results were lost");
    for n in 0..3 {
        assert!(error_text(&outcome, n).contains("segfault-like crash"));
    }
    for n in 3..cases.len() {
        assert!(error_text(&outcome, n).contains("not run: the kernel failed 3 cases in a row"));
    }
}

/// The run timeout covers only the request: Python's start-up is under a generous
/// start-up timeout, and the fixture marks the moment it starts hanging, so the timeout
/// is known to have fired on the hang.
#[test]
fn a_hang_times_out_and_the_kernel_is_replaced() {
    let state = tempfile::tempdir().unwrap();
    let mut kernel = misbehaving("hang", &[&state.path().display().to_string()], 1.0)
        .with_startup_timeout(Duration::from_secs(120));
    let outcome = run(&mut kernel, &three_cases(), &options(0));
    assert!(
        state.path().join("hanging").exists(),
        "the kernel never hung"
    );
    let e = error_text(&outcome, 0);
    assert!(e.contains("within 1.0 s (timeout)"), "{e}");
    // The replacement hangs too (every process hangs on its first run).
    assert!(error_text(&outcome, 1).contains("timeout"));
    assert!(kernel.starts() >= 2);
}

#[test]
fn garbage_on_stdout_is_an_error_quoting_it() {
    let outcome = run(
        &mut misbehaving("garbage", &[], 10.0),
        &three_cases(),
        &options(0),
    );
    let e = error_text(&outcome, 0);
    assert!(
        e.contains("not a JSON-RPC response") && e.contains("DEBUG: entering kernel"),
        "{e}"
    );
}

#[test]
fn wrong_array_sizes_are_an_error_naming_the_field() {
    let outcome = run(
        &mut misbehaving("wrong-shape", &[], 10.0),
        &three_cases(),
        &options(0),
    );
    let e = error_text(&outcome, 0);
    assert!(
        e.contains("malformed reply")
            && e.contains("outputs.")
            && e.contains("needs 32 bytes, found 24"),
        "{e}"
    );
}

#[test]
fn a_reply_with_the_wrong_id_is_an_error() {
    let outcome = run(
        &mut misbehaving("wrong-id", &[], 10.0),
        &three_cases(),
        &options(0),
    );
    assert!(error_text(&outcome, 0).contains("with id"));
}

#[test]
fn unsupported_answers_are_skips_and_nothing_passing_means_could_not_run() {
    let outcome = run(
        &mut misbehaving("unsupported", &[], 10.0),
        &three_cases(),
        &options(5),
    );
    assert!(outcome
        .report
        .cases
        .iter()
        .all(|c| matches!(c.verdict, Verdict::Skipped(_))));
    assert_eq!(outcome.fuzz.unwrap().skipped, 5);
    assert_eq!(outcome.report.exit_code(), EXIT_COULD_NOT_RUN);
}

#[test]
fn a_wrong_protocol_version_is_refused_clearly() {
    let err = check(
        &mut misbehaving("bad-protocol", &[], 10.0),
        &three_cases(),
        &options(0),
        &mut |_, _, _| {},
    )
    .unwrap_err()
    .to_string();
    assert!(err.contains("speaks protocol 99"), "{err}");
}

#[test]
fn a_missing_program_is_a_clear_error() {
    let err = check(
        &mut stdio(&["/nonexistent/kernel"], 5.0),
        &three_cases(),
        &options(0),
        &mut |_, _, _| {},
    )
    .unwrap_err()
    .to_string();
    assert!(err.contains("cannot start `/nonexistent/kernel`"), "{err}");
}

#[test]
fn command_lines_split_without_a_shell() {
    assert_eq!(
        split_command("python3 k.py --flag 'a b' \"c d\"").unwrap(),
        ["python3", "k.py", "--flag", "a b", "c d"]
    );
    assert!(split_command("python3 'unclosed").is_err());
    assert!(split_command("   ").is_err());
}

/// The minimal Rust adapter (examples/rust_kernel.rs, built by `cargo test` next to the
/// test binaries) conforms on the rotary encode cases it implements and declares, and is
/// sent nothing else.
#[test]
fn rust_example_adapter_conforms_on_what_it_implements() {
    let exe = PathBuf::from(binary());
    let example = exe
        .parent()
        .unwrap()
        .join("examples")
        .join(format!("rust_kernel{}", std::env::consts::EXE_SUFFIX));
    if !example.exists() {
        // A full `cargo test` builds examples; `cargo test --test protocol` alone does not.
        assert!(
            std::env::var_os("CI").is_none(),
            "{} is missing under CI",
            example.display()
        );
        eprintln!(
            "skipped: {} is not built (run the full `cargo test`)",
            example.display()
        );
        return;
    }
    let mut kernel = stdio(&[&example.display().to_string()], 10.0);
    let outcome = run(&mut kernel, &suite("core").unwrap(), &options(40));
    let report = &outcome.report;
    let counts = report.counts();
    let text = posconform::report::text::render(report);
    assert_eq!(counts.failed + counts.errors, 0, "{text}");
    // Four core rotary encode cases are unscaled; the two that use scaling are not
    // declared (the example declares `scaling: ["none"]`), so they are never sent;
    // every random case is in the report too.
    assert_eq!(counts.passed, 4 + outcome.fuzz.unwrap().passed, "{text}");
    assert!(
        text.contains("not declared: rotary scaling \"linear_interpolation\""),
        "{text}"
    );
    assert_eq!(report.exit_code(), EXIT_CONFORMING);
}

/// A `run` request whose arrays disagree with its case is answered with an error,
/// never a panic, by the reference served over the protocol.
#[test]
fn served_reference_rejects_inputs_that_disagree_with_the_case() {
    use posconform::kernel::protocol::{run_params, serve};
    let case = suite("core")
        .unwrap()
        .into_iter()
        .find(|c| c.id == "xl_relative.attention.padded_rows")
        .unwrap();
    let mut inputs = case.inputs().unwrap();
    let k = inputs["k"]
        .view()
        .slice_move(ndarray::s![.., ..2, ..])
        .to_owned()
        .into_dyn();
    inputs.insert(
        "k".into(),
        posconform::tensor::Tensor::from_f64(posconform::math::Dtype::F32, k),
    );
    let request =
        posconform::kernel::protocol::request(1, "run", run_params(&case, case.dtype, &inputs));
    let mut out = Vec::new();
    serve(
        &mut ReferenceKernel::default(),
        std::io::Cursor::new(request + "\n"),
        &mut out,
    )
    .unwrap();
    let reply: serde_json::Value = serde_json::from_slice(&out).unwrap();
    let message = reply["error"]["message"].as_str().unwrap();
    assert_eq!(reply["error"]["code"], -32000);
    assert!(
        message.contains("input `k`") && message.contains("shape [2, 2, 64]"),
        "{message}"
    );
}

/// The harness offers the binary framing; a kernel that declares it (Rust's `serve`,
/// here the served reference) then gets its inputs and sends its outputs as raw blocks,
/// and the answer is the reference's own, bit for bit.
#[test]
fn the_binary_framing_carries_arrays_both_ways_when_declared() {
    let dir = tempfile::tempdir().unwrap();
    let trace = dir.path().join("trace.txt");
    let mut k = stdio(&[&binary(), "__reference-kernel"], 60.0)
        .with_trace(&trace)
        .unwrap();
    k.describe().unwrap();
    let case = suite("core")
        .unwrap()
        .into_iter()
        .find(|c| c.id == "xl_relative.scores.short_memory")
        .unwrap();
    let inputs = case.inputs().unwrap();
    let Answer::Outputs { outputs, .. } = k.run(&case, Dtype::F64, &inputs).unwrap() else {
        panic!("the reference declined")
    };
    let expected = posconform::reference::expected(&case, &inputs).unwrap();
    for (output, want) in &expected {
        assert_eq!(outputs[output.name()].view(), want.view(), "{output}");
    }
    drop(k);
    let text = std::fs::read_to_string(&trace).unwrap();
    assert!(text.contains(r#""framing":["binary"]"#), "{text}");
    assert!(text.contains(r#""framing":"binary""#), "{text}");
    assert!(
        text.contains(r#""block":0"#) && text.contains(r#""blocks":["#),
        "{text}"
    );
    assert!(text.contains("-> [") && text.contains("<- ["), "{text}");
    assert!(!text.contains(r#""data":"#), "{text}");
}

/// A kernel that does not declare the binary framing gets base64 text, as before.
#[test]
fn a_kernel_without_the_binary_framing_keeps_base64() {
    let dir = tempfile::tempdir().unwrap();
    let trace = dir.path().join("trace.txt");
    let mut k = misbehaving("unsupported", &[], 60.0)
        .with_trace(&trace)
        .unwrap();
    k.describe().unwrap();
    let case = suite("core")
        .unwrap()
        .into_iter()
        .find(|c| c.id == "xl_relative.scores.short_memory")
        .unwrap();
    let inputs = case.inputs().unwrap();
    let answer = k.run(&case, Dtype::F64, &inputs).unwrap();
    assert!(matches!(answer, Answer::Unsupported(_)));
    drop(k);
    let text = std::fs::read_to_string(&trace).unwrap();
    assert!(text.contains(r#""data":""#), "{text}");
    assert!(!text.contains(r#""blocks""#), "{text}");
}
