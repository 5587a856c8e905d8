//! Plain data between Python and Rust, in memory: a `serde_json::Value` as the Python
//! object a JSON parser would give (dict, list, str, int, float, bool, None), and back.
//!
//! Used for the case object handed to a kernel, the handshake a kernel declares, and
//! the structured parts of a report. No text is formatted or parsed on the way.

use pyo3::exceptions::PyValueError;
use pyo3::prelude::*;
use pyo3::types::{PyBool, PyDict, PyFloat, PyInt, PyList, PyString, PyTuple};
use serde_json::{Map, Number, Value};

/// Nesting deeper than this is refused (a self-referencing list would never end).
const MAX_DEPTH: usize = 64;

/// `value` as a Python object.
pub fn to_python<'py>(py: Python<'py>, value: &Value) -> PyResult<Bound<'py, PyAny>> {
    Ok(match value {
        Value::Null => py.None().into_bound(py),
        Value::Bool(b) => PyBool::new(py, *b).to_owned().into_any(),
        Value::Number(n) => {
            if let Some(i) = n.as_i64() {
                i.into_pyobject(py)?.into_any()
            } else if let Some(u) = n.as_u64() {
                u.into_pyobject(py)?.into_any()
            } else {
                PyFloat::new(py, n.as_f64().unwrap_or(f64::NAN)).into_any()
            }
        }
        Value::String(s) => PyString::new(py, s).into_any(),
        Value::Array(items) => {
            let list = PyList::empty(py);
            for item in items {
                list.append(to_python(py, item)?)?;
            }
            list.into_any()
        }
        Value::Object(members) => {
            let dict = PyDict::new(py);
            for (key, item) in members {
                dict.set_item(key, to_python(py, item)?)?;
            }
            dict.into_any()
        }
    })
}

/// A Python object made of dicts (string keys), lists, tuples, strings, ints, finite
/// floats, bools and None, as a `Value`; `at` names the object in errors.
pub fn from_python(object: &Bound<'_, PyAny>, at: &str) -> PyResult<Value> {
    convert(object, at, 0)
}

fn convert(object: &Bound<'_, PyAny>, at: &str, depth: usize) -> PyResult<Value> {
    if depth > MAX_DEPTH {
        return Err(PyValueError::new_err(format!(
            "{at}: nested more than {MAX_DEPTH} levels deep"
        )));
    }
    if object.is_none() {
        return Ok(Value::Null);
    }
    // bool before int: Python's True is an int too.
    if let Ok(b) = object.cast::<PyBool>() {
        return Ok(Value::Bool(b.is_true()));
    }
    if object.is_instance_of::<PyInt>() {
        if let Ok(i) = object.extract::<i64>() {
            return Ok(Value::Number(i.into()));
        }
        if let Ok(u) = object.extract::<u64>() {
            return Ok(Value::Number(u.into()));
        }
        return Err(PyValueError::new_err(format!(
            "{at}: the integer {} does not fit in 64 bits",
            object.str()?
        )));
    }
    if let Ok(f) = object.cast::<PyFloat>() {
        let x = f.value();
        return Number::from_f64(x)
            .map(Value::Number)
            .ok_or_else(|| PyValueError::new_err(format!("{at}: {x} is not a finite number")));
    }
    if let Ok(s) = object.cast::<PyString>() {
        return Ok(Value::String(s.to_str()?.to_string()));
    }
    if let Ok(dict) = object.cast::<PyDict>() {
        let mut members = Map::new();
        for (key, item) in dict.iter() {
            let Ok(key) = key.cast::<PyString>() else {
                return Err(PyValueError::new_err(format!(
                    "{at}: the key {} is not a string",
                    key.repr()?
                )));
            };
            let key = key.to_str()?.to_string();
            let value = convert(&item, &format!("{at}.{key}"), depth + 1)?;
            members.insert(key, value);
        }
        return Ok(Value::Object(members));
    }
    if object.is_instance_of::<PyList>() || object.is_instance_of::<PyTuple>() {
        let mut items = Vec::new();
        for (n, item) in object.try_iter()?.enumerate() {
            items.push(convert(&item?, &format!("{at}[{n}]"), depth + 1)?);
        }
        return Ok(Value::Array(items));
    }
    // numpy scalars and other number-likes: integers (they have `__index__`) stay
    // integers, anything else that converts to a float is one.
    if let Ok(i) = object.extract::<i64>() {
        return Ok(Value::Number(i.into()));
    }
    if let Ok(x) = object.extract::<f64>() {
        return Number::from_f64(x)
            .map(Value::Number)
            .ok_or_else(|| PyValueError::new_err(format!("{at}: {x} is not a finite number")));
    }
    Err(PyValueError::new_err(format!(
        "{at}: a {} cannot be declared (use dicts, lists, strings, numbers, bools and None)",
        object.get_type().name()?
    )))
}
