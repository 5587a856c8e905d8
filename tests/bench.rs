//! `posconform bench` and its regression gate, through the command line.
//!
//! No test asserts on time. The gate is tested on what it decides: a kernel made twice
//! as slow (the hidden `__reference-kernel --slowdown 2`: the same answers, each run
//! spun out to twice its computation's time) fails the gate against a baseline of the
//! same kernel at full speed, and a second run of the unchanged kernel passes it, on
//! whatever this machine is doing meanwhile. Bad baselines and arguments are refused, naming the file, field
//! or option, before anything is timed.
//!
//! The timing tests run one at a time (a lock), so they do not disturb each other's
//! measurements.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::Mutex;

use serde_json::Value;

static ONE_AT_A_TIME: Mutex<()> = Mutex::new(());

fn binary() -> &'static str {
    env!("CARGO_BIN_EXE_posconform")
}

fn scratch(name: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("posconform-bench-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

struct Run {
    code: Option<i32>,
    stdout: String,
    stderr: String,
}

impl Run {
    fn json(&self) -> Value {
        serde_json::from_str(&self.stdout)
            .unwrap_or_else(|e| panic!("{e}: stdout {}\nstderr {}", self.stdout, self.stderr))
    }
}

fn posconform(args: &[&str]) -> Run {
    let output = Command::new(binary()).args(args).output().unwrap();
    Run {
        code: output.status.code(),
        stdout: String::from_utf8_lossy(&output.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&output.stderr).into_owned(),
    }
}

/// The reference served over the protocol, every run taking `times` times as long.
fn reference_kernel(times: usize) -> String {
    format!("{} __reference-kernel --slowdown {times}", binary())
}

/// A bench of the served reference on two medium workloads, as JSON on stdout: 30
/// rounds in the default 5 blocks (docs/bench.md: more rounds on a busy machine; with
/// the default 15, three per block, a twofold slowdown once read as +58% with a range
/// from +18% in CI, too noisy to judge). (Computing twice, the earlier planted
/// slowdown, read as only +15% to +70% at L = M = 32: fixed costs per request, and a
/// warm second run.)
fn bench_kernel(times: usize, extra: &[&str]) -> Run {
    bench_kernel_as("json", times, extra)
}

fn bench_kernel_as(format: &str, times: usize, extra: &[&str]) -> Run {
    let kernel = reference_kernel(times);
    let mut args = vec![
        "bench",
        "--quiet",
        "--format",
        format,
        "--kernel",
        &kernel,
        "--shape",
        "medium",
        "--scheme",
        "rotary,alibi",
        "--operation",
        "attention",
        "--dtype",
        "f64",
        "--repeat",
        "30",
    ];
    args.extend_from_slice(extra);
    posconform(&args)
}

fn counts(doc: &Value) -> &Value {
    &doc["gate"]["counts"]
}

fn write(dir: &Path, name: &str, text: &str) -> PathBuf {
    let path = dir.join(name);
    std::fs::write(&path, text).unwrap();
    path
}

/// A kernel twice as slow fails the gate (exit 1): a workload regressed, and none
/// reads as unchanged or faster.
///
/// On a noisy machine the gate may instead say "too noisy to judge" (exit 0): with 30
/// rounds in a fresh CI machine right after the build, a twofold slowdown once read as
/// +83% and +96% with ranges from +5% and +13%. That is the gate being honest, not
/// missing the slowdown, so the slow kernel gets up to three runs against the same
/// baseline; every run must call the slowdown a regression or too noisy (never
/// unchanged, never faster), and one must call it a regression.
#[test]
fn a_planted_twofold_slowdown_fails_the_gate() {
    let _lock = ONE_AT_A_TIME.lock().unwrap_or_else(|e| e.into_inner());
    let dir = scratch("slowdown");
    let base = bench_kernel(1, &[]);
    assert_eq!(base.code, Some(0), "{}\n{}", base.stdout, base.stderr);
    let baseline = write(&dir, "baseline.json", &base.stdout);
    let document = dir.join("slow.json");
    let mut attempts = Vec::new();
    for _ in 0..3 {
        // The text report on stdout and the JSON document of the same run.
        let slow = bench_kernel_as(
            "text",
            2,
            &[
                "--baseline",
                baseline.to_str().unwrap(),
                "--json",
                document.to_str().unwrap(),
            ],
        );
        let doc: Value = serde_json::from_slice(&std::fs::read(&document).unwrap()).unwrap();
        assert_eq!(counts(&doc)["unchanged"], 0, "{}", slow.stdout);
        assert_eq!(counts(&doc)["improved"], 0, "{}", slow.stdout);
        assert_eq!(doc["exit_code"].as_i64(), slow.code.map(i64::from));
        if slow.code == Some(1) {
            assert!(
                counts(&doc)["regressed"].as_u64().unwrap() >= 1,
                "{}",
                slow.stdout
            );
            // The text report names the regression in its table of changes.
            assert!(slow.stdout.contains("REGRESSED"), "{}", slow.stdout);
            assert!(
                slow.stdout.contains("-> regression (exit 1)"),
                "{}",
                slow.stdout
            );
            return;
        }
        assert_eq!(slow.code, Some(0), "{}\n{}", slow.stdout, slow.stderr);
        assert_eq!(
            counts(&doc)["too_noisy"].as_u64().unwrap(),
            doc["workloads"].as_array().unwrap().len() as u64,
            "{}",
            slow.stdout
        );
        attempts.push(slow.stdout);
    }
    panic!(
        "three runs of a twofold slowdown, none called a regression:\n{}",
        attempts.join("\n")
    );
}

/// Two runs of the same kernel pass the gate (exit 0): run-to-run noise on this
/// machine is not a regression.
#[test]
fn the_same_kernel_twice_passes_the_gate() {
    let _lock = ONE_AT_A_TIME.lock().unwrap_or_else(|e| e.into_inner());
    let dir = scratch("same");
    let base = bench_kernel(1, &[]);
    assert_eq!(base.code, Some(0), "{}\n{}", base.stdout, base.stderr);
    let baseline = write(&dir, "baseline.json", &base.stdout);
    let again = bench_kernel(1, &["--baseline", baseline.to_str().unwrap()]);
    let doc = again.json();
    assert_eq!(again.code, Some(0), "{}", again.stdout);
    assert_eq!(counts(&doc)["regressed"], 0, "{}", again.stdout);
    assert_eq!(counts(&doc)["missing"], 0);
    assert_eq!(counts(&doc)["new"], 0);
}

/// The same for the reference's own workloads, in process.
#[test]
fn the_reference_twice_passes_the_gate() {
    let _lock = ONE_AT_A_TIME.lock().unwrap_or_else(|e| e.into_inner());
    let dir = scratch("reference");
    // The small shape, where single floors of the same reference moved by up to +135%
    // between runs and once read as a false +70% regression, before the blocks.
    let args = [
        "bench",
        "--quiet",
        "--format",
        "json",
        "--shape",
        "small,medium",
        "--scheme",
        "xl_relative,alibi",
        "--operation",
        "scores,attention",
        "--repeat",
        "30",
    ];
    let base = posconform(&args);
    assert_eq!(base.code, Some(0), "{}\n{}", base.stdout, base.stderr);
    let doc = base.json();
    assert_eq!(doc["target"], "reference");
    for w in doc["workloads"].as_array().unwrap() {
        assert_eq!(w["measured"], "in_process");
        assert!(w["ratio"].as_f64().unwrap() > 0.0);
    }
    let baseline = write(&dir, "baseline.json", &base.stdout);
    let mut again_args = args.to_vec();
    again_args.extend(["--baseline", baseline.to_str().unwrap()]);
    let again = posconform(&again_args);
    assert_eq!(again.code, Some(0), "{}", again.stdout);
    assert_eq!(counts(&again.json())["regressed"], 0, "{}", again.stdout);
}

/// Over the protocol the kernel's own time is the figure, and the dry run measures the
/// exchange alone: every timed workload has a round trip, the kernel's times and the
/// dry runs', and the kernel's time lies within the round trip.
#[test]
fn the_dry_run_measures_the_protocol_cost() {
    let _lock = ONE_AT_A_TIME.lock().unwrap_or_else(|e| e.into_inner());
    let run = bench_kernel(1, &[]);
    assert_eq!(run.code, Some(0), "{}", run.stderr);
    let doc = run.json();
    assert_eq!(doc["dry_run"], true);
    for w in doc["workloads"].as_array().unwrap() {
        assert_eq!(w["status"], "timed", "{w}");
        assert_eq!(w["measured"], "kernel", "{w}");
        let kernel = w["kernel_ms"]["median"].as_f64().unwrap();
        let round_trip = w["round_trip_ms"]["median"].as_f64().unwrap();
        assert!(kernel <= round_trip, "{w}");
        assert!(w["overhead_ms"]["runs"].as_u64().unwrap() >= 5, "{w}");
        assert!(w["net_ms"].is_number(), "{w}");
    }
}

/// A kernel that answers `dry_run` with "method not found" (the ALiBi kernel written
/// from the docs) is timed all the same, with a note that the protocol's cost was not
/// measured. Needs python3 (a failure under CI, skipped elsewhere).
#[test]
fn a_kernel_without_dry_run_is_timed_with_a_note() {
    if Command::new("python3").arg("--version").output().is_err() {
        assert!(std::env::var_os("CI").is_none(), "CI needs python3");
        eprintln!("skipped: python3 is not available");
        return;
    }
    let _lock = ONE_AT_A_TIME.lock().unwrap_or_else(|e| e.into_inner());
    let kernel = format!(
        "python3 {}",
        Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("examples/from_docs/alibi_kernel.py")
            .display()
    );
    let run = posconform(&[
        "bench",
        "--quiet",
        "--format",
        "json",
        "--kernel",
        &kernel,
        "--shape",
        "small",
        "--operation",
        "encode,scores",
        "--repeat",
        "5",
    ]);
    assert_eq!(run.code, Some(0), "{}\n{}", run.stdout, run.stderr);
    let doc = run.json();
    assert_eq!(doc["dry_run"], false);
    let notes = doc["notes"].to_string();
    assert!(notes.contains("does not answer `dry_run`"), "{notes}");
    let workloads = doc["workloads"].as_array().unwrap();
    // Its two operations, in each dtype it declares.
    assert!(workloads.len() >= 2, "{workloads:?}");
    for w in workloads {
        assert_eq!(w["status"], "timed", "{w}");
        assert!(w["overhead_ms"].is_null(), "{w}");
        assert_eq!(w["scheme"], "alibi", "{w}");
        assert!(
            ["encode", "scores"].contains(&w["operation"].as_str().unwrap()),
            "{w}"
        );
    }
}

/// A valid document to break field by field: a real run's, with its `build` (debug
/// or release, whatever this test binary is).
fn valid_document() -> Value {
    let run = posconform(&[
        "bench",
        "--quiet",
        "--format",
        "json",
        "--shape",
        "small",
        "--scheme",
        "alibi",
        "--operation",
        "encode",
        "--repeat",
        "5",
        "--warmup",
        "0",
    ]);
    assert_eq!(run.code, Some(0), "{}", run.stderr);
    run.json()
}

/// A baseline that cannot be used is an error naming the file and the field, given
/// before anything is timed (exit 2).
#[test]
fn bad_baselines_are_refused_by_file_and_field() {
    let _lock = ONE_AT_A_TIME.lock().unwrap_or_else(|e| e.into_inner());
    let dir = scratch("baselines");
    let valid = valid_document();
    let other_build = if valid["build"] == "debug" {
        "release"
    } else {
        "debug"
    };
    let edited = |edit: &dyn Fn(&mut Value)| {
        let mut doc = valid.clone();
        edit(&mut doc);
        doc.to_string()
    };
    let cases: Vec<(&str, String, &str)> = vec![
        (
            "not-json.json",
            "{\"format\": ".into(),
            "malformed JSON at line 1",
        ),
        (
            "report.json",
            "{\"format\": \"posconform.report\", \"version\": 1}".into(),
            "field `format`: expected \"posconform.bench\"",
        ),
        (
            "version.json",
            edited(&|d| d["version"] = 1.into()),
            "field `version`: this build reads version 2 of the bench document, found 1 (the floor ratios of other versions are measured differently",
        ),
        (
            "calibration.json",
            edited(&|d| d["calibration"]["name"] = "product-f32-64".into()),
            "field `calibration.name`",
        ),
        (
            "build.json",
            edited(&|d| d["build"] = other_build.into()),
            "field `build`",
        ),
        (
            "no-workloads.json",
            edited(&|d| d["workloads"] = Value::Null),
            "field `workloads`: missing or not a list",
        ),
        (
            "ratio.json",
            edited(&|d| d["workloads"][0]["floor_ratio"] = (-1.0).into()),
            "field `workloads[0].floor_ratio`: missing or not a number more than 0",
        ),
        (
            "uncertainty.json",
            edited(&|d| d["workloads"][0]["floor_noise"] = "x".into()),
            "field `workloads[0].floor_noise`",
        ),
        (
            "status.json",
            edited(&|d| d["workloads"][0]["status"] = "done".into()),
            "field `workloads[0].status`",
        ),
        (
            "measured.json",
            edited(&|d| d["workloads"][0]["measured"] = "wall".into()),
            "field `workloads[0].measured`",
        ),
    ];
    for (name, text, expected) in cases {
        let path = write(&dir, name, &text);
        let run = posconform(&[
            "bench",
            "--quiet",
            "--shape",
            "small",
            "--scheme",
            "alibi",
            "--operation",
            "encode",
            "--baseline",
            path.to_str().unwrap(),
        ]);
        assert_eq!(run.code, Some(2), "{name}: {}", run.stdout);
        assert!(
            run.stdout.is_empty(),
            "{name}: timed before refusing: {}",
            run.stdout
        );
        assert!(
            run.stderr.contains(path.to_str().unwrap()),
            "{name}: {}",
            run.stderr
        );
        assert!(run.stderr.contains(expected), "{name}: {}", run.stderr);
    }
    let missing = dir.join("absent.json");
    let run = posconform(&["bench", "--baseline", missing.to_str().unwrap()]);
    assert_eq!(run.code, Some(2));
    assert!(run.stderr.contains("absent.json"), "{}", run.stderr);
    // The valid document itself is accepted.
    let path = write(&dir, "valid.json", &valid.to_string());
    let run = posconform(&[
        "bench",
        "--quiet",
        "--shape",
        "small",
        "--scheme",
        "alibi",
        "--operation",
        "encode",
        "--repeat",
        "5",
        "--baseline",
        path.to_str().unwrap(),
    ]);
    assert_ne!(run.code, Some(2), "{}\n{}", run.stdout, run.stderr);
}

#[test]
fn bad_arguments_are_refused_by_option() {
    let cases: &[(&[&str], &str)] = &[
        (&["--threshold", "0"], "threshold"),
        (&["--threshold", "abc"], "threshold"),
        (&["--threshold-for", "rotary/*"], "--threshold-for rotary/*"),
        (
            &["--threshold-for", "rotary/*=-1"],
            "--threshold-for rotary/*=-1",
        ),
        (&["--shape", "L0_M0_d2_h1"], "--shape"),
        (&["--shape", "huge"], "--shape"),
        (&["--repeat", "2"], "--repeat must be from 5"),
        (
            &["--blocks", "1"],
            "--blocks must be from 2 to --repeat (15), given 1",
        ),
        (
            &["--repeat", "6", "--blocks", "7"],
            "--blocks must be from 2",
        ),
        (&["--timeout", "0"], "--timeout"),
        (&["--scheme", "spiral"], "--scheme"),
        (
            &["--workload", "nothing/*"],
            "--workload 'nothing/*': these filters select none",
        ),
        (
            &["--dtype", "f32"],
            "--dtype f32: these filters select none of the",
        ),
    ];
    for (args, expected) in cases {
        let mut all = vec!["bench", "--quiet", "--shape", "small"];
        all.extend_from_slice(args);
        let run = posconform(&all);
        assert_eq!(run.code, Some(2), "{args:?}: {}", run.stdout);
        assert!(run.stderr.contains(expected), "{args:?}: {}", run.stderr);
    }
}

/// A kernel that cannot start is a clear error, not a hang.
#[test]
fn a_kernel_that_cannot_start_is_an_error() {
    let run = posconform(&["bench", "--quiet", "--kernel", "/nonexistent/kernel --flag"]);
    assert_eq!(run.code, Some(2));
    assert!(run.stderr.contains("/nonexistent/kernel"), "{}", run.stderr);
}

/// Every key of the bench document is documented in docs/bench.md (and the gate's
/// keys too), so the page and the output cannot drift apart unnoticed.
#[test]
fn every_key_of_the_document_is_documented() {
    let _lock = ONE_AT_A_TIME.lock().unwrap_or_else(|e| e.into_inner());
    let dir = scratch("keys");
    let valid = valid_document();
    let baseline = write(&dir, "baseline.json", &valid.to_string());
    let run = posconform(&[
        "bench",
        "--quiet",
        "--format",
        "json",
        "--shape",
        "small",
        "--scheme",
        "alibi",
        "--operation",
        "encode",
        "--repeat",
        "5",
        "--warmup",
        "0",
        "--baseline",
        baseline.to_str().unwrap(),
    ]);
    let doc = run.json();
    assert!(doc["gate"].is_object());
    let page = std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("docs/bench.md"))
        .unwrap();
    fn keys(value: &Value, out: &mut Vec<String>) {
        match value {
            Value::Object(map) => {
                for (k, v) in map {
                    out.push(k.clone());
                    keys(v, out);
                }
            }
            Value::Array(items) => items.iter().for_each(|v| keys(v, out)),
            _ => {}
        }
    }
    let mut all = Vec::new();
    keys(&doc, &mut all);
    all.sort();
    all.dedup();
    let undocumented: Vec<&String> = all
        .iter()
        .filter(|k| !page.contains(&format!("`{k}`")))
        .collect();
    assert!(
        undocumented.is_empty(),
        "keys not in docs/bench.md: {undocumented:?}"
    );
}

/// A kernel that crashes, hangs, fails or declines costs its workloads, never the run:
/// each ends with exit 2 (or, when every workload was declined, "nothing was timed"),
/// within the timeout, and says why.
#[test]
fn misbehaving_kernels_cost_their_workloads_and_never_hang() {
    if Command::new("python3").arg("--version").output().is_err() {
        assert!(std::env::var_os("CI").is_none(), "CI needs python3");
        eprintln!("skipped: python3 is not available");
        return;
    }
    let _lock = ONE_AT_A_TIME.lock().unwrap_or_else(|e| e.into_inner());
    let fixture =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/misbehaving_kernel.py");
    for (mode, expected) in [
        ("crash-always", "exited"),
        ("hang", "timeout"),
        ("error", "workspace allocation failed"),
        ("unsupported", "nothing was timed"),
    ] {
        let kernel = format!("python3 {} {mode}", fixture.display());
        let run = posconform(&[
            "bench",
            "--quiet",
            "--kernel",
            &kernel,
            "--shape",
            "small",
            "--scheme",
            "alibi",
            "--operation",
            "encode,scores",
            "--repeat",
            "5",
            "--timeout",
            "2",
        ]);
        assert_eq!(run.code, Some(2), "{mode}: {}\n{}", run.stdout, run.stderr);
        assert!(run.stdout.contains(expected), "{mode}: {}", run.stdout);
        assert!(
            run.stdout.contains("alibi/scores/L32_M32_d32_h2/f64"),
            "{mode}: {}",
            run.stdout
        );
    }
}
