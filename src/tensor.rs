//! Typed arrays and their two encodings: the JSON array object of the vector format and
//! the kernel protocol, and NumPy `.npy` side files.
//!
//! JSON array object (vectors/README.md, docs/protocol.md):
//! `{"dtype": "f64"|"f32"|"f16"|"bf16"|"i64", "shape": [...], "data": "<base64>"}` where
//! the data are the little-endian, row-major bytes of the elements; or
//! `{"dtype": ..., "shape": [...], "values": [...]}` with plain JSON numbers (and the
//! strings `"inf"`, `"-inf"`, `"nan"`, which JSON numbers cannot express).
//!
//! Under the protocol's binary framing (docs/protocol.md, "Binary arrays") the object is
//! `{"dtype": ..., "shape": [...], "block": i}`: the same bytes, sent raw as block `i`
//! after the message line instead of as base64 text.
//!
//! `.npy`: format versions 1.0–3.0, C order, descr `<f8`, `<f4`, `<f2` or `<i8`
//! (NumPy has no standard bf16 descr; bf16 arrays use the JSON encoding).

use std::fmt;

use base64::Engine as _;
use half::{bf16, f16};
use ndarray::{ArrayD, CowArray, IxDyn};
use serde::de::{self, Deserialize, Deserializer, IgnoredAny, MapAccess, SeqAccess, Visitor};
use serde_json::{json, Value};

use crate::error::{Error, Result};
use crate::math::precision::Dtype;

/// An array of one dtype. Arrays built from values are held as f64, which represents
/// every f32, f16 and bf16 value exactly, and every i64 up to 2^53 in magnitude; an
/// f32, f16 or bf16 array decoded from bytes (a kernel's reply, a file) keeps its bytes
/// as they arrived and converts on reading, so a large answer is held once, in its own
/// width ([`Tensor::view`] converts the whole array, [`Tensor::read_values`] a range).
#[derive(Debug, Clone)]
pub struct Tensor {
    dtype: Dtype,
    store: Store,
}

#[derive(Debug, Clone)]
enum Store {
    Wide(ArrayD<f64>),
    /// The little-endian row-major bytes of an f32, f16 or bf16 array.
    Narrow {
        shape: Vec<usize>,
        bytes: Vec<u8>,
    },
}

impl PartialEq for Tensor {
    /// Same dtype, shape and values (compared as f64, whatever the storage).
    fn eq(&self, other: &Self) -> bool {
        if self.dtype != other.dtype || self.shape() != other.shape() {
            return false;
        }
        match (&self.store, &other.store) {
            (Store::Wide(a), Store::Wide(b)) => a == b,
            _ => {
                let (mut a, mut b) = (Vec::new(), Vec::new());
                self.for_each_value(|x| a.push(x));
                other.for_each_value(|x| b.push(x));
                a == b
            }
        }
    }
}

impl Tensor {
    /// `values` rounded to `dtype`.
    pub fn from_f64(dtype: Dtype, mut values: ArrayD<f64>) -> Self {
        if dtype != Dtype::F64 {
            // In place: a large output is not held twice.
            values.mapv_inplace(|x| dtype.round(x));
        }
        Tensor {
            dtype,
            store: Store::Wide(values),
        }
    }

    /// The element type.
    pub fn dtype(&self) -> Dtype {
        self.dtype
    }

    /// The shape.
    pub fn shape(&self) -> &[usize] {
        match &self.store {
            Store::Wide(values) => values.shape(),
            Store::Narrow { shape, .. } => shape,
        }
    }

    /// The number of elements.
    pub fn len(&self) -> usize {
        match &self.store {
            Store::Wide(values) => values.len(),
            Store::Narrow { bytes, .. } => bytes.len() / self.dtype.size(),
        }
    }

    /// Whether the array has no elements.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The values, as f64: borrowed when held as f64, converted (a new f64 array) when
    /// held in a narrower dtype's bytes.
    pub fn view(&self) -> CowArray<'_, f64, IxDyn> {
        match &self.store {
            Store::Wide(values) => CowArray::from(values.view()),
            Store::Narrow { .. } => CowArray::from(self.clone().into_values()),
        }
    }

    /// The values, as f64, owned.
    pub fn into_values(self) -> ArrayD<f64> {
        match self.store {
            Store::Wide(values) => values,
            Store::Narrow { shape, bytes } => {
                let values = convert_narrow(self.dtype, &bytes);
                drop(bytes);
                // The element count matched the shape when the bytes were accepted.
                ArrayD::from_shape_vec(IxDyn(&shape), values)
                    .unwrap_or_else(|_| ArrayD::zeros(IxDyn(&shape)))
            }
        }
    }

    /// Elements `start..start + out.len()` in row-major order, as f64, into `out`.
    /// Errors when the range is outside the array.
    pub fn read_values(&self, start: usize, out: &mut [f64]) -> Result<()> {
        let end = start
            .checked_add(out.len())
            .filter(|&end| end <= self.len())
            .ok_or_else(|| {
                Error::param(
                    "range",
                    format!("within the {} elements of the array", self.len()),
                    format!("{start}..{}", start.saturating_add(out.len())),
                )
            })?;
        match &self.store {
            Store::Wide(values) => match values.as_slice() {
                Some(all) => out.copy_from_slice(&all[start..end]),
                None => {
                    for (o, x) in out.iter_mut().zip(values.iter().skip(start)) {
                        *o = *x;
                    }
                }
            },
            Store::Narrow { bytes, .. } => {
                let size = self.dtype.size();
                let part = &bytes[start * size..end * size];
                match self.dtype {
                    Dtype::F32 => convert_into(part, out, |c| f32::from_le_bytes(c) as f64),
                    Dtype::F16 => convert_into(part, out, |c| f16::from_le_bytes(c).to_f64()),
                    _ => convert_into(part, out, |c| bf16::from_le_bytes(c).to_f64()),
                }
            }
        }
        Ok(())
    }

    /// Calls `f` on every element in row-major order, as f64.
    pub fn for_each_value(&self, mut f: impl FnMut(f64)) {
        match &self.store {
            Store::Wide(values) => values.iter().for_each(|&x| f(x)),
            Store::Narrow { bytes, .. } => match self.dtype {
                Dtype::F32 => each(bytes, |c| f(f32::from_le_bytes(c) as f64)),
                Dtype::F16 => each(bytes, |c| f(f16::from_le_bytes(c).to_f64())),
                _ => each(bytes, |c| f(bf16::from_le_bytes(c).to_f64())),
            },
        }
    }

    /// The little-endian bytes of the elements in row-major order.
    pub fn to_le_bytes(&self) -> Vec<u8> {
        let values = match &self.store {
            Store::Narrow { bytes, .. } => return bytes.clone(),
            Store::Wide(values) => values,
        };
        let mut bytes = Vec::with_capacity(values.len() * self.dtype.size());
        let values = values.iter().copied();
        // One loop per dtype, so each compiles to a plain conversion loop.
        match self.dtype {
            Dtype::F64 => values.for_each(|x| bytes.extend_from_slice(&x.to_le_bytes())),
            Dtype::F32 => values.for_each(|x| bytes.extend_from_slice(&(x as f32).to_le_bytes())),
            Dtype::F16 => {
                values.for_each(|x| bytes.extend_from_slice(&f16::from_f64(x).to_le_bytes()))
            }
            Dtype::Bf16 => {
                values.for_each(|x| bytes.extend_from_slice(&bf16::from_f64(x).to_le_bytes()))
            }
            Dtype::I64 => values.for_each(|x| bytes.extend_from_slice(&(x as i64).to_le_bytes())),
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
        Self::from_le_vec(dtype, shape, bytes.to_vec(), location)
    }

    /// [`from_le_bytes`](Self::from_le_bytes) taking the bytes: an f32, f16 or bf16
    /// array keeps them as its storage (nothing is converted or copied).
    pub fn from_le_vec(
        dtype: Dtype,
        shape: &[usize],
        bytes: Vec<u8>,
        location: &dyn fmt::Display,
    ) -> Result<Self> {
        let expected = byte_count(dtype, shape, location)?;
        if bytes.len() != expected {
            return Err(Error::format(
                location,
                format!(
                    "shape {shape:?} of {dtype} needs {expected} bytes, found {}",
                    bytes.len()
                ),
            ));
        }
        // One loop per dtype, so each compiles to a plain conversion loop.
        let values: Vec<f64> = match dtype {
            Dtype::F64 => decode(&bytes, f64::from_le_bytes),
            Dtype::I64 => decode(&bytes, |c| i64::from_le_bytes(c) as f64),
            Dtype::F32 | Dtype::F16 | Dtype::Bf16 => {
                return Ok(Tensor {
                    dtype,
                    store: Store::Narrow {
                        shape: shape.to_vec(),
                        bytes,
                    },
                })
            }
        };
        drop(bytes);
        Ok(Tensor {
            dtype,
            store: Store::Wide(shaped(shape, values, location)?),
        })
    }

    /// The array object of the binary framing (`"block": index`) and the block's bytes.
    pub fn to_block(&self, index: usize) -> (Value, Vec<u8>) {
        let object = json!({"dtype": self.dtype, "shape": self.shape(), "block": index});
        (object, self.to_le_bytes())
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
        let wire = WireArray::deserialize(value)
            .map_err(|e| Error::format(location, format!("not an array object: {e}")))?;
        wire.into_tensor(location)
    }

    fn from_values(
        dtype: Dtype,
        shape: &[usize],
        values: Vec<f64>,
        location: &dyn fmt::Display,
    ) -> Result<Self> {
        let count = element_count(shape, location)?;
        if values.len() != count {
            return Err(Error::format(
                location,
                format!(
                    "shape {shape:?} needs {count} values, found {}",
                    values.len()
                ),
            ));
        }
        Ok(Tensor::from_f64(dtype, shaped(shape, values, location)?))
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
        let header = NpyHeader::parse(bytes, location)?;
        let data = bytes.get(header.data_offset..).unwrap_or(&[]);
        header.decode(data, location)
    }
}

/// The header of a `.npy` file: enough to know, before reading the data, how many
/// bytes the data must have.
#[derive(Debug, Clone, PartialEq)]
pub struct NpyHeader {
    /// Element type.
    pub dtype: Dtype,
    /// Shape (C order).
    pub shape: Vec<usize>,
    /// Where the data begin.
    pub data_offset: usize,
    /// How many data bytes the shape and dtype call for (checked arithmetic).
    pub data_len: usize,
}

impl NpyHeader {
    /// Parses the header at the start of `bytes` (which may hold more than the
    /// header); errors when `bytes` ends before the header does.
    pub fn parse(bytes: &[u8], location: &dyn fmt::Display) -> Result<Self> {
        if bytes.len() < 10 || &bytes[..6] != b"\x93NUMPY" {
            return Err(Error::format(location, "not a .npy file (bad magic)"));
        }
        let (header_len, start) = match bytes[6] {
            1 => (u16::from_le_bytes([bytes[8], bytes[9]]) as usize, 10usize),
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
        let header = start
            .checked_add(header_len)
            .and_then(|end| bytes.get(start..end))
            .ok_or_else(|| Error::format(location, "truncated .npy header"))?;
        let header = std::str::from_utf8(header)
            .map_err(|_| Error::format(location, ".npy header is not text"))?;
        let descr = header_value(header, "descr")
            .ok_or_else(|| Error::format(location, ".npy header has no 'descr'"))?;
        let descr = descr.trim().trim_matches(|c| c == '\'' || c == '"');
        let dtype = Dtype::ALL
            .iter()
            .copied()
            .find(|d| npy_descr(*d) == Some(descr))
            .ok_or_else(|| {
                Error::format(
                    location,
                    format!(
                        "unsupported .npy dtype '{}' (use <f8, <f4, <f2 or <i8)",
                        descr.escape_debug()
                    ),
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
            .map_err(|_| {
                Error::format(
                    location,
                    format!("bad .npy shape {}", shape_text.escape_debug()),
                )
            })?;
        let data_len = byte_count(dtype, &shape, location)?;
        Ok(NpyHeader {
            dtype,
            shape,
            data_offset: start + header_len,
            data_len,
        })
    }

    /// Decodes the data that follow the header.
    pub fn decode(&self, data: &[u8], location: &dyn fmt::Display) -> Result<Tensor> {
        Tensor::from_le_bytes(self.dtype, &self.shape, data, location).map_err(|e| match e {
            Error::Format { location, reason } => Error::Format {
                location,
                reason: format!("truncated or oversized .npy data: {reason}"),
            },
            other => other,
        })
    }
}

/// The largest number of elements one array may have, whatever its origin (a case, a
/// kernel's reply, a result or vector file): as many f64 values as the machine's
/// available memory holds ([`available_memory`]), so an array that could not be held
/// even once is refused before anything is allocated. Every shape is checked against
/// it; this function is the one place the limit is decided. Whether a whole case fits
/// is [`crate::case::Case::validate`]'s question ([`crate::case::Case::memory_needed`]).
pub fn max_elements() -> usize {
    usize::try_from(available_memory().bytes / 8).unwrap_or(usize::MAX)
}

/// Memory this process may still allocate, and where the figure comes from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Memory {
    /// Bytes.
    pub bytes: u64,
    /// Where the figure was read (named in errors).
    pub source: &'static str,
}

/// The memory available for new allocations, read once per process: on Linux
/// `MemAvailable` of `/proc/meminfo`, lowered to what a cgroup v2 memory limit leaves
/// (`/sys/fs/cgroup/memory.max` minus `memory.current`); elsewhere on Unix the physical
/// memory (`sysconf`); 8 GiB where neither can be read.
pub fn available_memory() -> Memory {
    use std::sync::OnceLock;
    static MEMORY: OnceLock<Memory> = OnceLock::new();
    *MEMORY.get_or_init(read_available_memory)
}

fn read_available_memory() -> Memory {
    let file = |path: &str| std::fs::read_to_string(path).ok();
    let meminfo = file("/proc/meminfo").and_then(|text| {
        let line = text.lines().find(|l| l.starts_with("MemAvailable:"))?;
        let kib: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
        Some(kib.saturating_mul(1024))
    });
    let cgroup = file("/sys/fs/cgroup/memory.max")
        .and_then(|max| max.trim().parse::<u64>().ok())
        .map(|max| {
            let used = file("/sys/fs/cgroup/memory.current")
                .and_then(|c| c.trim().parse::<u64>().ok())
                .unwrap_or(0);
            max.saturating_sub(used)
        });
    match (meminfo, cgroup) {
        (Some(m), Some(c)) if c < m => Memory {
            bytes: c,
            source: "the cgroup memory limit, /sys/fs/cgroup/memory.max",
        },
        (Some(m), _) => Memory {
            bytes: m,
            source: "MemAvailable in /proc/meminfo",
        },
        (None, _) => physical_memory().unwrap_or(Memory {
            bytes: 8 << 30,
            source: "an assumed 8 GiB (the machine's memory could not be read)",
        }),
    }
}

#[cfg(unix)]
fn physical_memory() -> Option<Memory> {
    // SAFETY: sysconf only reads system configuration values.
    let (pages, size) = unsafe {
        (
            libc::sysconf(libc::_SC_PHYS_PAGES),
            libc::sysconf(libc::_SC_PAGESIZE),
        )
    };
    let bytes = u64::try_from(pages)
        .ok()?
        .checked_mul(u64::try_from(size).ok()?)?;
    Some(Memory {
        bytes,
        source: "the physical memory (sysconf)",
    })
}

#[cfg(not(unix))]
fn physical_memory() -> Option<Memory> {
    None
}

/// The number of elements of `shape`, checked: no overflow, and at most
/// [`max_elements`] counting every zero-length axis as one (so `[0, 2^63]` is refused
/// rather than passed on to code that multiplies the other axes).
pub fn element_count(shape: &[usize], location: &dyn fmt::Display) -> Result<usize> {
    const MAX_RANK: usize = 16;
    if shape.len() > MAX_RANK {
        return Err(Error::format(
            location,
            format!(
                "{} dimensions; at most {MAX_RANK} are accepted",
                shape.len()
            ),
        ));
    }
    let limit = max_elements();
    let spread = shape
        .iter()
        .try_fold(1usize, |acc, &d| acc.checked_mul(d.max(1)))
        .filter(|&n| n <= limit);
    match spread {
        Some(_) => Ok(shape.iter().product()),
        None => Err(Error::format(
            location,
            format!("shape {shape:?} is too large (at most {limit} elements per array)"),
        )),
    }
}

/// Bytes of `shape` elements of `dtype`, checked as [`element_count`].
fn byte_count(dtype: Dtype, shape: &[usize], location: &dyn fmt::Display) -> Result<usize> {
    element_count(shape, location)?
        .checked_mul(dtype.size())
        .ok_or_else(|| Error::format(location, format!("shape {shape:?} is too large")))
}

/// `values` as an array of `shape`, whose element count the caller has checked.
fn shaped(shape: &[usize], values: Vec<f64>, location: &dyn fmt::Display) -> Result<ArrayD<f64>> {
    ArrayD::from_shape_vec(IxDyn(shape), values)
        .map_err(|e| Error::format(location, format!("shape {shape:?}: {e}")))
}

/// `bytes` as elements of `N` bytes each, converted by `convert` (a trailing partial
/// element, which the callers' length checks exclude, is ignored).
fn decode<const N: usize>(bytes: &[u8], convert: impl Fn([u8; N]) -> f64) -> Vec<f64> {
    let (elements, _) = bytes.as_chunks::<N>();
    elements.iter().map(|&c| convert(c)).collect()
}

/// The f64 values of the bytes of an f32, f16 or bf16 array.
fn convert_narrow(dtype: Dtype, bytes: &[u8]) -> Vec<f64> {
    match dtype {
        Dtype::F32 => decode(bytes, |c| f32::from_le_bytes(c) as f64),
        Dtype::F16 => decode(bytes, |c| f16::from_le_bytes(c).to_f64()),
        _ => decode(bytes, |c| bf16::from_le_bytes(c).to_f64()),
    }
}

/// [`decode`] into a slice of the same element count.
fn convert_into<const N: usize>(bytes: &[u8], out: &mut [f64], convert: impl Fn([u8; N]) -> f64) {
    let (elements, _) = bytes.as_chunks::<N>();
    for (o, &c) in out.iter_mut().zip(elements) {
        *o = convert(c);
    }
}

/// Calls `f` on each element of `N` bytes.
fn each<const N: usize>(bytes: &[u8], mut f: impl FnMut([u8; N])) {
    let (elements, _) = bytes.as_chunks::<N>();
    elements.iter().for_each(|&c| f(c));
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

/// An array object as it arrives in a reply or a file, parsed in one pass straight into
/// typed fields (no generic JSON tree): `values` become f64s as they are read, `data`
/// stays a string until its length has been checked against the shape.
///
/// Deserialising never fails on the *content* of a field (a `dtype` that is not a
/// string, an unknown key, a value that is not a number): those are recorded and
/// reported by [`WireArray::into_tensor`] with the caller's location.
#[derive(Debug, Default)]
pub struct WireArray {
    not_object: bool,
    dtype: Option<Option<String>>,
    shape: Option<Option<Vec<usize>>>,
    data: Option<Option<String>>,
    values: Option<Option<Values>>,
    npy: Option<Option<String>>,
    block: Option<Option<usize>>,
    unknown: Option<String>,
}

#[derive(Debug, Default)]
struct Values {
    parsed: Vec<f64>,
    first_bad: Option<usize>,
}

impl WireArray {
    /// The side file named by `{"npy": "<file>"}` (vector files only), if any.
    pub fn npy(&self) -> Option<Result<&str>> {
        match &self.npy {
            None => None,
            Some(Some(name)) => Some(Ok(name)),
            Some(None) => Some(Err(Error::format(
                "array object",
                "`npy` must be a file name",
            ))),
        }
    }

    /// Validates and decodes the array; `location` names the file and field (or the
    /// reply and field) in every error.
    pub fn into_tensor(self, location: &dyn fmt::Display) -> Result<Tensor> {
        self.into_tensor_from(&mut [], location)
    }

    /// [`into_tensor`](Self::into_tensor) for a message of the binary framing, whose
    /// blocks are `blocks` (an array naming block `i` takes it, so its bytes are freed as
    /// soon as they are decoded).
    pub fn into_tensor_from(
        mut self,
        blocks: &mut [Option<Vec<u8>>],
        location: &dyn fmt::Display,
    ) -> Result<Tensor> {
        if let Some(block) = self.block.take() {
            return self.decode_block(block, blocks, location);
        }
        if self.not_object {
            return Err(Error::format(
                location,
                "expected an array object {dtype, shape, data}",
            ));
        }
        if let Some(unknown) = &self.unknown {
            return Err(Error::format(
                location,
                format!("unknown field `{}`", unknown.escape_debug()),
            ));
        }
        if self.npy.is_some() {
            return Err(Error::format(
                location,
                "unknown field `npy` (side files are for vector files only)",
            ));
        }
        let dtype = match self.dtype {
            None => return Err(Error::format(location, "missing `dtype`")),
            Some(None) => return Err(Error::format(location, "`dtype` must be a string")),
            Some(Some(text)) => text
                .parse::<Dtype>()
                .map_err(|e| Error::format(location, e.to_string()))?,
        };
        let shape = match self.shape {
            None => return Err(Error::format(location, "missing `shape`")),
            Some(None) => {
                return Err(Error::format(
                    location,
                    "`shape` must be an array of non-negative integers",
                ))
            }
            Some(Some(shape)) => shape,
        };
        match (self.data, self.values) {
            (Some(data), None) => {
                let text =
                    data.ok_or_else(|| Error::format(location, "`data` must be a base64 string"))?;
                let needed = byte_count(dtype, &shape, location)?;
                // Decoded length from the text length alone, so a payload of the wrong
                // size is refused before it is decoded.
                let found = decoded_len(&text);
                if found != Some(needed) {
                    let found = found.map_or_else(
                        || format!("{} base64 characters", text.len()),
                        |n| format!("{n} bytes"),
                    );
                    return Err(Error::format(
                        location,
                        format!("shape {shape:?} of {dtype} needs {needed} bytes, found {found}"),
                    ));
                }
                let bytes = base64::engine::general_purpose::STANDARD
                    .decode(text.as_bytes())
                    .map_err(|e| Error::format(location, format!("`data` is not base64: {e}")))?;
                drop(text);
                Tensor::from_le_vec(dtype, &shape, bytes, location)
            }
            (None, Some(values)) => {
                let values = values
                    .ok_or_else(|| Error::format(location, "`values` must be a flat array"))?;
                if let Some(i) = values.first_bad {
                    return Err(Error::format(
                        location,
                        format!("`values[{i}]` is not a number (or \"inf\", \"-inf\", \"nan\")"),
                    ));
                }
                Tensor::from_values(dtype, &shape, values.parsed, location)
            }
            (Some(_), Some(_)) => Err(Error::format(location, "give `data` or `values`, not both")),
            (None, None) => Err(Error::format(location, "missing `data` (or `values`)")),
        }
    }
}

impl WireArray {
    fn decode_block(
        self,
        block: Option<usize>,
        blocks: &mut [Option<Vec<u8>>],
        location: &dyn fmt::Display,
    ) -> Result<Tensor> {
        if self.not_object || self.data.is_some() || self.values.is_some() || self.npy.is_some() {
            return Err(Error::format(
                location,
                "give `block` alone, without `data`, `values` or `npy`",
            ));
        }
        if let Some(unknown) = &self.unknown {
            return Err(Error::format(
                location,
                format!("unknown field `{}`", unknown.escape_debug()),
            ));
        }
        let index = block.ok_or_else(|| {
            Error::format(location, "`block` must be the index of a binary block")
        })?;
        let count = blocks.len();
        let bytes = match blocks.get_mut(index) {
            Some(slot) => slot.take().ok_or_else(|| {
                Error::format(location, format!("block {index} is used by two arrays"))
            })?,
            None if count == 0 => {
                return Err(Error::format(
                    location,
                    "`block` names a binary block, but no blocks came with this message",
                ))
            }
            None => {
                return Err(Error::format(
                    location,
                    format!("block {index} does not exist (the message has {count} blocks)"),
                ))
            }
        };
        let dtype = match self.dtype {
            Some(Some(text)) => text
                .parse::<Dtype>()
                .map_err(|e| Error::format(location, e.to_string()))?,
            Some(None) => return Err(Error::format(location, "`dtype` must be a string")),
            None => return Err(Error::format(location, "missing `dtype`")),
        };
        let shape = match self.shape {
            Some(Some(shape)) => shape,
            Some(None) => {
                return Err(Error::format(
                    location,
                    "`shape` must be an array of non-negative integers",
                ))
            }
            None => return Err(Error::format(location, "missing `shape`")),
        };
        Tensor::from_le_vec(dtype, &shape, bytes, location)
    }
}

/// Bytes a padded standard base64 text decodes to, from its length and padding.
fn decoded_len(text: &str) -> Option<usize> {
    let bytes = text.as_bytes();
    if !bytes.len().is_multiple_of(4) {
        return None;
    }
    let padding = bytes.iter().rev().take(2).filter(|&&b| b == b'=').count();
    (bytes.len() / 4 * 3).checked_sub(padding)
}

impl<'de> Deserialize<'de> for WireArray {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> std::result::Result<Self, D::Error> {
        deserializer.deserialize_any(WireVisitor)
    }
}

/// Accepts any JSON value; `on_other` is what a non-object becomes.
macro_rules! not_this_kind {
    ($value:ty, $other:expr) => {
        fn visit_bool<E: de::Error>(self, _: bool) -> std::result::Result<$value, E> {
            Ok($other)
        }
        fn visit_i64<E: de::Error>(self, _: i64) -> std::result::Result<$value, E> {
            Ok($other)
        }
        fn visit_u64<E: de::Error>(self, _: u64) -> std::result::Result<$value, E> {
            Ok($other)
        }
        fn visit_f64<E: de::Error>(self, _: f64) -> std::result::Result<$value, E> {
            Ok($other)
        }
        fn visit_unit<E: de::Error>(self) -> std::result::Result<$value, E> {
            Ok($other)
        }
        fn visit_none<E: de::Error>(self) -> std::result::Result<$value, E> {
            Ok($other)
        }
    };
}

fn drain_seq<'de, A: SeqAccess<'de>>(mut seq: A) -> std::result::Result<(), A::Error> {
    while seq.next_element::<IgnoredAny>()?.is_some() {}
    Ok(())
}

fn drain_map<'de, A: MapAccess<'de>>(mut map: A) -> std::result::Result<(), A::Error> {
    while map.next_entry::<IgnoredAny, IgnoredAny>()?.is_some() {}
    Ok(())
}

struct WireVisitor;

impl<'de> Visitor<'de> for WireVisitor {
    type Value = WireArray;

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("an array object {dtype, shape, data}")
    }

    not_this_kind!(
        WireArray,
        WireArray {
            not_object: true,
            ..WireArray::default()
        }
    );

    fn visit_str<E: de::Error>(self, _: &str) -> std::result::Result<WireArray, E> {
        Ok(WireArray {
            not_object: true,
            ..WireArray::default()
        })
    }

    fn visit_seq<A: SeqAccess<'de>>(self, seq: A) -> std::result::Result<WireArray, A::Error> {
        drain_seq(seq)?;
        Ok(WireArray {
            not_object: true,
            ..WireArray::default()
        })
    }

    fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> std::result::Result<WireArray, A::Error> {
        let mut wire = WireArray::default();
        while let Some(key) = map.next_key::<std::borrow::Cow<'de, str>>()? {
            match key.as_ref() {
                "dtype" => wire.dtype = Some(map.next_value::<Text>()?.0),
                "shape" => wire.shape = Some(map.next_value::<Shape>()?.0),
                "data" => wire.data = Some(map.next_value::<Text>()?.0),
                "values" => wire.values = Some(map.next_value::<ValueList>()?.0),
                "npy" => wire.npy = Some(map.next_value::<Text>()?.0),
                "block" => wire.block = Some(map.next_value::<Dimension>()?.0),
                other => {
                    if wire.unknown.is_none() {
                        wire.unknown = Some(other.chars().take(64).collect());
                    }
                    map.next_value::<IgnoredAny>()?;
                }
            }
        }
        Ok(wire)
    }
}

/// A string, or `None` for any other JSON value.
struct Text(Option<String>);

impl<'de> Deserialize<'de> for Text {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> std::result::Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = Text;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("a string")
            }
            not_this_kind!(Text, Text(None));
            fn visit_str<E: de::Error>(self, v: &str) -> std::result::Result<Text, E> {
                Ok(Text(Some(v.to_string())))
            }
            fn visit_string<E: de::Error>(self, v: String) -> std::result::Result<Text, E> {
                Ok(Text(Some(v)))
            }
            fn visit_seq<A: SeqAccess<'de>>(self, seq: A) -> std::result::Result<Text, A::Error> {
                drain_seq(seq)?;
                Ok(Text(None))
            }
            fn visit_map<A: MapAccess<'de>>(self, map: A) -> std::result::Result<Text, A::Error> {
                drain_map(map)?;
                Ok(Text(None))
            }
        }
        deserializer.deserialize_any(V)
    }
}

/// A list of non-negative integers, or `None` for anything else.
struct Shape(Option<Vec<usize>>);

impl<'de> Deserialize<'de> for Shape {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> std::result::Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = Shape;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("a list of non-negative integers")
            }
            not_this_kind!(Shape, Shape(None));
            fn visit_str<E: de::Error>(self, _: &str) -> std::result::Result<Shape, E> {
                Ok(Shape(None))
            }
            fn visit_map<A: MapAccess<'de>>(self, map: A) -> std::result::Result<Shape, A::Error> {
                drain_map(map)?;
                Ok(Shape(None))
            }
            fn visit_seq<A: SeqAccess<'de>>(
                self,
                mut seq: A,
            ) -> std::result::Result<Shape, A::Error> {
                let mut dims = Vec::new();
                let mut valid = true;
                while let Some(d) = seq.next_element::<Dimension>()? {
                    match d.0 {
                        Some(d) if valid => dims.push(d),
                        _ => valid = false,
                    }
                }
                Ok(Shape(valid.then_some(dims)))
            }
        }
        deserializer.deserialize_any(V)
    }
}

/// One dimension: a non-negative integer that fits `usize`, or `None`.
struct Dimension(Option<usize>);

impl<'de> Deserialize<'de> for Dimension {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> std::result::Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = Dimension;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("a non-negative integer")
            }
            fn visit_bool<E: de::Error>(self, _: bool) -> std::result::Result<Dimension, E> {
                Ok(Dimension(None))
            }
            fn visit_i64<E: de::Error>(self, v: i64) -> std::result::Result<Dimension, E> {
                Ok(Dimension(usize::try_from(v).ok()))
            }
            fn visit_u64<E: de::Error>(self, v: u64) -> std::result::Result<Dimension, E> {
                Ok(Dimension(usize::try_from(v).ok()))
            }
            fn visit_f64<E: de::Error>(self, _: f64) -> std::result::Result<Dimension, E> {
                Ok(Dimension(None))
            }
            fn visit_str<E: de::Error>(self, _: &str) -> std::result::Result<Dimension, E> {
                Ok(Dimension(None))
            }
            fn visit_unit<E: de::Error>(self) -> std::result::Result<Dimension, E> {
                Ok(Dimension(None))
            }
            fn visit_seq<A: SeqAccess<'de>>(
                self,
                seq: A,
            ) -> std::result::Result<Dimension, A::Error> {
                drain_seq(seq)?;
                Ok(Dimension(None))
            }
            fn visit_map<A: MapAccess<'de>>(
                self,
                map: A,
            ) -> std::result::Result<Dimension, A::Error> {
                drain_map(map)?;
                Ok(Dimension(None))
            }
        }
        deserializer.deserialize_any(V)
    }
}

/// A flat list of numbers (and `"inf"`, `"-inf"`, `"nan"`), parsed straight to f64;
/// `None` when it is not a list.
struct ValueList(Option<Values>);

impl<'de> Deserialize<'de> for ValueList {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> std::result::Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = ValueList;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("a flat list of numbers")
            }
            not_this_kind!(ValueList, ValueList(None));
            fn visit_str<E: de::Error>(self, _: &str) -> std::result::Result<ValueList, E> {
                Ok(ValueList(None))
            }
            fn visit_map<A: MapAccess<'de>>(
                self,
                map: A,
            ) -> std::result::Result<ValueList, A::Error> {
                drain_map(map)?;
                Ok(ValueList(None))
            }
            fn visit_seq<A: SeqAccess<'de>>(
                self,
                mut seq: A,
            ) -> std::result::Result<ValueList, A::Error> {
                let mut values = Values::default();
                let mut index = 0;
                while let Some(x) = seq.next_element::<Number>()? {
                    match x.0 {
                        Some(x) => values.parsed.push(x),
                        None if values.first_bad.is_none() => values.first_bad = Some(index),
                        None => {}
                    }
                    index += 1;
                }
                Ok(ValueList(Some(values)))
            }
        }
        deserializer.deserialize_any(V)
    }
}

/// One element of `values`: a number or one of the non-finite spellings; `None` for
/// anything else.
struct Number(Option<f64>);

impl<'de> Deserialize<'de> for Number {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> std::result::Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = Number;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("a number")
            }
            fn visit_bool<E: de::Error>(self, _: bool) -> std::result::Result<Number, E> {
                Ok(Number(None))
            }
            fn visit_i64<E: de::Error>(self, v: i64) -> std::result::Result<Number, E> {
                Ok(Number(Some(v as f64)))
            }
            fn visit_u64<E: de::Error>(self, v: u64) -> std::result::Result<Number, E> {
                Ok(Number(Some(v as f64)))
            }
            fn visit_f64<E: de::Error>(self, v: f64) -> std::result::Result<Number, E> {
                Ok(Number(Some(v)))
            }
            fn visit_str<E: de::Error>(self, v: &str) -> std::result::Result<Number, E> {
                Ok(Number(match v {
                    "inf" | "+inf" => Some(f64::INFINITY),
                    "-inf" => Some(f64::NEG_INFINITY),
                    "nan" => Some(f64::NAN),
                    _ => None,
                }))
            }
            fn visit_unit<E: de::Error>(self) -> std::result::Result<Number, E> {
                Ok(Number(None))
            }
            fn visit_seq<A: SeqAccess<'de>>(self, seq: A) -> std::result::Result<Number, A::Error> {
                drain_seq(seq)?;
                Ok(Number(None))
            }
            fn visit_map<A: MapAccess<'de>>(self, map: A) -> std::result::Result<Number, A::Error> {
                drain_map(map)?;
                Ok(Number(None))
            }
        }
        deserializer.deserialize_any(V)
    }
}
