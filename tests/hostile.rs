//! Hostile kernels, files and arguments: nothing hangs, nothing aborts, no result is
//! lost, no process is left behind.
//!
//! No test depends on speed. Timeouts are generous wherever a kernel is expected to
//! answer; where a hang is the point, the fixture kernel writes a marker when it reaches
//! the hanging state and the test checks the marker, so a slow start-up can never pass
//! for a hang. A test whose subject is "does not hang" runs under a watchdog of minutes,
//! which turns a hang on broken code into a failure instead of a stuck test run.
#![cfg(unix)]

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::mpsc;
use std::time::{Duration, Instant};

use posconform::case::Case;
use posconform::check::{check, CheckOptions, CheckOutcome};
use posconform::compare::{CompareOptions, Verdict};
use posconform::kernel::stdio::StdioKernel;
use posconform::kernel::Kernel;
use posconform::math::Dtype;
use posconform::report::{self, EXIT_COULD_NOT_RUN};
use posconform::scheme::bucketed::BucketedSpec;
use posconform::suite::suite;
use posconform::tensor::Tensor;
use posconform::KernelErrorKind;

/// Allowance for a Python kernel to start and answer the handshake.
const STARTUP: Duration = Duration::from_secs(120);

fn binary() -> &'static str {
    env!("CARGO_BIN_EXE_posconform")
}

fn fixture() -> String {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures/misbehaving_kernel.py")
        .display()
        .to_string()
}

fn argv(mode: &str, state: Option<&Path>) -> Vec<String> {
    let mut args = vec!["python3".to_string(), fixture(), mode.to_string()];
    if let Some(s) = state {
        args.push(s.display().to_string());
    }
    args
}

fn kernel(mode: &str, state: Option<&Path>, timeout: f64) -> StdioKernel {
    StdioKernel::new(argv(mode, state), Duration::from_secs_f64(timeout))
        .with_startup_timeout(STARTUP)
}

fn options(fuzz: usize) -> CheckOptions {
    CheckOptions {
        fuzz_cases: fuzz,
        seed: 11,
        ..Default::default()
    }
}

fn run(kernel: &mut dyn Kernel, cases: &[Case], options: &CheckOptions) -> CheckOutcome {
    check(kernel, cases, options, &mut |_, _, _| {}).unwrap()
}

fn core(id: &str) -> Case {
    suite("core")
        .unwrap()
        .into_iter()
        .find(|c| c.id == id)
        .unwrap()
}

fn alibi_cases(n: usize) -> Vec<Case> {
    suite("core")
        .unwrap()
        .into_iter()
        .filter(|c| c.scheme.scheme().name() == "alibi")
        .take(n)
        .collect()
}

/// Runs `f` on a thread and fails the test if it has not returned within `limit`: the
/// subject of the test is that it returns at all.
fn within<T: Send + 'static>(
    limit: Duration,
    what: &str,
    f: impl FnOnce() -> T + Send + 'static,
) -> T {
    let (tx, rx) = mpsc::channel();
    std::thread::spawn(move || {
        let _ = tx.send(f());
    });
    match rx.recv_timeout(limit) {
        Ok(v) => v,
        Err(mpsc::RecvTimeoutError::Timeout) => {
            panic!(
                "{what} did not return within {} s: it hangs",
                limit.as_secs()
            )
        }
        Err(mpsc::RecvTimeoutError::Disconnected) => panic!("{what} panicked"),
    }
}

/// Waits (up to minutes) for the fixture to reach a state; the test fails if it never
/// does.
fn wait_for(path: &Path) -> String {
    let deadline = Instant::now() + Duration::from_secs(120);
    while Instant::now() < deadline {
        if let Ok(text) = std::fs::read_to_string(path) {
            return text;
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    panic!("{} never appeared", path.display());
}

/// Whether a process exists and is not a zombie (Linux /proc).
fn alive(pid: u32) -> bool {
    match std::fs::read_to_string(format!("/proc/{pid}/stat")) {
        Err(_) => false,
        Ok(stat) => {
            let state = stat
                .rsplit(')')
                .next()
                .and_then(|rest| rest.split_whitespace().next());
            !matches!(state, Some("Z") | Some("X") | None)
        }
    }
}

/// Waits (up to a minute) for a process to be gone; false if it is still alive then.
fn gone(pid: u32) -> bool {
    let deadline = Instant::now() + Duration::from_secs(60);
    while Instant::now() < deadline {
        if !alive(pid) {
            return true;
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    false
}

fn pid_in(state: &Path, name: &str) -> u32 {
    wait_for(&state.join(name)).trim().parse().unwrap()
}

fn kind_of<T: std::fmt::Debug>(result: &Result<T, posconform::Error>) -> KernelErrorKind {
    result
        .as_ref()
        .unwrap_err()
        .kernel_kind()
        .unwrap_or_else(|| panic!("not a kernel error: {result:?}"))
}

fn error_text(outcome: &CheckOutcome, n: usize) -> String {
    match &outcome.report.cases[n].verdict {
        Verdict::Error(e) => e.clone(),
        other => panic!("case {n}: expected an error, got {other:?}"),
    }
}

// ---------------------------------------------------------------------------------
// Time and processes

/// A kernel that stops reading its stdin cannot block the request write: the request
/// (megabytes, far over a pipe buffer) times out like a missing answer, and says so.
#[test]
fn a_kernel_that_stops_reading_times_out_on_the_request_write() {
    let state = tempfile::tempdir().unwrap();
    let dir = state.path().to_path_buf();
    let mut case = core("alibi.scores.h12");
    case.query_len = 64;
    case.memory_len = 448;
    case.head_dim = 64;
    case.validate().unwrap();
    let inputs = case.inputs().unwrap();
    let (result, pid) = within(
        Duration::from_secs(300),
        "a run on a kernel that stopped reading",
        move || {
            let mut k = kernel("stop-reading", Some(&dir), 3.0);
            k.describe().unwrap();
            wait_for(&dir.join("stopped-reading"));
            let result = k.run(&case, Dtype::F64, &inputs);
            (result, pid_in(&dir, "pid"))
        },
    );
    assert_eq!(kind_of(&result), KernelErrorKind::Timeout);
    let e = result.unwrap_err().to_string();
    assert!(e.contains("did not read the `run` request"), "{e}");
    assert!(gone(pid), "the kernel survived its timeout");
}

/// A crash is noticed when the kernel exits, even while a child it started still holds
/// its stdout open (no waiting for the timeout), and the child is stopped with it.
#[test]
fn a_crash_is_noticed_while_a_child_holds_stdout_and_the_child_goes_too() {
    let state = tempfile::tempdir().unwrap();
    let dir = state.path().to_path_buf();
    let case = core("alibi.encode.h6");
    let inputs = case.inputs().unwrap();
    // The timeout is far longer than the watchdog: only noticing the exit can pass.
    let (result, child) = within(
        Duration::from_secs(240),
        "a run on a crashing kernel",
        move || {
            let mut k = kernel("child-then-crash", Some(&dir), 3600.0);
            k.describe().unwrap();
            let child = pid_in(&dir, "child");
            (k.run(&case, Dtype::F64, &inputs), child)
        },
    );
    assert_eq!(kind_of(&result), KernelErrorKind::Exited);
    let e = result.unwrap_err().to_string();
    assert!(
        e.contains("exited") && e.contains("segfault-like crash"),
        "{e}"
    );
    assert!(gone(child), "the kernel's child outlived the crash");
}

/// A hang ends in a timeout that stops the kernel's whole process group. The fixture
/// marks the moment it starts hanging, so the timeout is known to have fired on the
/// hang and not on a slow start-up.
#[test]
fn a_hang_times_out_and_the_whole_process_group_is_stopped() {
    let state = tempfile::tempdir().unwrap();
    let dir = state.path().to_path_buf();
    let case = core("alibi.encode.h6");
    let inputs = case.inputs().unwrap();
    let result = within(Duration::from_secs(300), "a run on a hanging kernel", {
        let dir = dir.clone();
        move || {
            let mut k = kernel("child-hang", Some(&dir), 2.0);
            k.describe().unwrap();
            k.run(&case, Dtype::F64, &inputs)
        }
    });
    assert_eq!(wait_for(&dir.join("hanging")), "alibi.encode.h6");
    assert_eq!(kind_of(&result), KernelErrorKind::Timeout);
    let e = result.unwrap_err().to_string();
    assert!(
        e.contains("did not answer `run` within 2.0 s (timeout)"),
        "{e}"
    );
    assert!(gone(pid_in(&dir, "pid")), "the hanging kernel survived");
    assert!(
        gone(pid_in(&dir, "child")),
        "the hanging kernel's child survived"
    );
}

/// Processes a kernel starts do not outlive even a clean run.
#[test]
fn no_process_outlives_a_clean_run() {
    let state = tempfile::tempdir().unwrap();
    let mut k = kernel("child-clean", Some(state.path()), 60.0);
    let outcome = run(&mut k, &alibi_cases(3), &options(0));
    assert!(outcome
        .report
        .cases
        .iter()
        .all(|c| matches!(c.verdict, Verdict::Skipped(_))));
    let (pid, child) = (pid_in(state.path(), "pid"), pid_in(state.path(), "child"));
    drop(k);
    assert!(gone(pid), "the kernel survived its shutdown");
    assert!(gone(child), "the kernel's child survived the run");
}

/// SIGTERM to posconform while the kernel hangs: the signal reaches the kernel and its
/// child, the run ends with every case accounted for, the reports are written, exit 2.
#[test]
fn a_signal_to_posconform_stops_the_kernel_and_its_children_and_keeps_the_results() {
    let state = tempfile::tempdir().unwrap();
    let out = tempfile::tempdir().unwrap();
    let json = out.path().join("report.json");
    let command = format!(
        "python3 {} child-hang {}",
        fixture(),
        state.path().display()
    );
    let posconform = Command::new(binary())
        .args([
            "check",
            "--kernel",
            &command,
            "--fuzz",
            "0",
            "--timeout",
            "3600",
            "--quiet",
        ])
        .arg("--json")
        .arg(&json)
        .arg("--save-failures")
        .arg(out.path().join("failures"))
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    wait_for(&state.path().join("hanging"));
    let (pid, child) = (pid_in(state.path(), "pid"), pid_in(state.path(), "child"));
    // SAFETY: kill(2) on the child process we started.
    unsafe {
        libc::kill(posconform.id() as libc::pid_t, libc::SIGTERM);
    }
    let output = within(
        Duration::from_secs(120),
        "posconform after SIGTERM",
        move || posconform.wait_with_output().unwrap(),
    );
    let stdout = String::from_utf8_lossy(&output.stdout);
    assert_eq!(output.status.code(), Some(2), "{stdout}");
    assert!(stdout.contains("received signal 15"), "{stdout}");
    assert!(gone(pid), "the kernel survived SIGTERM to posconform");
    assert!(
        gone(child),
        "the kernel's child survived SIGTERM to posconform"
    );
    let doc: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    let cases = suite("core").unwrap().len();
    assert_eq!(
        doc["counts"]["errors"], cases,
        "every case is accounted for"
    );
    assert_eq!(doc["exit_code"], 2);
}

// ---------------------------------------------------------------------------------
// Honest accounting

/// A clean JSON-RPC error reply is that case's error: no restart, no count towards the
/// stop after consecutive failures.
#[test]
fn clean_error_replies_cost_the_case_only() {
    let mut k = kernel("error", None, 60.0);
    let cases = alibi_cases(5);
    let outcome = run(&mut k, &cases, &options(0));
    for n in 0..cases.len() {
        let e = error_text(&outcome, n);
        assert!(e.contains("workspace allocation failed (simulated)"), "{e}");
        assert!(!e.contains("not run"), "{e}");
    }
    assert_eq!(k.starts(), 1, "restarted after a clean error reply");
    assert!(
        !outcome.report.notes.iter().any(|n| n.contains("restarted")),
        "{:?}",
        outcome.report.notes
    );
}

/// Random cases the kernel could not answer are errors in every report, with their id
/// and message, and make the exit code 2.
#[test]
fn random_cases_that_could_not_be_compared_are_in_every_report() {
    let mut k = kernel("wrong-shape", None, 60.0);
    let outcome = run(&mut k, &[], &options(8));
    let report = &outcome.report;
    assert_eq!(outcome.fuzz.unwrap().errors, 8);
    assert_eq!(report.counts().errors, 8);
    assert_eq!(report.exit_code(), EXIT_COULD_NOT_RUN);
    let text = report::text::render(report);
    let json: serde_json::Value = serde_json::from_str(&report::json::render(report)).unwrap();
    let junit = report::junit::render(report);
    assert_eq!(json["counts"]["errors"], 8);
    assert!(junit.contains("errors=\"8\""), "{junit}");
    for case in &report.cases {
        assert!(case.case.starts_with("fuzz."), "{}", case.case);
        assert!(text.contains(&format!("ERROR {}", case.case)), "{text}");
        assert!(junit.contains(&format!("name=\"{}\"", case.case)));
        assert!(
            matches!(&case.verdict, Verdict::Error(e) if e.contains("needs 32 bytes, found 24"))
        );
    }
}

/// Every failing random case is counted alike in text, JSON and JUnit, not only the
/// shrunk one per scheme and operation; the shrunk ones are listed.
#[test]
fn every_failing_random_case_is_counted_in_every_report() {
    let outcome = run(&mut posconform::demo::TernKernel, &[], &options(40));
    let fuzz = outcome.fuzz.unwrap();
    let report = &outcome.report;
    assert!(fuzz.failed > outcome.minimal.len(), "{fuzz:?}");
    let failed = fuzz.failed + outcome.minimal.len();
    assert_eq!(report.counts().failed, failed);
    assert_eq!(report.counts().passed, fuzz.passed);
    let json: serde_json::Value = serde_json::from_str(&report::json::render(report)).unwrap();
    assert_eq!(json["counts"]["failed"], failed);
    assert!(report::junit::render(report).contains(&format!("failures=\"{failed}\"")));
    let text = report::text::render(report);
    assert!(text.contains(&format!("{} over budget", failed)), "{text}");
    for m in &outcome.minimal {
        assert!(text.contains(&format!("FAIL {}", m.case.id)), "{text}");
    }
}

// ---------------------------------------------------------------------------------
// Memory bounded by the case

/// A reply line longer than its case can need is dropped while it is read, never
/// stored or parsed.
#[test]
fn a_reply_over_the_case_limit_is_dropped_unread() {
    let case = core("alibi.encode.h6");
    let inputs = case.inputs().unwrap();
    let mut k = kernel("big-reply", None, 600.0);
    k.describe().unwrap();
    let result = k.run(&case, Dtype::F64, &inputs);
    assert_eq!(kind_of(&result), KernelErrorKind::Garbage);
    let e = result.unwrap_err().to_string();
    assert!(e.contains("over the limit") && e.contains("268435"), "{e}");
}

/// The same through the command line under a 4 GiB address-space limit: a 256 MiB
/// `values` reply costs the case, not the run.
#[test]
fn a_huge_reply_under_a_memory_limit_costs_the_case_not_the_run() {
    let out = tempfile::tempdir().unwrap();
    let command = format!("python3 {} big-reply", fixture());
    let script = format!(
        "ulimit -v 4194304 && exec {} check --kernel '{command}' --fuzz 0 --quiet --save-failures {}",
        binary(),
        out.path().join("f").display()
    );
    let output = Command::new("sh").arg("-c").arg(&script).output().unwrap();
    let stdout = String::from_utf8_lossy(&output.stdout);
    assert_eq!(
        output.status.code(),
        Some(2),
        "{stdout}\n{}",
        String::from_utf8_lossy(&output.stderr)
    );
    assert!(stdout.contains("over the limit"), "{stdout}");
    assert!(
        stdout.contains("the kernel failed 3 cases in a row"),
        "{stdout}"
    );
}

/// A reply cut off in the middle of its line (the kernel exited while writing it) is
/// said to be cut off, with the bytes that arrived, not called a reply that is not JSON.
#[test]
fn a_reply_cut_short_is_reported_as_cut_short() {
    let case = core("alibi.encode.h6");
    let inputs = case.inputs().unwrap();
    let mut k = kernel("half-reply", None, 60.0);
    k.describe().unwrap();
    let result = k.run(&case, Dtype::F64, &inputs);
    assert_eq!(kind_of(&result), KernelErrorKind::Exited);
    let e = result.unwrap_err().to_string();
    assert!(
        e.contains("bytes of a reply, before it ended") && !e.contains("not a JSON-RPC"),
        "{e}"
    );
}

/// Under the binary framing, blocks announced beyond the case's limit are refused
/// before a byte of them is read.
#[test]
fn announced_blocks_over_the_limit_are_refused_unread() {
    let case = core("alibi.encode.h6");
    let inputs = case.inputs().unwrap();
    let mut k = kernel("blocks-huge", None, 60.0);
    k.describe().unwrap();
    let result = k.run(&case, Dtype::F64, &inputs);
    assert_eq!(kind_of(&result), KernelErrorKind::Garbage);
    let e = result.unwrap_err().to_string();
    assert!(
        e.contains("over the limit") && e.contains("1099511627"),
        "{e}"
    );
}

/// Under the binary framing, a block cut short by the kernel's exit is reported with
/// the bytes that arrived.
#[test]
fn a_block_cut_short_is_reported_as_cut_short() {
    let case = core("alibi.encode.h6");
    let inputs = case.inputs().unwrap();
    let mut k = kernel("blocks-short", None, 60.0);
    k.describe().unwrap();
    let result = k.run(&case, Dtype::F64, &inputs);
    assert_eq!(kind_of(&result), KernelErrorKind::Exited);
    let e = result.unwrap_err().to_string();
    assert!(e.contains("bytes of a reply, before it ended"), "{e}");
}

/// Stderr is drained to the end whatever it holds: invalid UTF-8 and a progress bar
/// redrawn with `\r` do not stop the reader, so the kernel never dies of a closed pipe.
#[test]
fn stderr_of_any_bytes_is_drained_and_the_kernel_keeps_running() {
    let mut k = kernel("stderr-bytes", None, 60.0);
    let outcome = run(&mut k, &alibi_cases(3), &options(0));
    for c in &outcome.report.cases {
        assert!(matches!(c.verdict, Verdict::Skipped(_)), "{:?}", c.verdict);
    }
    assert_eq!(k.starts(), 1);
}

/// A stderr line that never ends is kept to a bounded length with a note of what was
/// dropped.
#[test]
fn an_endless_stderr_line_is_capped_with_a_note() {
    let case = core("alibi.encode.h6");
    let inputs = case.inputs().unwrap();
    let mut k = kernel("stderr-flood", None, 600.0);
    k.describe().unwrap();
    let result = k.run(&case, Dtype::F64, &inputs);
    assert_eq!(kind_of(&result), KernelErrorKind::Exited);
    let e = result.unwrap_err().to_string();
    assert!(e.len() < 64 * 1024, "{} bytes of error", e.len());
    assert!(
        e.contains("more bytes of this line dropped"),
        "{}",
        &e[..e.len().min(500)]
    );
}

/// `[0, 2^63]` holds no element but its other axis cannot be allocated over: refused,
/// never a panic, from a kernel, a result file or a .npy file.
#[test]
fn a_zero_sized_axis_beside_a_huge_one_is_refused_everywhere() {
    let case = core("alibi.encode.h6");
    let inputs = case.inputs().unwrap();
    let mut k = kernel("zero-huge", None, 60.0);
    k.describe().unwrap();
    let result = k.run(&case, Dtype::F64, &inputs);
    assert_eq!(kind_of(&result), KernelErrorKind::MalformedResult);
    assert!(result.unwrap_err().to_string().contains("too large"));

    let value = serde_json::json!({"dtype": "f64", "shape": [0u64, 1u64 << 63], "data": ""});
    let e = Tensor::from_json(&value, &"field x")
        .unwrap_err()
        .to_string();
    assert!(e.contains("field x") && e.contains("too large"), "{e}");
    let mut npy = b"\x93NUMPY\x01\x00".to_vec();
    let header = "{'descr': '<f8', 'fortran_order': False, 'shape': (0, 9223372036854775808), }\n";
    npy.extend_from_slice(&(header.len() as u16).to_le_bytes());
    npy.extend_from_slice(header.as_bytes());
    let e = Tensor::from_npy(&npy, &"x.npy").unwrap_err().to_string();
    assert!(e.contains("too large"), "{e}");

    let (vectors, results) = emitted(&[core("alibi.encode.h6")]);
    let doc = serde_json::json!({"format": "posconform.result", "version": 1,
        "outputs": {"slopes": value}});
    std::fs::write(results.path().join("alibi.encode.h6.json"), doc.to_string()).unwrap();
    let report =
        posconform::verify::verify(vectors.path(), results.path(), &CompareOptions::default())
            .unwrap();
    assert!(matches!(&report.cases[0].verdict, Verdict::Error(e) if e.contains("too large")));
}

/// An xl_relative scores case with `H` heads and `L = M` queries, in f32.
fn big_scores(id: &str, heads: usize, l: usize) -> Case {
    let mut case = core("xl_relative.scores.short_memory");
    case.id = id.into();
    case.heads = heads;
    case.query_len = l;
    case.memory_len = l;
    case.dtype = Dtype::F32;
    case
}

/// A case whose arrays each fit in memory but which together need more memory than
/// the machine has available is refused before anything is allocated, with a message
/// naming the case, the memory it needs and the memory available.
#[test]
fn a_case_beyond_the_machines_memory_is_refused_naming_the_case_and_the_memory() {
    let available = posconform::tensor::available_memory().bytes;
    // Scores of about available/16 elements: each array fits (the element limit is
    // available/8), but the case holds its outputs several times over.
    let l = (((available / 16 / 2) as f64).sqrt() as usize).max(2);
    let case = big_scores("huge.scores", 1, l);
    let e = case.validate().unwrap_err().to_string();
    assert!(
        e.contains("case huge.scores needs about") && e.contains("GiB") && e.contains("available"),
        "{e}"
    );
    assert!(case.memory_needed() > available, "{e}");
    assert!(e.contains("each held as f64 about 4 times at once"), "{e}");
}

/// The same for a case compared one head at a time (docs/budgets.md, "Memory"): its
/// message counts what that path holds, not four whole copies.
#[test]
fn a_case_compared_by_head_beyond_memory_says_what_it_holds() {
    let available = posconform::tensor::available_memory().bytes;
    // Two heads of scores, about available/16 elements in all (half of available as
    // f64): the path holds the answer and six copies of one head, about twice that.
    let l = (((available / 16 / 4) as f64).sqrt() as usize).max(2);
    let case = big_scores("huge.split", 2, l);
    let e = case.validate().unwrap_err().to_string();
    assert!(e.contains("case huge.split needs about"), "{e}");
    assert!(e.contains("compared one head at a time"), "{e}");
    assert!(!e.contains("4 times at once"), "{e}");
}

/// The fixed cap of 2^27 elements per array is gone: H = 8, L = M = 4096 (2^28 scores)
/// is accepted wherever its arrays fit in memory, and otherwise refused for memory,
/// never for a fixed element count.
#[test]
fn a_case_over_the_old_element_cap_is_judged_by_memory() {
    let case = big_scores("big.scores", 8, 4096);
    match case.validate() {
        Ok(()) => assert!(case.memory_needed() <= posconform::tensor::available_memory().bytes),
        Err(e) => assert!(e.to_string().contains("needs about"), "{e}"),
    }
}

/// A vector file whose case implies an array beyond the element limit (bucketed
/// `max_distance` 10^12 sizes `relative_positions`) is refused before anything is
/// allocated.
#[test]
fn a_case_implying_an_absurd_array_is_refused_before_allocation() {
    let (vectors, _) = emitted(&[core("bucketed.encode.causal")]);
    let path = vectors.path().join("bucketed.encode.causal.json");
    let mut doc: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&path).unwrap()).unwrap();
    doc["case"]["scheme"]["max_distance"] = 1_000_000_000_000u64.into();
    std::fs::write(&path, doc.to_string()).unwrap();
    let e = posconform::vector::VectorFile::read(&path)
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("relative_positions") && e.contains("elements"),
        "{e}"
    );
    let mut case = core("bucketed.encode.causal");
    if let posconform::scheme::SchemeSpec::Bucketed(BucketedSpec { max_distance, .. }) =
        &mut case.scheme
    {
        *max_distance = usize::MAX;
    }
    assert!(case.validate().is_err());
    case.memory_len = usize::MAX;
    assert!(case.validate().is_err());
}

// ---------------------------------------------------------------------------------
// Protocol messages

/// A protocol version given as a string is refused saying what was given and what is
/// accepted.
#[test]
fn a_protocol_version_mismatch_says_what_was_given() {
    let mut k = kernel("protocol-string", None, 60.0);
    let result = k.describe();
    assert_eq!(kind_of(&result), KernelErrorKind::Handshake);
    let e = result.unwrap_err().to_string();
    assert!(
        e.contains("the string \"1\"") && e.contains("speaks protocol 1"),
        "{e}"
    );
}

/// Garbage on stdout is reported with the JSON parser's own reason.
#[test]
fn garbage_keeps_the_parser_reason() {
    let mut k = kernel("nan", None, 60.0);
    let outcome = run(&mut k, &alibi_cases(1), &options(0));
    let e = error_text(&outcome, 0);
    assert!(
        e.contains("not a JSON-RPC response")
            && e.contains("expected value at line 1 column 1")
            && e.contains("NaN"),
        "{e}"
    );
}

/// Terminal escapes and control characters from the kernel (name, version, messages,
/// stderr) reach the text report only as visible escapes.
#[test]
fn terminal_escapes_from_the_kernel_are_neutralised_in_the_text_report() {
    let mut k = kernel("escapes", None, 60.0);
    let outcome = run(&mut k, &alibi_cases(2), &options(0));
    let text = report::text::render(&outcome.report);
    for c in ['\x1b', '\x07', '\r'] {
        assert!(!text.contains(c), "{c:?} in {text:?}");
    }
    assert!(text.contains("\\u{1b}[2J"), "{text}");
    assert!(text.contains("bold"), "stderr is shown: {text}");
}

// ---------------------------------------------------------------------------------
// Files

/// Vectors of `cases` emitted into a fresh directory, and a fresh results directory.
fn emitted(cases: &[Case]) -> (tempfile::TempDir, tempfile::TempDir) {
    let vectors = tempfile::tempdir().unwrap();
    posconform::vector::emit_suite("core", cases, vectors.path(), 2.0).unwrap();
    (vectors, tempfile::tempdir().unwrap())
}

fn mkfifo(path: &Path) {
    let status = Command::new("mkfifo").arg(path).status().unwrap();
    assert!(status.success());
}

/// FIFOs and devices are refused by type before they are opened for reading: a FIFO
/// among the results or the vectors, and /dev/zero as a vector file.
#[test]
fn special_files_are_refused_by_type() {
    let (vectors, results) = emitted(&alibi_cases(2));
    let first = alibi_cases(1)[0].id.clone();
    mkfifo(&results.path().join(format!("{first}.json")));
    mkfifo(&vectors.path().join("planted.json"));
    let (v, r) = (vectors.path().to_path_buf(), results.path().to_path_buf());
    let report = within(Duration::from_secs(120), "verify with FIFOs", move || {
        posconform::verify::verify(&v, &r, &CompareOptions::default()).unwrap()
    });
    let error = |id: &str| match &report.cases.iter().find(|c| c.case == id).unwrap().verdict {
        Verdict::Error(e) => e.clone(),
        other => panic!("{other:?}"),
    };
    assert!(error(&first).contains("FIFO"), "{}", error(&first));
    assert!(error("planted").contains("FIFO"), "{}", error("planted"));
    let e = within(Duration::from_secs(120), "reading /dev/zero", || {
        posconform::vector::VectorFile::read(Path::new("/dev/zero"))
            .unwrap_err()
            .to_string()
    });
    assert!(e.contains("character device"), "{e}");
    let output = Command::new(binary())
        .args(["check", "--kernel", "true", "--case", "/dev/zero"])
        .output()
        .unwrap();
    assert_eq!(output.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&output.stderr).contains("character device"));
}

/// `<id>.json` and `<id>.<output>.npy` that disagree are an error naming both files.
#[test]
fn json_and_npy_results_that_disagree_name_both_files() {
    let case = core("alibi.encode.h6");
    let (vectors, results) = emitted(std::slice::from_ref(&case));
    let expected =
        posconform::vector::VectorFile::read(&vectors.path().join("alibi.encode.h6.json")).unwrap();
    let good = expected.expected["slopes"].clone();
    posconform::vector::write_results(results.path(), &case.id, &expected.expected).unwrap();
    let wrong = Tensor::from_f64(Dtype::F64, good.view().mapv(|x| x * 2.0));
    std::fs::write(
        results.path().join("alibi.encode.h6.slopes.npy"),
        wrong.to_npy().unwrap(),
    )
    .unwrap();
    let report =
        posconform::verify::verify(vectors.path(), results.path(), &CompareOptions::default())
            .unwrap();
    match &report.cases[0].verdict {
        Verdict::Error(e) => assert!(
            e.contains("alibi.encode.h6.slopes.npy")
                && e.contains("alibi.encode.h6.json")
                && e.contains("disagrees"),
            "{e}"
        ),
        other => panic!("{other:?}"),
    }
    // The same array in both forms is fine.
    std::fs::write(
        results.path().join("alibi.encode.h6.slopes.npy"),
        good.to_npy().unwrap(),
    )
    .unwrap();
    let report =
        posconform::verify::verify(vectors.path(), results.path(), &CompareOptions::default())
            .unwrap();
    assert_eq!(report.cases[0].verdict, Verdict::Pass);
}

/// emit replaces and removes only files its own index lists: a user's files next to
/// the vectors survive, and a file in the way of a vector is an error, left untouched.
#[test]
fn emit_touches_only_files_it_wrote() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let weights = d.join("model.layer.0.weights.npy");
    let saved = d.join("saved-report.json");
    std::fs::write(&weights, b"user data").unwrap();
    std::fs::write(
        &saved,
        "{\"format\": \"posconform.report\", \"version\": 1}",
    )
    .unwrap();
    let cases = alibi_cases(3);
    posconform::vector::emit_suite("core", &cases, d, 2.0).unwrap();
    // A second emit with fewer cases removes the vector it no longer writes, only it.
    let emitted = posconform::vector::emit_into("core", &cases[..2], d, 2.0).unwrap();
    assert_eq!(
        emitted.removed,
        vec![d.join(format!("{}.json", cases[2].id))]
    );
    assert_eq!(std::fs::read(&weights).unwrap(), b"user data");
    assert!(saved.exists());
    // A file that is not ours where a vector would go.
    let other = tempfile::tempdir().unwrap();
    let clash = other.path().join(format!("{}.json", cases[0].id));
    std::fs::write(&clash, "mine").unwrap();
    let e = posconform::vector::emit_suite("core", &cases, other.path(), 2.0)
        .unwrap_err()
        .to_string();
    assert!(e.contains(&cases[0].id) && e.contains("not listed"), "{e}");
    assert_eq!(std::fs::read_to_string(&clash).unwrap(), "mine");
    // An index that is not ours: nothing in the directory is replaced.
    let foreign = tempfile::tempdir().unwrap();
    std::fs::write(
        foreign.path().join("index.json"),
        "{\"format\": \"something else\"}",
    )
    .unwrap();
    let e = posconform::vector::emit_suite("core", &cases, foreign.path(), 2.0)
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("index.json") && e.contains("not written by"),
        "{e}"
    );
}

/// A write that fails part way (here: a zero file-size limit) leaves no temporary file.
#[test]
fn a_failed_report_write_leaves_no_temporary_file() {
    let (vectors, results) = emitted(&alibi_cases(1));
    let out = tempfile::tempdir().unwrap();
    let script = format!(
        "trap '' XFSZ; ulimit -f 0 && exec {} verify --vectors {} --results {} --json {}",
        binary(),
        vectors.path().display(),
        results.path().display(),
        out.path().join("report.json").display()
    );
    let output = Command::new("sh").arg("-c").arg(&script).output().unwrap();
    assert_eq!(output.status.code(), Some(2));
    let left: Vec<_> = std::fs::read_dir(out.path())
        .unwrap()
        .map(|e| e.unwrap().file_name())
        .collect();
    assert!(left.is_empty(), "left behind: {left:?}");
}

/// Report and log paths are checked before the run: a bad one stops posconform before
/// the kernel starts, so no report is lost to it.
#[test]
fn report_paths_are_checked_before_the_run_starts() {
    let state = tempfile::tempdir().unwrap();
    let not_a_file = tempfile::tempdir().unwrap();
    let command = format!(
        "python3 {} child-clean {}",
        fixture(),
        state.path().display()
    );
    for option in ["--json", "--junit", "--kernel-log", "--trace"] {
        let output = Command::new(binary())
            .args([
                "check", "--kernel", &command, "--fuzz", "0", "--quiet", option,
            ])
            .arg(not_a_file.path())
            .output()
            .unwrap();
        let stderr = String::from_utf8_lossy(&output.stderr);
        assert_eq!(output.status.code(), Some(2), "{option}: {stderr}");
        assert!(stderr.contains(option), "{option}: {stderr}");
        assert!(output.stdout.is_empty(), "{option}: the run started");
        assert!(
            !state.path().join("pid").exists(),
            "{option}: the kernel was started"
        );
    }
}

/// An unwritable kernel log is an error, not silently ignored.
#[test]
fn an_unwritable_kernel_log_is_an_error() {
    let dir = tempfile::tempdir().unwrap();
    let command = format!("{} __reference-kernel", binary());
    let output = Command::new(binary())
        .args([
            "check",
            "--kernel",
            &command,
            "--fuzz",
            "0",
            "--quiet",
            "--kernel-log",
        ])
        .arg(dir.path())
        .output()
        .unwrap();
    assert_eq!(output.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&output.stderr).contains("--kernel-log"));
}

/// Time options are bounded and `--factor` is finite and at least 1 wherever it
/// appears: clear messages and exit 2, never a panic.
#[test]
fn arguments_out_of_range_are_refused_with_exit_2() {
    let dir = tempfile::tempdir().unwrap();
    let runs: Vec<(Vec<&str>, &str)> = vec![
        (
            vec!["check", "--kernel", "true", "--timeout", "1e19"],
            "--timeout",
        ),
        (
            vec!["check", "--kernel", "true", "--timeout", "NaN"],
            "--timeout",
        ),
        (
            vec!["check", "--kernel", "true", "--fuzz-time", "1e19"],
            "--fuzz-time",
        ),
        (
            vec!["check", "--kernel", "true", "--factor", "0.5"],
            "--factor",
        ),
        (vec!["emit", "--factor", "nan", "--out"], "--factor"),
        (vec!["emit", "--factor", "inf", "--out"], "--factor"),
        (vec!["emit", "--factor", "0", "--out"], "--factor"),
        (
            vec![
                "verify",
                "--vectors",
                ".",
                "--results",
                ".",
                "--factor",
                "inf",
            ],
            "--factor",
        ),
    ];
    for (args, option) in runs {
        let mut command = Command::new(binary());
        command.args(&args);
        if args.last() == Some(&"--out") {
            command.arg(dir.path());
        }
        let output = command.output().unwrap();
        let stderr = String::from_utf8_lossy(&output.stderr);
        assert_eq!(output.status.code(), Some(2), "{args:?}: {stderr}");
        assert!(
            stderr.contains(option) && !stderr.contains("panicked"),
            "{args:?}: {stderr}"
        );
    }
    assert_eq!(
        std::fs::read_dir(dir.path()).unwrap().count(),
        0,
        "emit wrote vectors"
    );
}

/// The demo writes into a fresh private directory: a symlink planted at a predictable
/// temporary path is not followed.
#[test]
fn the_demo_uses_a_fresh_private_directory() {
    let tmp = tempfile::tempdir().unwrap();
    let victim = tempfile::tempdir().unwrap();
    std::os::unix::fs::symlink(victim.path(), tmp.path().join("posconform-demo-failures")).unwrap();
    let output = Command::new(binary())
        .args(["demo", "--fuzz", "30"])
        .env("TMPDIR", tmp.path())
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&output.stdout);
    assert_eq!(output.status.code(), Some(0), "{stdout}");
    assert!(stdout.contains("saved: "), "{stdout}");
    assert_eq!(
        std::fs::read_dir(victim.path()).unwrap().count(),
        0,
        "wrote through the symlink"
    );
}
