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

use crate::budget::{self, Budget};
use crate::case::Output;
use crate::case::{Arrays, Case};
use crate::error::{Error, Result};
use crate::files::write_atomic;
use crate::math::precision::Dtype;
use crate::reference;
use crate::tensor::{Tensor, WireArray};

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
        let (expected, budgets) = budget::expected_and_budgets(case, &inputs, case.dtype, factor)?;
        let stored = budgets
            .into_iter()
            .map(|(output, b)| {
                let tolerance = Tensor::from_f64(Dtype::F64, b.tolerance());
                (
                    output.name().to_string(),
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
            "inputs": "ChaCha20 stream from the seed (src/math/stream.rs), rounded to the case dtype",
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

    /// The names of the files [`write`](Self::write) writes: side files, then
    /// `<id>.json`.
    pub fn file_names(&self) -> Vec<String> {
        let id = &self.case.id;
        let side = |section: &str, name: &str, t: &Tensor| {
            (t.view().len() > NPY_THRESHOLD && t.dtype() != Dtype::Bf16)
                .then(|| format!("{id}.{section}.{name}.npy"))
        };
        let mut names: Vec<String> = self
            .inputs
            .iter()
            .filter_map(|(n, t)| side("inputs", n, t))
            .chain(
                self.expected
                    .iter()
                    .filter_map(|(n, t)| side("expected", n, t)),
            )
            .chain(
                self.budget
                    .iter()
                    .filter_map(|(n, b)| side("tolerance", n, &b.tolerance)),
            )
            .collect();
        names.push(format!("{id}.json"));
        names
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
        let mut text = serde_json::to_string_pretty(&doc)
            .map_err(|e| Error::format(path.display(), format!("cannot serialise: {e}")))?;
        text.push('\n');
        write_atomic(&path, text.as_bytes())?;
        written.push(path);
        Ok(written)
    }

    /// Reads only the case of a vector file (format, version and `case`; the arrays are
    /// skipped unparsed), to decide whether a run selects it.
    pub fn read_case(path: &Path) -> Result<Case> {
        #[derive(serde::Deserialize)]
        struct Head {
            #[serde(default)]
            format: Option<Value>,
            #[serde(default)]
            version: Option<Value>,
            #[serde(default)]
            case: Option<Value>,
        }
        let bytes = crate::files::read_regular(path, vector_file_limit(), "a vector file")?;
        let head: Head = serde_json::from_slice(&bytes).map_err(|e| {
            Error::format(
                path.display(),
                format!(
                    "malformed JSON at line {}, column {}: {e}",
                    e.line(),
                    e.column()
                ),
            )
        })?;
        check_header(
            head.format.as_ref(),
            head.version.as_ref(),
            path,
            VECTOR_FORMAT,
        )?;
        let at = format!("{}: field `case`", path.display());
        let case: Case = serde_json::from_value(head.case.unwrap_or(Value::Null))
            .map_err(|e| Error::format(&at, e.to_string()))?;
        case.validate()
            .map_err(|e| Error::format(&at, e.to_string()))?;
        Ok(case)
    }

    /// Reads and validates a vector file; errors name the file and the field. Only a
    /// regular file is read, and arrays are parsed straight into typed values.
    pub fn read(path: &Path) -> Result<Self> {
        let doc = read_doc(path, vector_file_limit(), "a vector file")?;
        let at = |field: &str| format!("{}: field `{field}`", path.display());
        check_header(
            doc.format.as_ref(),
            doc.version.as_ref(),
            path,
            VECTOR_FORMAT,
        )?;
        let case: Case = serde_json::from_value(doc.case.clone().unwrap_or(Value::Null))
            .map_err(|e| Error::format(at("case"), e.to_string()))?;
        case.validate()
            .map_err(|e| Error::format(at("case"), e.to_string()))?;
        let dir = path.parent().unwrap_or(Path::new("."));
        let arrays = |section: &str, wires: Option<Section>| -> Result<Arrays> {
            let object = wires
                .and_then(|s| s.0)
                .ok_or_else(|| Error::format(at(section), "missing or not an object"))?;
            object
                .into_iter()
                .map(|(name, wire)| {
                    let array = read_array(wire, dir, &at(&format!("{section}.{name}")))?;
                    Ok((name, array))
                })
                .collect()
        };
        let inputs = arrays("inputs", doc.inputs)?;
        let expected = arrays("expected", doc.expected)?;
        for spec in case.input_specs() {
            let field = at(&format!("inputs.{}", spec.name));
            match inputs.get(spec.name) {
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
        for (output, shape) in case.output_shapes() {
            let name = output.name();
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
        for (name, b) in doc.budget.and_then(|b| b.0).unwrap_or_default() {
            let field = |f: &str| at(&format!("budget.{name}.{f}"));
            let number = |value: &Option<Value>, f: &str| {
                value
                    .as_ref()
                    .and_then(Value::as_f64)
                    .ok_or_else(|| Error::format(field(f), "missing or not a number"))
            };
            let dtype = b
                .dtype
                .as_ref()
                .and_then(Value::as_str)
                .ok_or_else(|| Error::format(field("dtype"), "missing"))?
                .parse()
                .map_err(|e: Error| Error::format(field("dtype"), e.to_string()))?;
            let factor = number(&b.factor, "factor")?;
            let baseline_error = number(&b.baseline_error, "baseline_error")?;
            let floor = number(&b.floor, "floor")?;
            let tolerance = match b.tolerance {
                Some(wire) => read_array(wire, dir, &field("tolerance"))?,
                None => return Err(Error::format(field("tolerance"), "missing")),
            };
            let output_shape = expected.get(&name).map(|t| t.shape().to_vec());
            if !tolerance.shape().is_empty() && output_shape.as_deref() != Some(tolerance.shape()) {
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
                name,
                StoredBudget {
                    dtype,
                    factor,
                    baseline_error,
                    floor,
                    tolerance,
                },
            );
        }
        Ok(VectorFile {
            case,
            inputs,
            expected,
            budget,
            provenance: doc.provenance.unwrap_or(Value::Null),
        })
    }

    /// The stored budgets as comparison budgets. The stored per-element tolerance is
    /// `max(analytic, allowance)`; where it exceeds the allowance it *is* the analytic
    /// bound, elsewhere the allowance decided, which is what the criterion reports.
    pub fn budgets(&self) -> budget::Budgets {
        self.budget
            .iter()
            .filter_map(|(name, b)| Some((name.parse::<Output>().ok()?, b)))
            .map(|(output, b)| {
                let exact = output.is_integer();
                let mut budget = Budget {
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
                (output, budget)
            })
            .collect()
    }

    /// The expected outputs as plain f64 arrays.
    pub fn expected_outputs(&self) -> reference::Outputs {
        self.expected
            .iter()
            .filter_map(|(n, t)| Some((n.parse::<Output>().ok()?, t.view().to_owned())))
            .collect()
    }
}

/// The top level of a vector or result file, parsed in one pass: the small members
/// as JSON values, the array sections straight into typed arrays.
#[derive(serde::Deserialize)]
#[serde(expecting = "a JSON object")]
struct Doc {
    #[serde(default)]
    format: Option<Value>,
    #[serde(default)]
    version: Option<Value>,
    #[serde(default)]
    case: Option<Value>,
    #[serde(default)]
    inputs: Option<Section>,
    #[serde(default)]
    expected: Option<Section>,
    #[serde(default)]
    outputs: Option<Section>,
    #[serde(default)]
    budget: Option<Budgets>,
    #[serde(default)]
    provenance: Option<Value>,
}

/// Arrays by name; `None` when the member is not an object.
struct Section(Option<BTreeMap<String, WireArray>>);

/// Stored budgets by output name; `None` when the member is not an object.
struct Budgets(Option<BTreeMap<String, BudgetDoc>>);

#[derive(serde::Deserialize, Default)]
#[serde(expecting = "a budget object {dtype, factor, baseline_error, floor, tolerance}")]
struct BudgetDoc {
    #[serde(default)]
    dtype: Option<Value>,
    #[serde(default)]
    factor: Option<Value>,
    #[serde(default)]
    baseline_error: Option<Value>,
    #[serde(default)]
    floor: Option<Value>,
    #[serde(default)]
    tolerance: Option<WireArray>,
}

/// Deserialises a map of `T` by name, or `None` (after skipping it) for anything that
/// is not an object, so the caller can name the field in its error.
fn lenient_map<'de, D, T>(
    deserializer: D,
) -> std::result::Result<Option<BTreeMap<String, T>>, D::Error>
where
    D: serde::Deserializer<'de>,
    T: serde::Deserialize<'de>,
{
    use serde::de::{IgnoredAny, MapAccess, SeqAccess, Visitor};
    struct V<T>(std::marker::PhantomData<T>);
    impl<'de, T: serde::Deserialize<'de>> Visitor<'de> for V<T> {
        type Value = Option<BTreeMap<String, T>>;
        fn expecting(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
            f.write_str("an object")
        }
        fn visit_map<A: MapAccess<'de>>(
            self,
            mut map: A,
        ) -> std::result::Result<Self::Value, A::Error> {
            let mut out = BTreeMap::new();
            while let Some((k, v)) = map.next_entry::<String, T>()? {
                out.insert(k, v);
            }
            Ok(Some(out))
        }
        fn visit_seq<A: SeqAccess<'de>>(
            self,
            mut seq: A,
        ) -> std::result::Result<Self::Value, A::Error> {
            while seq.next_element::<IgnoredAny>()?.is_some() {}
            Ok(None)
        }
        fn visit_bool<E>(self, _: bool) -> std::result::Result<Self::Value, E> {
            Ok(None)
        }
        fn visit_i64<E>(self, _: i64) -> std::result::Result<Self::Value, E> {
            Ok(None)
        }
        fn visit_u64<E>(self, _: u64) -> std::result::Result<Self::Value, E> {
            Ok(None)
        }
        fn visit_f64<E>(self, _: f64) -> std::result::Result<Self::Value, E> {
            Ok(None)
        }
        fn visit_str<E>(self, _: &str) -> std::result::Result<Self::Value, E> {
            Ok(None)
        }
        fn visit_unit<E>(self) -> std::result::Result<Self::Value, E> {
            Ok(None)
        }
    }
    deserializer.deserialize_any(V(std::marker::PhantomData))
}

impl<'de> serde::Deserialize<'de> for Section {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> std::result::Result<Self, D::Error> {
        lenient_map(d).map(Section)
    }
}

impl<'de> serde::Deserialize<'de> for Budgets {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> std::result::Result<Self, D::Error> {
        lenient_map(d).map(Budgets)
    }
}

/// The largest vector file read: room for every array of the largest case inline
/// (16 bytes an element covers base64 of any dtype, three arrays per element).
fn vector_file_limit() -> u64 {
    (crate::tensor::max_elements() as u64).saturating_mul(16)
}

/// The largest result file read for outputs of `elements` elements in all: 1 MiB plus
/// 48 bytes an element (any encoding of any dtype fits).
fn result_file_limit(elements: usize) -> u64 {
    (elements as u64).saturating_mul(48).saturating_add(1 << 20)
}

fn read_doc(path: &Path, limit: u64, what: &str) -> Result<Doc> {
    let bytes = crate::files::read_regular(path, limit, what)?;
    serde_json::from_slice(&bytes).map_err(|e| {
        let kind = if e.is_data() {
            "unexpected content"
        } else {
            "malformed JSON"
        };
        Error::format(
            path.display(),
            format!("{kind} at line {}, column {}: {e}", e.line(), e.column()),
        )
    })
}

fn check_header(
    format_field: Option<&Value>,
    version: Option<&Value>,
    path: &Path,
    format: &str,
) -> Result<()> {
    let at = |field: &str| format!("{}: field `{field}`", path.display());
    match format_field {
        Some(Value::String(f)) if f == format => {}
        Some(Value::String(other)) => {
            return Err(Error::format(
                at("format"),
                format!(
                    "expected \"{format}\", found {:?}",
                    other.chars().take(60).collect::<String>()
                ),
            ))
        }
        Some(other) => {
            let mut shown = other.to_string();
            shown.truncate(60);
            return Err(Error::format(
                at("format"),
                format!("expected \"{format}\", found {shown}"),
            ));
        }
        None => {
            return Err(Error::format(
                at("format"),
                format!("missing (expected \"{format}\")"),
            ))
        }
    }
    match version {
        Some(v) if v.as_u64() == Some(VERSION) => Ok(()),
        Some(v) => {
            let mut shown = v.to_string();
            shown.truncate(60);
            Err(Error::format(
                at("version"),
                format!(
                    "format version {shown} is not supported by this build (it reads version {VERSION}, an integer)"
                ),
            ))
        }
        None => Err(Error::format(at("version"), "missing")),
    }
}

fn read_array(wire: WireArray, dir: &Path, location: &str) -> Result<Tensor> {
    match wire.npy() {
        None => wire.into_tensor(&location),
        Some(Err(e)) => Err(Error::format(location, e.to_string())),
        Some(Ok(file)) => {
            if file.contains('/')
                || file.contains('\\')
                || file.starts_with('.')
                || file.contains('\0')
            {
                return Err(Error::format(
                    location,
                    format!("side file name {:?} must be a plain file name", file),
                ));
            }
            let path = dir.join(file);
            let at = format!("{location} (side file {})", path.display());
            read_npy(&path, &at).map_err(|e| match e {
                Error::Format { .. } if e.to_string().starts_with(&at) => e,
                other => Error::format(&at, other.to_string()),
            })
        }
    }
}

/// Reads a `.npy` file: a regular file only, the header first, and the data only when
/// the file's size is exactly what the header's shape and dtype call for.
pub fn read_npy(path: &Path, location: &dyn std::fmt::Display) -> Result<Tensor> {
    use std::io::Read as _;
    // A NumPy header is a few hundred bytes; 1 MiB is far beyond any real one.
    const HEADER_LIMIT: u64 = (1 << 20) + 12;
    let (file, len) = crate::files::open_regular(path)?;
    let mut file = file;
    let mut prefix = Vec::new();
    (&mut file)
        .take(HEADER_LIMIT.min(len))
        .read_to_end(&mut prefix)
        .map_err(|e| Error::io("read", path, e))?;
    let header = crate::tensor::NpyHeader::parse(&prefix, location)?;
    let expected = (header.data_offset as u64).saturating_add(header.data_len as u64);
    if len != expected {
        return Err(Error::format(
            location,
            format!(
                "truncated or oversized .npy data: shape {:?} of {} needs {} bytes, found {}",
                header.shape,
                header.dtype,
                header.data_len,
                len.saturating_sub(header.data_offset as u64)
            ),
        ));
    }
    let mut data = prefix.split_off(header.data_offset.min(prefix.len()));
    let rest = header.data_len.saturating_sub(data.len());
    data.extend(crate::files::read_exact_len(&mut file, rest, path)?);
    header.decode(&data, location)
}

/// The files of a results directory that belong to `case_id`: `<id>.json`, or
/// `<id>.<output>.npy` files. `Ok(None)` when there are none.
pub fn read_results(dir: &Path, case_id: &str, outputs: &[&str]) -> Result<Option<Arrays>> {
    read_results_within(
        dir,
        case_id,
        outputs,
        result_file_limit(crate::tensor::max_elements()),
    )
}

/// [`read_results`] for `case`, refusing a result file larger than the case's outputs
/// can need.
pub fn read_results_for(dir: &Path, case: &Case) -> Result<Option<Arrays>> {
    let shapes = case.output_shapes();
    let names: Vec<&str> = shapes.iter().map(|(o, _)| o.name()).collect();
    let elements = shapes
        .iter()
        .map(|(_, s)| {
            s.iter()
                .try_fold(1usize, |a, &d| a.checked_mul(d))
                .unwrap_or(usize::MAX)
        })
        .fold(0usize, usize::saturating_add);
    read_results_within(dir, &case.id, &names, result_file_limit(elements))
}

fn read_results_within(
    dir: &Path,
    case_id: &str,
    outputs: &[&str],
    limit: u64,
) -> Result<Option<Arrays>> {
    let json_path = dir.join(format!("{case_id}.json"));
    let mut arrays = Arrays::new();
    let mut found = false;
    if std::fs::symlink_metadata(&json_path).is_ok() {
        found = true;
        let doc = read_doc(&json_path, limit, "the result file of this case")?;
        check_header(
            doc.format.as_ref(),
            doc.version.as_ref(),
            &json_path,
            RESULT_FORMAT,
        )?;
        let at = |field: &str| format!("{}: field `{field}`", json_path.display());
        if let Some(named) = doc.case.as_ref() {
            if named.as_str() != Some(case_id) {
                let mut shown = named.to_string();
                shown.truncate(80);
                return Err(Error::format(
                    at("case"),
                    format!("names case {shown}, expected \"{case_id}\""),
                ));
            }
        }
        let object = doc
            .outputs
            .and_then(|s| s.0)
            .ok_or_else(|| Error::format(at("outputs"), "missing or not an object"))?;
        for (name, wire) in object {
            let location = at(&format!("outputs.{name}"));
            arrays.insert(name, read_array(wire, dir, &location)?);
        }
    }
    for name in outputs {
        let path = dir.join(format!("{case_id}.{name}.npy"));
        if std::fs::symlink_metadata(&path).is_ok() {
            found = true;
            let tensor = read_npy(&path, &path.display())?;
            if let Some(from_json) = arrays.get(*name) {
                if !same_array(from_json, &tensor) {
                    return Err(Error::format(
                        path.display(),
                        format!(
                            "disagrees with output `{name}` of {} (both hold this output; keep one)",
                            json_path.display()
                        ),
                    ));
                }
            }
            arrays.insert(name.to_string(), tensor);
        }
    }
    Ok(found.then_some(arrays))
}

/// Whether two arrays hold the same dtype, shape and bits.
fn same_array(a: &Tensor, b: &Tensor) -> bool {
    a.dtype() == b.dtype()
        && a.shape() == b.shape()
        && a.view()
            .iter()
            .zip(b.view().iter())
            .all(|(x, y)| x.to_bits() == y.to_bits() || (x.is_nan() && y.is_nan()))
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
    let mut text = serde_json::to_string_pretty(&doc)
        .map_err(|e| Error::format(path.display(), format!("cannot serialise: {e}")))?;
    text.push('\n');
    write_atomic(&path, text.as_bytes())?;
    Ok(path)
}

/// What [`emit_into`] did.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Emitted {
    /// Files written (the index last).
    pub written: Vec<PathBuf>,
    /// Files an earlier emit had written (listed in its index) that this one did not
    /// write again, removed.
    pub removed: Vec<PathBuf>,
}

/// Writes every case of a suite into `dir` with an index; returns the files written.
/// See [`emit_into`] for which files it touches.
pub fn emit_suite(name: &str, cases: &[Case], dir: &Path, factor: f64) -> Result<Vec<PathBuf>> {
    emit_into(name, cases, dir, factor).map(|e| e.written)
}

/// A file name an index may list: plain, in the directory itself.
fn plain_name(name: &str) -> bool {
    !name.is_empty() && !name.starts_with('.') && !name.contains(['/', '\\', '\0'])
}

/// The cases of the index an earlier emit wrote in `dir`, each with its files; empty
/// when there is no index. An `index.json` that is not ours is an error: nothing in
/// that directory is ours to replace.
fn previous_index(dir: &Path) -> Result<Vec<(Value, Vec<String>)>> {
    let path = dir.join(INDEX_FILE);
    if std::fs::symlink_metadata(&path).is_err() {
        return Ok(Vec::new());
    }
    let not_ours = |why: String| {
        Error::format(
            path.display(),
            format!("{why}; it was not written by `posconform emit`, so nothing in this directory is replaced (remove it or choose another directory)"),
        )
    };
    let bytes = crate::files::read_regular(&path, 64 << 20, "a suite index")?;
    let doc: Value =
        serde_json::from_slice(&bytes).map_err(|e| not_ours(format!("unreadable ({e})")))?;
    if doc.get("format").and_then(Value::as_str) != Some("posconform.index") {
        return Err(not_ours("has no `\"format\": \"posconform.index\"`".into()));
    }
    let entries = doc
        .get("cases")
        .and_then(Value::as_array)
        .cloned()
        .unwrap_or_default();
    Ok(entries
        .into_iter()
        .map(|entry| {
            let files = entry
                .get("files")
                .and_then(Value::as_array)
                .map(|f| {
                    f.iter()
                        .filter_map(Value::as_str)
                        .filter(|n| plain_name(n))
                        .map(str::to_string)
                        .collect()
                })
                .unwrap_or_default();
            (entry, files)
        })
        .collect())
}

/// Writes every case of a suite into `dir` with an index (`index.json`, which lists
/// the files of each case and is the manifest of what emit owns there).
///
/// Emit writes a file only if it does not exist or the previous index lists it, and
/// removes only files the previous index lists that this run did not write again;
/// everything else in the directory is left alone, and a file in the way is an error
/// naming it. If the run fails part way, the index still lists every file emit wrote,
/// so the next run can replace them.
pub fn emit_into(name: &str, cases: &[Case], dir: &Path, factor: f64) -> Result<Emitted> {
    std::fs::create_dir_all(dir).map_err(|e| Error::io("create", dir, e))?;
    let previous = previous_index(dir)?;
    let owned: std::collections::BTreeSet<String> = previous
        .iter()
        .flat_map(|(_, f)| f.iter().cloned())
        .collect();
    let mut emitted = Emitted::default();
    let mut names = std::collections::BTreeSet::new();
    let mut entries = Vec::new();
    let mut outcome: Result<()> = Ok(());
    for case in cases {
        let vector = match VectorFile::build(case, factor) {
            Ok(v) => v,
            Err(e) => {
                outcome = Err(e);
                break;
            }
        };
        let planned = vector.file_names();
        if let Some(clash) = planned.iter().find(|n| {
            std::fs::symlink_metadata(dir.join(n)).is_ok()
                && !owned.contains(*n)
                && !names.contains(*n)
        }) {
            outcome = Err(Error::format(
                dir.join(clash).display(),
                format!("exists and is not listed in {} as written by an earlier emit; it is left alone and the suite was not written in full (remove it or choose another directory)", dir.join(INDEX_FILE).display()),
            ));
            break;
        }
        match vector.write(dir) {
            Ok(files) => {
                entries.push(json!({
                    "case": case.id,
                    "scheme": case.scheme.scheme().name(),
                    "operation": case.operation.name(),
                    "dtype": case.dtype,
                    "faults": case.faults,
                    "files": files.iter().filter_map(|p| p.file_name()).map(|n| n.to_string_lossy()).collect::<Vec<_>>(),
                }));
                names.extend(planned);
                emitted.written.extend(files);
            }
            Err(e) => {
                outcome = Err(e);
                // Whatever part of this case was written is ours too.
                names.extend(planned);
                break;
            }
        }
    }
    if outcome.is_ok() {
        for stale in owned.difference(&names) {
            let path = dir.join(stale);
            match std::fs::symlink_metadata(&path) {
                Ok(meta) if !meta.is_dir() => match std::fs::remove_file(&path) {
                    Ok(()) => emitted.removed.push(path),
                    Err(e) => {
                        outcome = Err(Error::io("remove", &path, e));
                        break;
                    }
                },
                _ => {}
            }
        }
    }
    // Earlier entries whose files are still here (a failed run, or a file that could
    // not be removed) stay listed, so they remain ours.
    for (entry, files) in &previous {
        if files
            .iter()
            .any(|f| !names.contains(f) && std::fs::symlink_metadata(dir.join(f)).is_ok())
        {
            entries.push(entry.clone());
        }
    }
    let index = json!({
        "format": "posconform.index",
        "version": VERSION,
        "suite": name,
        "generator": format!("posconform {}", env!("CARGO_PKG_VERSION")),
        "cases": entries,
    });
    let path = dir.join(INDEX_FILE);
    let mut text = serde_json::to_string_pretty(&index)
        .map_err(|e| Error::format(path.display(), format!("cannot serialise: {e}")))?;
    text.push('\n');
    write_atomic(&path, text.as_bytes())?;
    outcome?;
    emitted.written.push(path);
    Ok(emitted)
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
