//! `posconform._native`: the native half of the posconform Python package.
//!
//! It runs the library's own `check` (suite, fuzzing, shrinking, budgets, reports) on
//! a Python kernel in the same process ([`kernel::PythonKernel`]), and hands back the
//! outcome with the library's renderers. The Python half (python/posconform/) builds
//! the kernel object, the friendly report, the torch adapter and the pytest plugin;
//! docs/python.md describes both.

use std::panic::AssertUnwindSafe;
use std::path::PathBuf;
use std::str::FromStr as _;
use std::time::Duration;

use posconform::case::Case;
use posconform::check::{CheckOptions, CheckOutcome};
use posconform::compare::CompareOptions;
use posconform::math::Dtype;
use posconform::report::{self, Report};
use posconform::vector::VectorFile;
use posconform::KernelErrorKind;
use pyo3::exceptions::{PyKeyError, PyRuntimeError, PyValueError};
use pyo3::prelude::*;
use pyo3::types::PyList;

mod arrays;
mod kernel;
mod values;

/// The longest `fuzz_time` accepted, as on the command line: one week.
const MAX_SECONDS: f64 = 604_800.0;

fn value_error(e: impl std::fmt::Display) -> PyErr {
    PyValueError::new_err(e.to_string())
}

/// `value` (anything serde can serialise) as plain Python data.
fn plain<'py>(py: Python<'py>, value: &impl serde::Serialize) -> PyResult<Bound<'py, PyAny>> {
    let value = serde_json::to_value(value).map_err(value_error)?;
    values::to_python(py, &value)
}

/// The cases to run: the vector files' cases, or the suite's (only the listed ids, in
/// suite order, when `only` is given).
fn select_cases(
    suite: Option<&str>,
    only: Option<&[String]>,
    case_files: &[PathBuf],
) -> PyResult<Vec<Case>> {
    if !case_files.is_empty() {
        return case_files
            .iter()
            .map(|p| {
                VectorFile::read(p)
                    .map(|v| v.case)
                    .map_err(|e| value_error(format!("cases: {e}")))
            })
            .collect();
    }
    let Some(name) = suite else {
        return Ok(Vec::new());
    };
    let cases = posconform::suite::suite(name).map_err(value_error)?;
    let Some(only) = only else {
        return Ok(cases);
    };
    let unknown: Vec<&str> = only
        .iter()
        .filter(|id| !cases.iter().any(|c| &&c.id == id))
        .map(String::as_str)
        .collect();
    if !unknown.is_empty() {
        return Err(value_error(format!(
            "suite {name} has no case {} (posconform.suite_cases({name:?}) lists them)",
            unknown.join(", ")
        )));
    }
    Ok(cases.into_iter().filter(|c| only.contains(&c.id)).collect())
}

/// Runs `check` on the Python kernel `kernel` (see `posconform.check` for the options).
#[pyfunction]
#[pyo3(signature = (
    kernel, *, suite=None, only=None, case_files=Vec::new(), fuzz=200, fuzz_time=None,
    seed=0x5eed, factor=2.0, budget_dtype=None, save_failures=None,
    max_consecutive_errors=3, shrink_budget=300
))]
#[allow(clippy::too_many_arguments)]
fn check(
    py: Python<'_>,
    kernel: Py<PyAny>,
    suite: Option<String>,
    only: Option<Vec<String>>,
    case_files: Vec<PathBuf>,
    fuzz: usize,
    fuzz_time: Option<f64>,
    seed: u64,
    factor: f64,
    budget_dtype: Option<String>,
    save_failures: Option<PathBuf>,
    max_consecutive_errors: usize,
    shrink_budget: usize,
) -> PyResult<Outcome> {
    if !(factor.is_finite() && factor >= 1.0) {
        return Err(value_error(format!(
            "factor must be a finite number >= 1, given {factor}"
        )));
    }
    let fuzz_time = match fuzz_time {
        None => None,
        Some(t) if t.is_finite() && (0.0..=MAX_SECONDS).contains(&t) => {
            Some(Duration::from_secs_f64(t))
        }
        Some(t) => {
            let range = format!("from 0 to {MAX_SECONDS} (one week)");
            return Err(value_error(format!(
                "fuzz_time must be a number of seconds {range}, given {t}"
            )));
        }
    };
    let budget_dtype = match budget_dtype {
        None => None,
        Some(name) => Some(Dtype::from_str(&name).map_err(|_| {
            value_error(format!(
                "budget_dtype must be one of f64, f32, f16, bf16, given {name:?}"
            ))
        })?),
    };
    if let Some(dir) = &save_failures {
        posconform::files::check_output_dir(dir)
            .map_err(|e| value_error(format!("save_failures {}: {e}", dir.display())))?;
    }
    let cases = select_cases(suite.as_deref(), only.as_deref(), &case_files)?;
    let options = CheckOptions {
        compare: CompareOptions {
            factor,
            budget_dtype,
            ..CompareOptions::default()
        },
        fuzz_cases: fuzz,
        fuzz_time,
        seed,
        max_consecutive_errors,
        shrink_budget,
        save_dir: save_failures,
        select: posconform::select::Selection::everything(),
    };
    let mut target = kernel::PythonKernel::new(kernel);
    // The library runs without the GIL; the kernel takes it back for each call.
    let result = py.detach(|| {
        std::panic::catch_unwind(AssertUnwindSafe(|| {
            posconform::check::check(&mut target, &cases, &options, &mut |_, _, _| {})
        }))
    });
    if let Some(interruption) = target.interruption.take() {
        return Err(interruption);
    }
    match result {
        Err(panic) => {
            let what = panic
                .downcast_ref::<String>()
                .cloned()
                .or_else(|| panic.downcast_ref::<&str>().map(|s| s.to_string()))
                .unwrap_or_else(|| "no message".into());
            Err(PyRuntimeError::new_err(format!(
                "posconform failed inside (a bug; please report it): {what}"
            )))
        }
        Ok(Err(e)) if e.kernel_kind() == Some(KernelErrorKind::Handshake) => Err(value_error(e)),
        Ok(Err(e)) => Err(PyRuntimeError::new_err(e.to_string())),
        Ok(Ok(outcome)) => Ok(Outcome {
            outcome,
            cases,
            factor,
        }),
    }
}

/// Parses each name in `names` (an argument called `what`) with `FromStr`.
fn parse_all<T: std::str::FromStr>(what: &str, names: Option<Vec<String>>) -> PyResult<Vec<T>>
where
    T::Err: std::fmt::Display,
{
    names
        .unwrap_or_default()
        .iter()
        .map(|name| T::from_str(name).map_err(|e| value_error(format!("{what}: {e}"))))
        .collect()
}

/// Times the Python kernel `kernel` in process (see `posconform.bench` for the
/// options): the same workloads, calibration, document and gate as `posconform bench`.
#[pyfunction(name = "bench")]
#[pyo3(signature = (
    kernel, *, shapes=None, schemes=None, operations=None, dtypes=None, workloads=None,
    warmup=3, repeat=15, blocks=5, baseline=None, threshold=0.25
))]
#[allow(clippy::too_many_arguments)]
fn bench_kernel(
    py: Python<'_>,
    kernel: Py<PyAny>,
    shapes: Option<Vec<String>>,
    schemes: Option<Vec<String>>,
    operations: Option<Vec<String>>,
    dtypes: Option<Vec<String>>,
    workloads: Option<Vec<String>>,
    warmup: usize,
    repeat: usize,
    blocks: usize,
    baseline: Option<PathBuf>,
    threshold: f64,
) -> PyResult<BenchOutcome> {
    use posconform::bench::{self as b, gate, render};
    if !(5..=100_000).contains(&repeat) {
        return Err(value_error(format!(
            "repeat must be from 5 to 100000, given {repeat}"
        )));
    }
    if warmup > 10_000 {
        return Err(value_error(format!(
            "warmup must be at most 10000, given {warmup}"
        )));
    }
    if !(2..=repeat).contains(&blocks) {
        return Err(value_error(format!(
            "blocks must be from 2 to repeat ({repeat}), given {blocks}"
        )));
    }
    if !(threshold.is_finite() && threshold > 0.0 && threshold <= gate::MAX_THRESHOLD) {
        return Err(value_error(format!(
            "threshold must be a fraction more than 0 and at most {}, given {threshold}",
            gate::MAX_THRESHOLD
        )));
    }
    let mut shapes: Vec<b::BenchShape> = parse_all("shapes", shapes)?;
    if shapes.is_empty() {
        shapes
            .push(b::BenchShape::preset("medium").ok_or_else(|| value_error("no medium preset"))?);
    }
    let filter = posconform::select::Filter {
        schemes: parse_all("schemes", schemes)?,
        operations: parse_all("operations", operations)?,
        dtypes: parse_all("dtypes", dtypes)?,
        ids: parse_all("workloads", workloads)?,
    };
    let baseline = match baseline {
        Some(path) => Some(gate::Baseline::read(&path).map_err(value_error)?),
        None => None,
    };
    let mut target = kernel::PythonKernel::new(kernel);
    let info = posconform::Kernel::describe(&mut target).map_err(value_error)?;
    let (selected, notes) = b::kernel_workloads(&info, &shapes, &filter).map_err(value_error)?;
    let subject = format!("{} {}", info.name, info.version).trim().to_string();
    let options = b::BenchOptions {
        warmup,
        repeat,
        blocks,
    };
    let result = py.detach(|| {
        std::panic::catch_unwind(AssertUnwindSafe(|| {
            b::measure(
                b::Target::InProcess(&mut target),
                subject,
                selected,
                &options,
                &mut |_, _| {},
            )
        }))
    });
    if let Some(interruption) = target.interruption.take() {
        return Err(interruption);
    }
    let mut report = result.map_err(|_| {
        PyRuntimeError::new_err("posconform failed inside bench (a bug; please report it)")
    })?;
    report.notes.splice(0..0, notes);
    let thresholds = gate::Thresholds {
        default: threshold,
        overrides: Vec::new(),
    };
    let gate = baseline.map(|b| gate::compare(&report, &b, &thresholds));
    Ok(BenchOutcome {
        text: render::text(&report, gate.as_ref()),
        json: render::json(&report, gate.as_ref()),
        exit_code: render::exit_code(&report, gate.as_ref()),
    })
}

/// The result of a bench run: the text report, the JSON document, the exit status the
/// command would give.
#[pyclass(module = "posconform._native", frozen, get_all)]
struct BenchOutcome {
    text: String,
    json: String,
    exit_code: u8,
}

/// The result of a check run, with the library's renderers.
#[pyclass(module = "posconform._native", frozen)]
struct Outcome {
    outcome: CheckOutcome,
    /// The cases given to the run (not the random ones).
    cases: Vec<Case>,
    factor: f64,
}

impl Outcome {
    fn report(&self) -> &Report {
        &self.outcome.report
    }

    fn minimal_of(&self, id: &str) -> Option<&posconform::report::MinimalFailure> {
        self.outcome.minimal.iter().find(|m| m.case.id == id)
    }
}

#[pymethods]
impl Outcome {
    /// The text report, exactly as `posconform check` prints it.
    fn text(&self) -> String {
        report::text::render(self.report()) + &report::text::render_minimal(&self.outcome.minimal)
    }

    /// The JSON report (the document `posconform check --json` writes).
    fn json(&self) -> String {
        report::json::render(self.report())
    }

    /// The JUnit XML report (the document `posconform check --junit` writes).
    fn junit(&self) -> String {
        report::junit::render(self.report())
    }

    /// 0 conforming, 1 nonconforming, 2 could not run: the command's exit status.
    fn exit_code(&self) -> u8 {
        self.report().exit_code()
    }

    /// The text report of one case alone (with its shrinking summary for a minimal
    /// case); `KeyError` for an id the run does not have.
    fn case_text(&self, id: &str) -> PyResult<String> {
        let case = self
            .report()
            .cases
            .iter()
            .find(|c| c.case == id)
            .ok_or_else(|| PyKeyError::new_err(id.to_string()))?;
        let alone = Report {
            mode: self.report().mode.clone(),
            subject: self.report().subject.clone(),
            cases: vec![case.clone()],
            notes: Vec::new(),
            never_exercised: Vec::new(),
            random: Default::default(),
            diagnosis: None,
        };
        let mut text = report::text::render(&alone);
        if let Some(m) = self.minimal_of(id) {
            text += &report::text::render_minimal(std::slice::from_ref(m));
        }
        Ok(text)
    }

    /// The minimal failing cases found by fuzzing: dicts with `id`, `found`, `tried`,
    /// `saved` (a path or None), `case` (the case object) and `text`.
    fn minimal<'py>(&self, py: Python<'py>) -> PyResult<Bound<'py, PyList>> {
        let list = PyList::empty(py);
        for m in &self.outcome.minimal {
            let item = pyo3::types::PyDict::new(py);
            item.set_item("id", &m.case.id)?;
            item.set_item("found", &m.found)?;
            item.set_item("tried", m.tried)?;
            item.set_item("saved", m.saved.as_ref().map(|p| p.display().to_string()))?;
            item.set_item("case", plain(py, &m.case)?)?;
            item.set_item(
                "text",
                report::text::render_minimal(std::slice::from_ref(m)),
            )?;
            list.append(item)?;
        }
        Ok(list)
    }

    /// Fuzzing statistics (a dict), or None when fuzzing did not run.
    fn fuzz<'py>(&self, py: Python<'py>) -> PyResult<Bound<'py, PyAny>> {
        match &self.outcome.fuzz {
            Some(summary) => plain(py, summary),
            None => Ok(py.None().into_bound(py)),
        }
    }

    /// What the kernel declared, as the harness read it (a dict).
    fn info<'py>(&self, py: Python<'py>) -> PyResult<Bound<'py, PyAny>> {
        plain(py, &self.outcome.info)
    }

    /// Writes the vector file of a case of this run (a suite case, a case read from a
    /// file, or a minimal failing case) into `directory`, for replaying it; returns the
    /// paths written (the `.json` file last).
    fn save_case(&self, id: &str, directory: PathBuf) -> PyResult<Vec<String>> {
        let case = self
            .cases
            .iter()
            .find(|c| c.id == id)
            .or_else(|| self.minimal_of(id).map(|m| &m.case))
            .ok_or_else(|| {
                PyKeyError::new_err(format!(
                    "{id}: only the cases given to the run and the minimal failing cases can be saved"
                ))
            })?;
        posconform::files::check_output_dir(&directory).map_err(value_error)?;
        let files = VectorFile::build(case, self.factor)
            .and_then(|v| v.write(&directory))
            .map_err(|e| PyRuntimeError::new_err(e.to_string()))?;
        Ok(files.iter().map(|p| p.display().to_string()).collect())
    }

    /// An SVG heatmap of the error of one output of one case (scores and
    /// probabilities outputs only), or None.
    fn svg(&self, case: &str, output: &str) -> Option<String> {
        let case = self.report().cases.iter().find(|c| c.case == case)?;
        let output = case.outputs.iter().find(|o| o.name.name() == output)?;
        report::svg::heatmap(case, output)
    }
}

/// The cases of a built-in suite, as dicts: `id`, `scheme`, `operation`, `dtype`,
/// `faults`, `purpose` and the whole `case` object.
#[pyfunction]
fn suite_cases<'py>(py: Python<'py>, name: &str) -> PyResult<Bound<'py, PyList>> {
    let list = PyList::empty(py);
    for case in posconform::suite::suite(name).map_err(value_error)? {
        let item = pyo3::types::PyDict::new(py);
        item.set_item("id", &case.id)?;
        item.set_item("scheme", case.scheme.scheme().name())?;
        item.set_item("operation", case.operation.name())?;
        item.set_item("dtype", case.dtype.name())?;
        item.set_item("faults", case.faults.clone())?;
        item.set_item("purpose", &case.purpose)?;
        item.set_item("case", plain(py, &case)?)?;
        list.append(item)?;
    }
    Ok(list)
}

/// The handshake `declaration` (a dict: the protocol's handshake result) as the harness
/// reads it, or a `ValueError` naming the field that is wrong.
#[pyfunction]
fn read_handshake<'py>(
    py: Python<'py>,
    declaration: &Bound<'py, PyAny>,
) -> PyResult<Bound<'py, PyAny>> {
    let value = values::from_python(declaration, "handshake")?;
    let name = value
        .get("name")
        .and_then(|n| n.as_str())
        .unwrap_or("python")
        .to_string();
    let info = posconform::kernel::protocol::parse_handshake(&value, &name).map_err(value_error)?;
    plain(py, &info)
}

/// The names of the built-in suites.
#[pyfunction]
fn suites() -> Vec<&'static str> {
    posconform::suite::SUITES.to_vec()
}

/// The version of the posconform library this extension was built from.
#[pyfunction]
fn library_version() -> PyResult<String> {
    // The reference kernel reports the library's own CARGO_PKG_VERSION.
    use posconform::kernel::Kernel as _;
    posconform::kernel::ReferenceKernel::default()
        .describe()
        .map(|info| info.version)
        .map_err(|e| PyRuntimeError::new_err(e.to_string()))
}

#[pymodule]
fn _native(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add_function(wrap_pyfunction!(check, m)?)?;
    m.add_function(wrap_pyfunction!(bench_kernel, m)?)?;
    m.add_function(wrap_pyfunction!(suite_cases, m)?)?;
    m.add_function(wrap_pyfunction!(suites, m)?)?;
    m.add_function(wrap_pyfunction!(read_handshake, m)?)?;
    m.add_function(wrap_pyfunction!(library_version, m)?)?;
    m.add_class::<Outcome>()?;
    m.add_class::<BenchOutcome>()?;
    Ok(())
}
