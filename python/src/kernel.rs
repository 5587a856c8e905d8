//! [`PythonKernel`]: the library's `Kernel` trait over a Python object, so `check` calls
//! a Python function directly: no process, no protocol, no serialisation of arrays.
//!
//! The object is a `posconform.Kernel` (python/posconform/_kernel.py) or anything with
//! the same two methods:
//!
//! - `_posconform_handshake()` returns the handshake as a dict, exactly the `result` of
//!   the protocol's `handshake` (docs/protocol.md): it is read by the protocol's own
//!   parser, so capabilities mean the same on both paths.
//! - `_posconform_run(case, dtype, inputs)` gets the case object as a dict, the dtype
//!   name and the inputs as numpy arrays, and returns `("outputs", {name: (array,
//!   dtype name or None)})`, `("unsupported", reason)` or, when the handler raised,
//!   `("error", (summary line, traceback))`.
//!
//! Nothing the Python side does can stop the run but a `KeyboardInterrupt` or
//! `SystemExit`: any other exception becomes that case's error with its traceback, and
//! an output that cannot be read becomes that case's error naming the output.

use std::str::FromStr as _;
use std::time::Instant;

use posconform::case::{Arrays, Case};
use posconform::kernel::{Answer, Kernel, KernelInfo};
use posconform::math::Dtype;
use posconform::{Error, KernelErrorKind};
use pyo3::exceptions::{PyKeyboardInterrupt, PySystemExit};
use pyo3::prelude::*;
use pyo3::types::{PyDict, PyString, PyTuple};

use crate::{arrays, values};

/// The longest traceback kept in a case's error (its end is kept: that is where the
/// exception was raised).
const MAX_TRACEBACK: usize = 12_000;

/// A Python object driven as a kernel.
pub struct PythonKernel {
    target: Py<PyAny>,
    name: String,
    /// The `KeyboardInterrupt` or `SystemExit` that stopped the run, raised again once
    /// `check` has returned.
    pub interruption: Option<PyErr>,
}

impl PythonKernel {
    /// Drives `target`.
    pub fn new(target: Py<PyAny>) -> Self {
        PythonKernel {
            target,
            name: "python".into(),
            interruption: None,
        }
    }

    fn failed(&self, kind: KernelErrorKind, reason: impl Into<String>) -> Error {
        Error::kernel(kind, self.name.clone(), reason)
    }

    fn run_attached(
        &mut self,
        py: Python<'_>,
        case: &Case,
        dtype: Dtype,
        inputs: &Arrays,
    ) -> posconform::Result<Answer> {
        let case_value = serde_json::to_value(case).map_err(|e| {
            self.failed(
                KernelErrorKind::Failed,
                format!("cannot pass case {}: {e}", case.id),
            )
        })?;
        let python_error =
            |e: PyErr| self.failed(KernelErrorKind::Failed, format!("case {}: {e}", case.id));
        let case_object = values::to_python(py, &case_value).map_err(python_error)?;
        let input_dict = PyDict::new(py);
        for (name, tensor) in inputs {
            input_dict
                .set_item(name, arrays::to_numpy(py, tensor))
                .map_err(python_error)?;
        }
        let started = Instant::now();
        let reply = self
            .target
            .bind(py)
            .call_method1("_posconform_run", (case_object, dtype.name(), input_dict));
        let elapsed_ms = started.elapsed().as_secs_f64() * 1e3;
        let reply = match reply {
            Ok(reply) => reply,
            Err(e) => {
                if e.is_instance_of::<PyKeyboardInterrupt>(py)
                    || e.is_instance_of::<PySystemExit>(py)
                {
                    let what = exception_name(py, &e);
                    self.interruption = Some(e);
                    return Err(self.failed(
                        KernelErrorKind::Failed,
                        format!("{what} during case {}; the run stops", case.id),
                    ));
                }
                return Err(self.failed(
                    KernelErrorKind::Failed,
                    format!(
                        "case {} raised {}: {}\n{}",
                        case.id,
                        exception_name(py, &e),
                        e.value(py),
                        traceback(py, &e)
                    ),
                ));
            }
        };
        self.answer(case, &reply, elapsed_ms)
    }

    fn answer(
        &self,
        case: &Case,
        reply: &Bound<'_, PyAny>,
        elapsed_ms: f64,
    ) -> posconform::Result<Answer> {
        let malformed = |reason: String| {
            self.failed(
                KernelErrorKind::MalformedResult,
                format!("case {}: {reason}", case.id),
            )
        };
        let pair = reply
            .cast::<PyTuple>()
            .ok()
            .filter(|t| t.len() == 2)
            .ok_or_else(|| {
                malformed("_posconform_run must return a pair (kind, payload)".into())
            })?;
        let kind: String = pair
            .get_item(0)
            .and_then(|k| k.extract())
            .map_err(|e| malformed(format!("reply kind: {e}")))?;
        let payload = pair
            .get_item(1)
            .map_err(|e| malformed(format!("reply payload: {e}")))?;
        match kind.as_str() {
            "unsupported" => Ok(Answer::Unsupported(
                payload
                    .str()
                    .map(|s| s.to_string())
                    .unwrap_or_else(|_| "unsupported".into()),
            )),
            "error" => {
                let (summary, traceback): (String, String) = payload
                    .extract()
                    .map_err(|e| malformed(format!("error payload: {e}")))?;
                Err(self.failed(
                    KernelErrorKind::Failed,
                    format!(
                        "case {} raised {summary}\n{}",
                        case.id,
                        shortened(&traceback)
                    ),
                ))
            }
            "outputs" => {
                let dict = payload
                    .cast::<PyDict>()
                    .map_err(|_| malformed("outputs must be a dict".into()))?;
                let mut outputs = Arrays::new();
                for (name, item) in dict.iter() {
                    let name: String = name
                        .cast::<PyString>()
                        .map_err(|_| malformed(format!("output name {name} is not a string")))?
                        .to_string();
                    let bad = |reason: String| malformed(format!("output `{name}`: {reason}"));
                    let (array, declared) = match item.cast::<PyTuple>() {
                        Ok(t) if t.len() == 2 => (
                            t.get_item(0).map_err(|e| bad(e.to_string()))?,
                            t.get_item(1).map_err(|e| bad(e.to_string()))?,
                        ),
                        _ => (item.clone(), item.py().None().into_bound(item.py())),
                    };
                    let declared = if declared.is_none() {
                        None
                    } else {
                        let text: String = declared
                            .extract()
                            .map_err(|_| bad("its dtype must be a string".into()))?;
                        Some(Dtype::from_str(&text).map_err(|_| {
                            bad(format!(
                                "dtype {text:?} is not one of f64, f32, f16, bf16, i64"
                            ))
                        })?)
                    };
                    let tensor = arrays::from_numpy(&array, declared).map_err(bad)?;
                    outputs.insert(name, tensor);
                }
                Ok(Answer::Outputs {
                    outputs,
                    elapsed_ms: Some(elapsed_ms),
                })
            }
            other => Err(malformed(format!(
                "reply kind {other:?} is neither \"outputs\" nor \"unsupported\""
            ))),
        }
    }
}

impl Kernel for PythonKernel {
    fn describe(&mut self) -> posconform::Result<KernelInfo> {
        Python::attach(|py| {
            let handshake = |reason: String| {
                Error::kernel(KernelErrorKind::Handshake, self.name.clone(), reason)
            };
            let reply = self
                .target
                .bind(py)
                .call_method0("_posconform_handshake")
                .map_err(|e| {
                    handshake(format!(
                        "the kernel's handshake raised:\n{}",
                        traceback(py, &e)
                    ))
                })?;
            let value = values::from_python(&reply, "handshake")
                .map_err(|e| handshake(e.value(py).to_string()))?;
            if let Some(name) = value.get("name").and_then(|n| n.as_str()) {
                self.name = name.to_string();
            }
            posconform::kernel::protocol::parse_handshake(&value, &self.name)
        })
    }

    fn run(&mut self, case: &Case, dtype: Dtype, inputs: &Arrays) -> posconform::Result<Answer> {
        if self.interruption.is_some() {
            return Err(self.failed(KernelErrorKind::Failed, "not run: the run was interrupted"));
        }
        Python::attach(|py| self.run_attached(py, case, dtype, inputs))
    }
}

fn exception_name(py: Python<'_>, e: &PyErr) -> String {
    e.get_type(py)
        .name()
        .map(|n| n.to_string())
        .unwrap_or_else(|_| "an exception".into())
}

/// The exception with its traceback, as Python prints it (the end of it when long).
pub fn traceback(py: Python<'_>, e: &PyErr) -> String {
    let formatted = py.import("traceback").and_then(|tb| {
        let lines = tb.call_method1(
            "format_exception",
            (e.get_type(py), e.value(py), e.traceback(py)),
        )?;
        let text: Vec<String> = lines.extract()?;
        Ok(text.concat())
    });
    let text = formatted.unwrap_or_else(|_| format!("{}: {}", exception_name(py, e), e.value(py)));
    shortened(text.trim_end())
}

/// `text` when short enough, else its end (where an exception was raised).
fn shortened(text: &str) -> String {
    if text.len() <= MAX_TRACEBACK {
        return text.to_string();
    }
    let mut start = text.len() - MAX_TRACEBACK;
    while !text.is_char_boundary(start) {
        start += 1;
    }
    format!("(traceback shortened)\n...{}", &text[start..])
}
