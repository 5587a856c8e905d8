//! Arrays between the harness and a Python kernel, as numpy arrays in memory.
//!
//! Inputs: the harness holds every array as f64 values of a declared dtype
//! ([`Tensor`]). Each input is written once, straight into a buffer that numpy then
//! owns (the Rust allocation moves into the array; nothing passes through bytes or
//! text): float64, float32, float16 and int64 as themselves; bf16 as float32 holding the
//! exact bf16 values, as on the protocol path, since numpy has no bf16. The buffer
//! cannot be lent instead of written, because a kernel may keep a reference to an input
//! after it returns.
//!
//! Outputs: a C-contiguous, native-byte-order numpy array of float64, float32, float16
//! or int64 is read in place through its buffer. Any other integer or bool array is
//! converted by numpy to int64 first, a non-contiguous or byte-swapped array is made
//! contiguous first (both copies), and a `bfloat16` array (the `ml_dtypes` extension
//! type) is read through its raw bits. Everything else is refused with the output's
//! name.

use half::{bf16, f16};
use ndarray::{ArrayD, IxDyn};
use numpy::{
    PyArrayDescrMethods, PyArrayDyn, PyArrayMethods, PyUntypedArray, PyUntypedArrayMethods,
};
use posconform::math::Dtype;
use posconform::tensor::{element_count, Tensor};
use pyo3::prelude::*;

/// `tensor` as a new numpy array of the dtype a kernel computes in.
pub fn to_numpy<'py>(py: Python<'py>, tensor: &Tensor) -> Bound<'py, PyAny> {
    let values = tensor.view();
    match tensor.dtype() {
        Dtype::F64 => numpy::PyArray::from_owned_array(py, values.to_owned()).into_any(),
        Dtype::F32 | Dtype::Bf16 => {
            numpy::PyArray::from_owned_array(py, values.mapv(|x| x as f32)).into_any()
        }
        Dtype::F16 => numpy::PyArray::from_owned_array(py, values.mapv(f16::from_f64)).into_any(),
        Dtype::I64 => numpy::PyArray::from_owned_array(py, values.mapv(|x| x as i64)).into_any(),
    }
}

/// What one output array turned out to be.
enum Read {
    Tensor(Tensor),
    /// numpy must convert it first: to this dtype name, contiguous.
    Convert(&'static str),
}

/// Reads one output: `array` must be a numpy array (the Python side applies
/// `numpy.asarray` to whatever the kernel returned); `declared` is the dtype the kernel
/// tagged it with, if any (`(array, "bf16")`), and the values are rounded to it.
pub fn from_numpy(array: &Bound<'_, PyAny>, declared: Option<Dtype>) -> Result<Tensor, String> {
    let tensor = match read(array)? {
        Read::Tensor(t) => t,
        Read::Convert(dtype) => {
            let numpy = array.py().import("numpy").map_err(|e| e.to_string())?;
            let converted = numpy
                .call_method1("ascontiguousarray", (array, dtype))
                .map_err(|e| format!("numpy could not convert it to {dtype}: {e}"))?;
            match read(&converted)? {
                Read::Tensor(t) => t,
                Read::Convert(_) => {
                    return Err(format!(
                        "numpy could not convert it to a contiguous {dtype}"
                    ))
                }
            }
        }
    };
    Ok(match declared {
        Some(dtype) if dtype != tensor.dtype() => Tensor::from_f64(dtype, tensor.into_values()),
        _ => tensor,
    })
}

fn read(object: &Bound<'_, PyAny>) -> Result<Read, String> {
    let array = object.cast::<PyUntypedArray>().map_err(|_| {
        format!(
            "a {} is not an array (return numpy arrays, or anything numpy.asarray takes)",
            object
                .get_type()
                .name()
                .map(|n| n.to_string())
                .unwrap_or_default()
        )
    })?;
    let shape = array.shape().to_vec();
    element_count(&shape, &"the array").map_err(|e| e.to_string())?;
    let descr = array.dtype();
    let kind = descr.kind();
    let size = descr.itemsize();
    let name = descr
        .str()
        .map(|s| s.to_string())
        .unwrap_or_else(|_| "?".into());
    let typed = |wanted: &'static str| Read::Convert(wanted);
    let plain = array.is_c_contiguous() && descr.is_native_byteorder() != Some(false);
    match (kind, size) {
        (b'f', 8) if plain => read_as::<f64>(object, &shape, Dtype::F64, |x| x),
        (b'f', 4) if plain => read_as::<f32>(object, &shape, Dtype::F32, f64::from),
        (b'f', 2) if plain => read_as::<f16>(object, &shape, Dtype::F16, f16::to_f64),
        (b'f', 8) => Ok(typed("float64")),
        (b'f', 4) => Ok(typed("float32")),
        (b'f', 2) => Ok(typed("float16")),
        (b'i', 8) if plain => read_as::<i64>(object, &shape, Dtype::I64, |x| x as f64),
        (b'i' | b'u' | b'b', _) => Ok(typed("int64")),
        // ml_dtypes' bfloat16 is a numpy extension type of kind 'V' named "bfloat16".
        (_, 2) if is_bfloat16(array) => {
            let bits = object
                .call_method1("view", ("uint16",))
                .map_err(|e| format!("cannot read its bfloat16 bits: {e}"))?;
            let bits = if array.is_c_contiguous() {
                bits
            } else {
                let numpy = object.py().import("numpy").map_err(|e| e.to_string())?;
                numpy
                    .call_method1("ascontiguousarray", (bits,))
                    .map_err(|e| e.to_string())?
            };
            read_as::<u16>(&bits, &shape, Dtype::Bf16, |b| bf16::from_bits(b).to_f64())
        }
        _ => Err(format!(
            "numpy dtype {name} cannot be read: return float64, float32, float16 or integers \
             (or (array, \"bf16\") for bf16)"
        )),
    }
}

fn is_bfloat16(array: &Bound<'_, PyUntypedArray>) -> bool {
    array
        .dtype()
        .getattr("name")
        .and_then(|n| n.extract::<String>())
        .is_ok_and(|n| n == "bfloat16")
}

fn read_as<T: numpy::Element + Copy>(
    object: &Bound<'_, PyAny>,
    shape: &[usize],
    dtype: Dtype,
    to_f64: impl Fn(T) -> f64,
) -> Result<Read, String> {
    let typed = object
        .cast::<PyArrayDyn<T>>()
        .map_err(|e| format!("cannot view it as {dtype}: {e}"))?;
    let readonly = typed
        .try_readonly()
        .map_err(|e| format!("cannot borrow it: {e}"))?;
    let slice = readonly
        .as_slice()
        .map_err(|e| format!("cannot read it in place: {e}"))?;
    let values: Vec<f64> = slice.iter().map(|&x| to_f64(x)).collect();
    let values = ArrayD::from_shape_vec(IxDyn(shape), values).map_err(|e| e.to_string())?;
    Ok(Read::Tensor(Tensor::from_f64(dtype, values)))
}
