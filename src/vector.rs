//! Vector files (golden data) and result files (a kernel's answers), in our own
//! versioned JSON format; specification in vectors/README.md.
//!
//! A vector file `<case id>.json` holds `format`, `version`, the `case`, its `inputs`,
//! the `expected` outputs (f64 oracle), the `budget` for the case dtype (with a
//! per-element `tolerance` array), and `provenance`. Arrays use the array object of
//! [`crate::tensor`]; an array with more than [`NPY_THRESHOLD`] elements is written to a
//! side file `<case id>.<section>.<name>.npy` and referenced as `{"npy": "<file>"}`.
//!
//! A result file `<case id>.json` holds `format: "posconform.result"`, `version`, `case`
//! and `outputs`; alternatively each output may be a NumPy file
//! `<case id>.<output>.npy` in the results directory.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde_json::{json, Map, Value};

use crate::case::{Arrays, Case};
use crate::compare::budgets;
use crate::error::{Error, Result};
use crate::precision::Dtype;
use crate::reference;
use crate::report::write_atomic;
use crate::tensor::Tensor;

/// The `format` tag of vector files.
pub const VECTOR_FORMAT: &str = "posconform.vector";
/// The `format` tag of result files.
pub const RESULT_FORMAT: &str = "posconform.result";
/// The format version this build reads and writes.
pub const VERSION: u64 = 1;
/// Arrays with more elements than this go to `.npy` side files (bf16 excepted).
pub const NPY_THRESHOLD: usize = 1 << 16;
/// The name of the suite index written next to the vector files.
pub const INDEX_FILE: &str = "index.json";

/// The budget stored with a vector, for the case dtype.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredBudget {
    /// The dtype the budget is for.
    pub dtype: Dtype,
    /// `c`.
    pub factor: f64,
    /// Largest deviation of the same-precision baseline from the oracle.
    pub baseline_error: f64,
    /// `sqrt(n)·u·max|expected|`.
    pub floor: f64,
    /// Per-element tolerance (`max(analytic, c · max(baseline, floor))`); a scalar
    /// array when no analytic bound exists.
    pub tolerance: Tensor,
}

/// A golden vector: one case with everything needed to check a kernel's answer.
#[derive(Debug, Clone, PartialEq)]
pub struct VectorFile {
    /// The case.
    pub case: Case,
    /// Its inputs, in the case dtype.
    pub inputs: Arrays,
    /// The f64 oracle.
    pub expected: Arrays,
    /// Budgets per output, for the case dtype.
    pub budget: BTreeMap<String, StoredBudget>,
    /// Where the numbers come from.
    pub provenance: Value,
}

impl VectorFile {
    /// Builds the vector of `case`: inputs from the seed, expected outputs from the
    /// reference, budgets for the case dtype with factor `c`.
    pub fn build(case: &Case, factor: f64) -> Result<Self> {
        let inputs = case.inputs()?;
        let expected = reference::expected(case, &inputs)?;
        let stored = budgets(case, &inputs, &expected, case.dtype, factor)?
            .into_iter()
            .map(|(name, b)| {
                let tolerance = Tensor::from_f64(Dtype::F64, b.tolerance());
                (
                    name,
                    StoredBudget {
                        dtype: b.dtype,
                        factor: b.factor,
                        baseline_error: b.baseline_error,
                        floor: b.floor,
                        tolerance,
                    },
                )
            })
            .collect();
        let expected = crate::kernel::outputs_in(expected, Dtype::F64);
        let provenance = json!({
            "generator": format!("posconform {}", env!("CARGO_PKG_VERSION")),
            "seed": case.seed,
            "inputs": "ChaCha20 stream from the seed (src/generate.rs), rounded to the case dtype",
            "expected": "f64 reference with portable arithmetic (fixed summation order)",
            "source": case.scheme.scheme().source(),
        });
        Ok(VectorFile {
            case: case.clone(),
            inputs,
            expected,
            budget: stored,
            provenance,
        })
    }

    /// Writes `<dir>/<id>.json` (and side files) atomically; returns the paths written.
    pub fn write(&self, dir: &Path) -> Result<Vec<PathBuf>> {
        let id = &self.case.id;
        let mut written = Vec::new();
        let mut side = |section: &str, name: &str, t: &Tensor| -> Result<Value> {
            if t.view().len() > NPY_THRESHOLD && t.dtype() != Dtype::Bf16 {
                let file = format!("{id}.{section}.{name}.npy");
                let path = dir.join(&file);
                write_atomic(&path, &t.to_npy()?)?;
                written.push(path);
                Ok(json!({ "npy": file }))
            } else {
                Ok(t.to_json())
            }
        };
        let mut inputs = Map::new();
        for (name, t) in &self.inputs {
            inputs.insert(name.clone(), side("inputs", name, t)?);
        }
        let mut expected = Map::new();
        for (name, t) in &self.expected {
            expected.insert(name.clone(), side("expected", name, t)?);
        }
        let mut budget = Map::new();
        for (name, b) in &self.budget {
            budget.insert(
                name.clone(),
                json!({
                    "dtype": b.dtype,
                    "factor": b.factor,
                    "baseline_error": b.baseline_error,
                    "floor": b.floor,
                    "tolerance": side("tolerance", name, &b.tolerance)?,
                }),
            );
        }
        let doc = json!({
            "format": VECTOR_FORMAT,
            "version": VERSION,
            "case": self.case,
            "inputs": inputs,
            "expected": expected,
            "budget": budget,
            "provenance": self.provenance,
        });
        let path = dir.join(format!("{id}.json"));
        let mut text = serde_json::to_string_pretty(&doc).expect("serialisable");
        text.push('\n');
        write_atomic(&path, text.as_bytes())?;
        written.push(path);
        Ok(written)
    }

    /// Reads and validates a vector file; errors name the file and the field.
    pub fn read(path: &Path) -> Result<Self> {
        let doc = read_json(path)?;
        let at = |field: &str| format!("{}: field `{field}`", path.display());
        check_header(&doc, path, VECTOR_FORMAT)?;
        let case: Case = serde_json::from_value(doc.get("case").cloned().unwrap_or(Value::Null))
            .map_err(|e| Error::format(at("case"), e.to_string()))?;
        case.validate()
            .map_err(|e| Error::format(at("case"), e.to_string()))?;
        let dir = path.parent().unwrap_or(Path::new("."));
        let arrays = |section: &str| -> Result<Arrays> {
            let object = doc
                .get(section)
                .and_then(Value::as_object)
                .ok_or_else(|| Error::format(at(section), "missing or not an object"))?;
            object
                .iter()
                .map(|(name, v)| {
                    Ok((
                        name.clone(),
                        read_array(v, dir, &at(&format!("{section}.{name}")))?,
                    ))
                })
                .collect()
        };
        let inputs = arrays("inputs")?;
        let expected = arrays("expected")?;
        for spec in case.input_specs() {
            let field = at(&format!("inputs.{}", spec.name));
            match inputs.get(&spec.name) {
                None => return Err(Error::format(field, "missing")),
                Some(got) if got.shape() != spec.shape.as_slice() => {
                    return Err(Error::format(
                        field,
                        format!("shape {:?}, the case needs {:?}", got.shape(), spec.shape),
                    ))
                }
                _ => {}
            }
        }
        for (name, shape) in case.output_shapes() {
            match expected.get(name) {
                None => return Err(Error::format(at(&format!("expected.{name}")), "missing")),
                Some(got) if got.shape() != shape.as_slice() => {
                    return Err(Error::format(
                        at(&format!("expected.{name}")),
                        format!("shape {:?}, the case needs {shape:?}", got.shape()),
                    ))
                }
                _ => {}
            }
        }
        let mut budget = BTreeMap::new();
        if let Some(object) = doc.get("budget").and_then(Value::as_object) {
            for (name, b) in object {
                let field = |f: &str| at(&format!("budget.{name}.{f}"));
                let number = |f: &str| {
                    b.get(f)
                        .and_then(Value::as_f64)
                        .ok_or_else(|| Error::format(field(f), "missing or not a number"))
                };
                let dtype = b
                    .get("dtype")
                    .and_then(Value::as_str)
                    .ok_or_else(|| Error::format(field("dtype"), "missing"))?
                    .parse()
                    .map_err(|e: Error| Error::format(field("dtype"), e.to_string()))?;
                let tolerance = read_array(
                    b.get("tolerance").unwrap_or(&Value::Null),
                    dir,
                    &field("tolerance"),
                )?;
                let output_shape = expected.get(name).map(|t| t.shape().to_vec());
                if !tolerance.shape().is_empty()
                    && output_shape.as_deref() != Some(tolerance.shape())
                {
                    return Err(Error::format(
                        field("tolerance"),
                        format!(
                            "shape {:?}: a scalar or the shape of `expected.{name}` ({:?}) is needed",
                            tolerance.shape(),
                            output_shape.unwrap_or_default()
                        ),
                    ));
                }
                budget.insert(
                    name.clone(),
                    StoredBudget {
                        dtype,
                        factor: number("factor")?,
                        baseline_error: number("baseline_error")?,
                        floor: number("floor")?,
                        tolerance,
                    },
                );
            }
        }
        Ok(VectorFile {
            case,
            inputs,
            expected,
            budget,
            provenance: doc.get("provenance").cloned().unwrap_or(Value::Null),
        })
    }

    /// The stored budgets as comparison budgets. The stored per-element tolerance is
    /// `max(analytic, allowance)`; where it exceeds the allowance it *is* the analytic
    /// bound, elsewhere the allowance decided, which is what the criterion reports.
    pub fn budgets(&self) -> BTreeMap<String, crate::compare::Budget> {
        self.budget
            .iter()
            .map(|(name, b)| {
                let exact = crate::case::is_integer_output(name);
                let mut budget = crate::compare::Budget {
                    dtype: b.dtype,
                    factor: b.factor,
                    baseline_error: b.baseline_error,
                    floor: b.floor,
                    analytic: None,
                    exact,
                };
                let allowance = budget.allowance();
                if !exact && !b.tolerance.shape().is_empty() {
                    budget.analytic =
                        Some(
                            b.tolerance
                                .view()
                                .mapv(|t| if t > allowance { t } else { 0.0 }),
                        );
                }
                (name.clone(), budget)
            })
            .collect()
    }

    /// The expected outputs as plain f64 arrays.
    pub fn expected_outputs(&self) -> reference::Outputs {
        self.expected
            .iter()
            .map(|(n, t)| (n.clone(), t.view().to_owned()))
            .collect()
    }
}

fn read_json(path: &Path) -> Result<Value> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io("read", path, e))?;
    serde_json::from_str(&text).map_err(|e| {
        Error::format(
            path.display(),
            format!(
                "malformed JSON at line {}, column {}: {e}",
                e.line(),
                e.column()
            ),
        )
    })
}

fn check_header(doc: &Value, path: &Path, format: &str) -> Result<()> {
    let at = |field: &str| format!("{}: field `{field}`", path.display());
    match doc.get("format").and_then(Value::as_str) {
        Some(f) if f == format => {}
        Some(other) => {
            return Err(Error::format(
                at("format"),
                format!("expected \"{format}\", found \"{other}\""),
            ))
        }
        None => {
            return Err(Error::format(
                at("format"),
                format!("missing (expected \"{format}\")"),
            ))
        }
    }
    match doc.get("version").and_then(Value::as_u64) {
        Some(VERSION) => Ok(()),
        Some(v) => Err(Error::format(
            at("version"),
            format!(
                "format version {v} is not supported by this build (it reads version {VERSION})"
            ),
        )),
        None => Err(Error::format(at("version"), "missing")),
    }
}

fn read_array(value: &Value, dir: &Path, location: &str) -> Result<Tensor> {
    if let Some(file) = value.get("npy").and_then(Value::as_str) {
        if file.contains('/') || file.contains('\\') || file.starts_with('.') {
            return Err(Error::format(
                location,
                format!("side file name \"{file}\" must be a plain file name"),
            ));
        }
        let path = dir.join(file);
        let bytes = std::fs::read(&path).map_err(|e| {
            Error::format(
                location,
                format!("cannot read side file {}: {e}", path.display()),
            )
        })?;
        return Tensor::from_npy(
            &bytes,
            &format!("{location} (side file {})", path.display()),
        );
    }
    Tensor::from_json(value, &location)
}

/// The files of a results directory that belong to `case_id`: `<id>.json`, or
/// `<id>.<output>.npy` files. `Ok(None)` when there are none.
pub fn read_results(dir: &Path, case_id: &str, outputs: &[&str]) -> Result<Option<Arrays>> {
    let json_path = dir.join(format!("{case_id}.json"));
    let mut arrays = Arrays::new();
    let mut found = false;
    if json_path.exists() {
        found = true;
        let doc = read_json(&json_path)?;
        check_header(&doc, &json_path, RESULT_FORMAT)?;
        let at = |field: &str| format!("{}: field `{field}`", json_path.display());
        if let Some(named) = doc.get("case").and_then(Value::as_str) {
            if named != case_id {
                return Err(Error::format(
                    at("case"),
                    format!("names case \"{named}\", expected \"{case_id}\""),
                ));
            }
        }
        let object = doc
            .get("outputs")
            .and_then(Value::as_object)
            .ok_or_else(|| Error::format(at("outputs"), "missing or not an object"))?;
        for (name, v) in object {
            arrays.insert(
                name.clone(),
                read_array(v, dir, &at(&format!("outputs.{name}")))?,
            );
        }
    }
    for name in outputs {
        let path = dir.join(format!("{case_id}.{name}.npy"));
        if path.exists() {
            found = true;
            let bytes = std::fs::read(&path).map_err(|e| Error::io("read", &path, e))?;
            arrays.insert(name.to_string(), Tensor::from_npy(&bytes, &path.display())?);
        }
    }
    Ok(found.then_some(arrays))
}

/// Writes a result file `<dir>/<id>.json` for `outputs` (used by adapters' tests and
/// by `check` to save what a kernel answered).
pub fn write_results(dir: &Path, case_id: &str, outputs: &Arrays) -> Result<PathBuf> {
    let object: Map<String, Value> = outputs
        .iter()
        .map(|(n, t)| (n.clone(), t.to_json()))
        .collect();
    let doc =
        json!({ "format": RESULT_FORMAT, "version": VERSION, "case": case_id, "outputs": object });
    let path = dir.join(format!("{case_id}.json"));
    let mut text = serde_json::to_string_pretty(&doc).expect("serialisable");
    text.push('\n');
    write_atomic(&path, text.as_bytes())?;
    Ok(path)
}

/// Writes every case of a suite into `dir` with an index; returns the files written.
pub fn emit_suite(name: &str, cases: &[Case], dir: &Path, factor: f64) -> Result<Vec<PathBuf>> {
    std::fs::create_dir_all(dir).map_err(|e| Error::io("create", dir, e))?;
    let mut written = Vec::new();
    let mut entries = Vec::new();
    for case in cases {
        let files = VectorFile::build(case, factor)?.write(dir)?;
        entries.push(json!({
            "case": case.id,
            "scheme": case.scheme.scheme().name(),
            "operation": case.operation.name(),
            "dtype": case.dtype,
            "faults": case.faults,
            "files": files.iter().filter_map(|p| p.file_name()).map(|n| n.to_string_lossy()).collect::<Vec<_>>(),
        }));
        written.extend(files);
    }
    let index = json!({
        "format": "posconform.index",
        "version": VERSION,
        "suite": name,
        "generator": format!("posconform {}", env!("CARGO_PKG_VERSION")),
        "cases": entries,
    });
    let path = dir.join(INDEX_FILE);
    let mut text = serde_json::to_string_pretty(&index).expect("serialisable");
    text.push('\n');
    write_atomic(&path, text.as_bytes())?;
    written.push(path);
    Ok(written)
}

/// The vector files of a directory (every `*.json` except the index), sorted.
pub fn vector_files(dir: &Path) -> Result<Vec<PathBuf>> {
    let entries = std::fs::read_dir(dir).map_err(|e| Error::io("list", dir, e))?;
    let mut files: Vec<PathBuf> = entries
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| {
            p.extension().is_some_and(|x| x == "json")
                && p.file_name().is_some_and(|n| n != INDEX_FILE)
        })
        .collect();
    files.sort();
    Ok(files)
}
