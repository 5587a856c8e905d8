//! The code shown in the READMEs runs and does what the text says.
//!
//! - vectors/README.md, "Checking results with numpy": on `vectors/core` with the
//!   example numpy kernel's results (examples/python/selftest.py) it accepts every
//!   output, as `posconform verify` does; on corrupted results it rejects exactly the
//!   corrupted outputs (a NaN, a leaking mask, a small error) and accepts a finite mask
//!   sentinel that carries no probability.
//! - examples/python/README.md, "Wrap your own function": the example kernel serves
//!   over the protocol and conforms on what it declares.
//!
//! Needs python3 with numpy. Under CI (`CI` set) a missing numpy is a failure; elsewhere
//! the tests say they skipped.

use posconform::scheme::rotary::RotarySpec;
use std::path::{Path, PathBuf};
use std::process::Command;

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn numpy_available() -> bool {
    let ok = Command::new("python3")
        .args(["-c", "import numpy"])
        .status()
        .is_ok_and(|s| s.success());
    if !ok {
        assert!(
            std::env::var_os("CI").is_none(),
            "CI must install numpy (see .ci/run)"
        );
        eprintln!("skipped: python3 with numpy is not available (pip install numpy)");
    }
    ok
}

/// The first ```python block after the line `heading` of a Markdown file.
fn python_block(file: &str, heading: &str) -> String {
    let text = std::fs::read_to_string(root().join(file)).unwrap();
    let after = text
        .split_once(&format!("\n{heading}\n"))
        .unwrap_or_else(|| panic!("{file} has no heading {heading:?}"))
        .1;
    let start = after.find("```python\n").expect("a python block") + "```python\n".len();
    let end = after[start..].find("\n```").expect("a closed block");
    after[start..start + end].to_string()
}

fn temp_dir(name: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("posconform-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

fn python(script: &str, args: &[&Path]) -> String {
    let output = Command::new("python3")
        .arg("-c")
        .arg(script)
        .args(args)
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&output.stdout).to_string();
    assert!(
        output.status.success(),
        "{stdout}\n{}",
        String::from_utf8_lossy(&output.stderr)
    );
    stdout
}

/// Corrupts some result files (argv: results dir) and prints nothing. Arrays are
/// rewritten in the `values` form, which the snippet's `load` also has to read.
const CORRUPT: &str = r#"
import json, os, sys
import numpy as np
results = sys.argv[1]
def edit(case, name, change):
    path = os.path.join(results, case + ".json")
    doc = json.load(open(path))
    a = load(doc["outputs"][name]).astype(np.float64).copy()
    change(a)
    text = lambda x: "nan" if np.isnan(x) else ("-inf" if x == -np.inf else ("inf" if x == np.inf else float(x)))
    doc["outputs"][name] = {"dtype": doc["outputs"][name]["dtype"], "shape": list(a.shape),
                            "values": [text(x) for x in a.ravel()]}
    json.dump(doc, open(path, "w"))
def nan_visible(a): a[0, 1, 0] = np.nan
def leak(a): a[0, 0, -1] = 0.1
def nudge(a): a[0, 0, 0] += 1e-3
def sentinel_ok(a): a[np.isneginf(a)] = -1e9
def sentinel_leaks(a): a[np.isneginf(a)] = -1.0
edit("xl_relative.scores.short_memory", "scores", nan_visible)
edit("alibi.attention.h6", "probs", leak)
edit("rotary.encode.adjacent", "rotated", nudge)
edit("alibi.scores.h12", "scores", sentinel_ok)
edit("clipped.scores.k4", "scores", sentinel_leaks)
"#;

/// Runs the snippet over a vectors directory (argv: vectors, results) and prints the
/// ids of the cases with any output over budget, one per line.
const DRIVER: &str = r#"
import glob, sys
vectors, results = sys.argv[1], sys.argv[2]
checked = 0
for path in sorted(glob.glob(vectors + "/*.json")):
    if path.endswith("index.json"):
        continue
    checked += 1
    bad = check(path, results)
    if any(bad.values()):
        print(json.load(open(path))["case"]["id"])
print("checked", checked)
"#;

fn failing_cases(snippet: &str, results: &Path) -> Vec<String> {
    let vectors = root().join("vectors/core");
    let out = python(&format!("{snippet}\n{DRIVER}"), &[&vectors, results]);
    let cases = posconform::suite::suite("core").unwrap().len();
    assert!(out.contains(&format!("checked {cases}")), "{out}");
    out.lines()
        .filter(|l| !l.starts_with("checked"))
        .map(String::from)
        .collect()
}

fn verify_failing(results: &Path) -> Vec<String> {
    let json = results.join("report.json");
    let status = Command::new(env!("CARGO_BIN_EXE_posconform"))
        .args(["verify", "--vectors"])
        .arg(root().join("vectors/core"))
        .arg("--results")
        .arg(results)
        .arg("--json")
        .arg(&json)
        .output()
        .unwrap();
    assert!(status.status.code().is_some());
    let report: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    let _ = std::fs::remove_file(&json);
    report["cases"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|c| c["verdict"]["kind"] != "pass")
        .map(|c| c["id"].as_str().unwrap().to_string())
        .collect()
}

#[test]
fn vectors_readme_numpy_check_agrees_with_verify() {
    if !numpy_available() {
        return;
    }
    let snippet = python_block(
        "vectors/README.md",
        "### Checking results with numpy, without posconform",
    );
    let results = temp_dir("snippet-results");
    let selftest = Command::new("python3")
        .arg(root().join("examples/python/selftest.py"))
        .arg(root().join("vectors/core"))
        .arg("--results")
        .arg(&results)
        .arg("--no-pipe")
        .output()
        .unwrap();
    assert!(
        selftest.status.success(),
        "{}",
        String::from_utf8_lossy(&selftest.stderr)
    );

    // A correct kernel: nothing over budget, for the snippet and for verify alike.
    assert_eq!(failing_cases(&snippet, &results), Vec::<String>::new());
    assert_eq!(verify_failing(&results), Vec::<String>::new());

    // Corrupted results: exactly the corrupted outputs fail; a finite sentinel with no
    // probability passes.
    python(&format!("{snippet}\n{CORRUPT}"), &[&results]);
    let mut expected = vec![
        "alibi.attention.h6".to_string(),
        "clipped.scores.k4".to_string(),
        "rotary.encode.adjacent".to_string(),
        "xl_relative.scores.short_memory".to_string(),
    ];
    expected.sort();
    let mut snippet_says = failing_cases(&snippet, &results);
    snippet_says.sort();
    assert_eq!(snippet_says, expected);
    let mut verify_says = verify_failing(&results);
    verify_says.sort();
    assert_eq!(verify_says, expected);
    let _ = std::fs::remove_dir_all(&results);
}

#[test]
fn python_readme_example_kernel_conforms_on_what_it_declares() {
    if !numpy_available() {
        return;
    }
    let snippet = python_block("examples/python/README.md", "## Wrap your own function");
    let dir = temp_dir("python-readme");
    let kernel = dir.join("my_kernel.py");
    // The README's kernel imports posconform_kernel from examples/python.
    let header = format!(
        "import sys\nsys.path.insert(0, {:?})\n",
        root().join("examples/python").display().to_string()
    );
    std::fs::write(&kernel, header + &snippet).unwrap();
    let json = dir.join("report.json");
    let output = Command::new(env!("CARGO_BIN_EXE_posconform"))
        .args(["check", "--quiet", "--fuzz", "60", "--kernel"])
        .arg(format!("python3 {}", kernel.display()))
        .arg("--save-failures")
        .arg(dir.join("failures"))
        .arg("--json")
        .arg(&json)
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&output.stdout);
    assert_eq!(
        output.status.code(),
        Some(0),
        "{stdout}\n{}",
        String::from_utf8_lossy(&output.stderr)
    );
    let report: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    let passed: Vec<&str> = report["cases"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|c| c["random"] == false && c["verdict"]["kind"] == "pass")
        .map(|c| c["id"].as_str().unwrap())
        .collect();
    // Half-split rotary encode without scaling: the README's kernel declares exactly that.
    let expected: Vec<String> = posconform::suite::suite("core")
        .unwrap()
        .into_iter()
        .filter(|c| {
            c.operation.name() == "encode"
                && matches!(
                    &c.scheme,
                    posconform::scheme::SchemeSpec::Rotary(RotarySpec {
                        pairing: posconform::rotary::Pairing::HalfSplit,
                        scaling: posconform::rotary::RotaryScaling::None,
                        ..
                    })
                )
        })
        .map(|c| c.id)
        .collect();
    assert!(!expected.is_empty());
    assert_eq!(passed, expected, "{stdout}");
    assert!(
        stdout.contains("not declared: rotary pairing \"adjacent\""),
        "{stdout}"
    );
    let _ = std::fs::remove_dir_all(&dir);
}
