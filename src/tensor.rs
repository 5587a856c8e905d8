//! Typed arrays and their two encodings: the JSON array object of the vector format and
//! the kernel protocol, and NumPy `.npy` side files.
//!
//! JSON array object (vectors/README.md, docs/protocol.md):
//! `{"dtype": "f64"|"f32"|"f16"|"bf16"|"i64", "shape": [...], "data": "<base64>"}` where
//! the data are the little-endian, row-major bytes of the elements; or
//! `{"dtype": ..., "shape": [...], "values": [...]}` with plain JSON numbers (and the
//! strings `"inf"`, `"-inf"`, `"nan"`, which JSON numbers cannot express).
//!
//! `.npy`: format versions 1.0–3.0, C order, descr `<f8`, `<f4`, `<f2` or `<i8`
//! (NumPy has no standard bf16 descr; bf16 arrays use the JSON encoding).

use std::fmt;

use base64::Engine as _;
use half::{bf16, f16};
use ndarray::{ArrayD, ArrayViewD, IxDyn};
use serde_json::{json, Map, Value};

use crate::error::{Error, Result};
use crate::precision::Dtype;

/// An array of one dtype. Elements are held as f64, which represents every f32, f16
/// and bf16 value exactly, and every i64 up to 2^53 in magnitude.
#[derive(Debug, Clone, PartialEq)]
pub struct Tensor {
    dtype: Dtype,
    values: ArrayD<f64>,
}

impl Tensor {
    /// `values` rounded to `dtype`.
    pub fn from_f64(dtype: Dtype, values: ArrayD<f64>) -> Self {
        let values = if dtype == Dtype::F64 {
            values
        } else {
            values.mapv(|x| dtype.round(x))
        };
        Tensor { dtype, values }
    }

    /// The element type.
    pub fn dtype(&self) -> Dtype {
        self.dtype
    }

    /// The shape.
    pub fn shape(&self) -> &[usize] {
        self.values.shape()
    }

    /// The values, as f64.
    pub fn view(&self) -> ArrayViewD<'_, f64> {
        self.values.view()
    }

    /// The values, as f64, owned.
    pub fn into_values(self) -> ArrayD<f64> {
        self.values
    }

    /// The little-endian bytes of the elements in row-major order.
    pub fn to_le_bytes(&self) -> Vec<u8> {
        let mut bytes = Vec::with_capacity(self.values.len() * self.dtype.size());
        for &x in self.values.iter() {
            match self.dtype {
                Dtype::F64 => bytes.extend_from_slice(&x.to_le_bytes()),
                Dtype::F32 => bytes.extend_from_slice(&(x as f32).to_le_bytes()),
                Dtype::F16 => bytes.extend_from_slice(&f16::from_f64(x).to_le_bytes()),
                Dtype::Bf16 => bytes.extend_from_slice(&bf16::from_f64(x).to_le_bytes()),
                Dtype::I64 => bytes.extend_from_slice(&(x as i64).to_le_bytes()),
            }
        }
        bytes
    }

    /// Decodes little-endian row-major bytes; `location` names the file and field.
    pub fn from_le_bytes(
        dtype: Dtype,
        shape: &[usize],
        bytes: &[u8],
        location: &dyn fmt::Display,
    ) -> Result<Self> {
        let count = element_count(shape, location)?;
        let expected = count
            .checked_mul(dtype.size())
            .ok_or_else(|| Error::format(location, "shape is too large"))?;
        if bytes.len() != expected {
            return Err(Error::format(
                location,
                format!(
                    "shape {shape:?} of {dtype} needs {expected} bytes, found {}",
                    bytes.len()
                ),
            ));
        }
        let values: Vec<f64> = bytes
            .chunks_exact(dtype.size())
            .map(|c| match dtype {
                Dtype::F64 => f64::from_le_bytes(c.try_into().expect("8 bytes")),
                Dtype::F32 => f32::from_le_bytes(c.try_into().expect("4 bytes")) as f64,
                Dtype::F16 => f16::from_le_bytes(c.try_into().expect("2 bytes")).to_f64(),
                Dtype::Bf16 => bf16::from_le_bytes(c.try_into().expect("2 bytes")).to_f64(),
                Dtype::I64 => i64::from_le_bytes(c.try_into().expect("8 bytes")) as f64,
            })
            .collect();
        let values = ArrayD::from_shape_vec(IxDyn(shape), values).expect("length checked");
        Ok(Tensor { dtype, values })
    }

    /// The JSON array object with base64 data.
    pub fn to_json(&self) -> Value {
        json!({
            "dtype": self.dtype,
            "shape": self.shape(),
            "data": base64::engine::general_purpose::STANDARD.encode(self.to_le_bytes()),
        })
    }

    /// Parses a JSON array object (base64 `data` or plain `values`).
    pub fn from_json(value: &Value, location: &dyn fmt::Display) -> Result<Self> {
        let object = value.as_object().ok_or_else(|| {
            Error::format(location, "expected an array object {dtype, shape, data}")
        })?;
        let dtype = field(object, "dtype", location)?
            .as_str()
            .ok_or_else(|| Error::format(location, "`dtype` must be a string"))?
            .parse::<Dtype>()
            .map_err(|e| Error::format(location, e.to_string()))?;
        let shape: Vec<usize> = field(object, "shape", location)?
            .as_array()
            .ok_or_else(|| Error::format(location, "`shape` must be an array of integers"))?
            .iter()
            .map(|d| d.as_u64().map(|d| d as usize))
            .collect::<Option<_>>()
            .ok_or_else(|| Error::format(location, "`shape` must hold non-negative integers"))?;
        if let Some(unknown) = object
            .keys()
            .find(|k| !["dtype", "shape", "data", "values"].contains(&k.as_str()))
        {
            return Err(Error::format(
                location,
                format!("unknown field `{unknown}`"),
            ));
        }
        match (object.get("data"), object.get("values")) {
            (Some(data), None) => {
                let text = data
                    .as_str()
                    .ok_or_else(|| Error::format(location, "`data` must be a base64 string"))?;
                let bytes = base64::engine::general_purpose::STANDARD
                    .decode(text)
                    .map_err(|e| Error::format(location, format!("`data` is not base64: {e}")))?;
                Self::from_le_bytes(dtype, &shape, &bytes, location)
            }
            (None, Some(values)) => Self::from_values(dtype, &shape, values, location),
            (Some(_), Some(_)) => Err(Error::format(location, "give `data` or `values`, not both")),
            (None, None) => Err(Error::format(location, "missing `data` (or `values`)")),
        }
    }

    fn from_values(
        dtype: Dtype,
        shape: &[usize],
        values: &Value,
        location: &dyn fmt::Display,
    ) -> Result<Self> {
        let list = values
            .as_array()
            .ok_or_else(|| Error::format(location, "`values` must be a flat array"))?;
        let count = element_count(shape, location)?;
        if list.len() != count {
            return Err(Error::format(
                location,
                format!("shape {shape:?} needs {count} values, found {}", list.len()),
            ));
        }
        let parsed = list
            .iter()
            .enumerate()
            .map(|(i, v)| match v {
                Value::Number(n) => n.as_f64().ok_or(i),
                Value::String(s) => match s.as_str() {
                    "inf" | "+inf" => Ok(f64::INFINITY),
                    "-inf" => Ok(f64::NEG_INFINITY),
                    "nan" => Ok(f64::NAN),
                    _ => Err(i),
                },
                _ => Err(i),
            })
            .collect::<std::result::Result<Vec<f64>, usize>>()
            .map_err(|i| {
                Error::format(
                    location,
                    format!("`values[{i}]` is not a number (or \"inf\", \"-inf\", \"nan\")"),
                )
            })?;
        let array = ArrayD::from_shape_vec(IxDyn(shape), parsed).expect("length checked");
        Ok(Tensor::from_f64(dtype, array))
    }

    /// The `.npy` (format 1.0) bytes of this tensor. Errors for bf16, which has no
    /// standard NumPy descr.
    pub fn to_npy(&self) -> Result<Vec<u8>> {
        let descr = npy_descr(self.dtype)
            .ok_or_else(|| Error::param("dtype", "f64, f32, f16 or i64 for .npy", self.dtype))?;
        let shape = match self.shape() {
            [n] => format!("({n},)"),
            dims => format!(
                "({})",
                dims.iter()
                    .map(|d| d.to_string())
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
        };
        let mut header =
            format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {shape}, }}");
        // Magic (6) + version (2) + length (2) + header + '\n' is a multiple of 64.
        let unpadded = 10 + header.len() + 1;
        header.push_str(&" ".repeat((64 - unpadded % 64) % 64));
        header.push('\n');
        let mut out = b"\x93NUMPY\x01\x00".to_vec();
        out.extend_from_slice(&(header.len() as u16).to_le_bytes());
        out.extend_from_slice(header.as_bytes());
        out.extend_from_slice(&self.to_le_bytes());
        Ok(out)
    }

    /// Parses `.npy` bytes; `location` names the file.
    pub fn from_npy(bytes: &[u8], location: &dyn fmt::Display) -> Result<Self> {
        if bytes.len() < 10 || &bytes[..6] != b"\x93NUMPY" {
            return Err(Error::format(location, "not a .npy file (bad magic)"));
        }
        let (header_len, start) = match bytes[6] {
            1 => (u16::from_le_bytes([bytes[8], bytes[9]]) as usize, 10),
            2 | 3 if bytes.len() >= 12 => (
                u32::from_le_bytes([bytes[8], bytes[9], bytes[10], bytes[11]]) as usize,
                12,
            ),
            v => {
                return Err(Error::format(
                    location,
                    format!("unsupported .npy version {v}"),
                ))
            }
        };
        let header = bytes
            .get(start..start + header_len)
            .ok_or_else(|| Error::format(location, "truncated .npy header"))?;
        let header = std::str::from_utf8(header)
            .map_err(|_| Error::format(location, ".npy header is not text"))?;
        let descr = header_value(header, "descr")
            .ok_or_else(|| Error::format(location, ".npy header has no 'descr'"))?;
        let descr = descr.trim_matches(|c| c == '\'' || c == '"');
        let dtype = Dtype::ALL
            .iter()
            .copied()
            .find(|d| npy_descr(*d) == Some(descr))
            .ok_or_else(|| {
                Error::format(
                    location,
                    format!("unsupported .npy dtype '{descr}' (use <f8, <f4, <f2 or <i8)"),
                )
            })?;
        if header_value(header, "fortran_order").map(str::trim) != Some("False") {
            return Err(Error::format(
                location,
                "Fortran-order .npy is not supported: save with np.ascontiguousarray",
            ));
        }
        let shape_text = header_value(header, "shape")
            .ok_or_else(|| Error::format(location, ".npy header has no 'shape'"))?;
        let shape = shape_text
            .trim()
            .trim_start_matches('(')
            .trim_end_matches(')')
            .split(',')
            .map(str::trim)
            .filter(|s| !s.is_empty())
            .map(|s| s.parse::<usize>())
            .collect::<std::result::Result<Vec<_>, _>>()
            .map_err(|_| Error::format(location, format!("bad .npy shape {shape_text}")))?;
        let data = &bytes[start + header_len..];
        Self::from_le_bytes(dtype, &shape, data, location).map_err(|e| match e {
            Error::Format { location, reason } => Error::Format {
                location,
                reason: format!("truncated or oversized .npy data: {reason}"),
            },
            other => other,
        })
    }
}

fn field<'a>(
    object: &'a Map<String, Value>,
    name: &str,
    location: &dyn fmt::Display,
) -> Result<&'a Value> {
    object
        .get(name)
        .ok_or_else(|| Error::format(location, format!("missing `{name}`")))
}

fn element_count(shape: &[usize], location: &dyn fmt::Display) -> Result<usize> {
    shape
        .iter()
        .try_fold(1usize, |acc, &d| acc.checked_mul(d))
        .filter(|&n| n <= 1 << 32)
        .ok_or_else(|| Error::format(location, format!("shape {shape:?} is too large")))
}

fn npy_descr(dtype: Dtype) -> Option<&'static str> {
    match dtype {
        Dtype::F64 => Some("<f8"),
        Dtype::F32 => Some("<f4"),
        Dtype::F16 => Some("<f2"),
        Dtype::I64 => Some("<i8"),
        Dtype::Bf16 => None,
    }
}

/// The text after `'key':` in a Python dict literal, up to the next top-level comma.
fn header_value<'a>(header: &'a str, key: &str) -> Option<&'a str> {
    let quoted = [format!("'{key}'"), format!("\"{key}\"")];
    let at = quoted
        .iter()
        .find_map(|q| header.find(q.as_str()).map(|i| i + q.len()))?;
    let rest = header[at..].trim_start().strip_prefix(':')?.trim_start();
    let mut depth = 0;
    for (i, c) in rest.char_indices() {
        match c {
            '(' => depth += 1,
            ')' => depth -= 1,
            ',' | '}' if depth == 0 => return Some(&rest[..i]),
            _ => {}
        }
    }
    None
}
