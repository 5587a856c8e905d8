//! Kernels under test: the `Kernel` trait, the in-process reference, the stdio client
//! that drives a team's kernel over the protocol of docs/protocol.md, the server side of
//! that protocol for kernels written in Rust, and the capabilities a kernel declares.
//!
//! The same checks run against every implementation of the trait.

use crate::case::{Arrays, Case};
use crate::error::Result;
use crate::math::precision::Dtype;
use crate::reference;
use crate::scheme::Scheme;
use crate::tensor::Tensor;

pub mod capability;
pub mod protocol;
pub mod stdio;

/// One `supports` entry of the handshake: a scheme, the operations a kernel implements
/// for it, and optionally the parameter values and dtypes it accepts there
/// (docs/protocol.md, "Capabilities"; [`Support::new`] and its `with_` methods build
/// one).
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Support {
    /// The scheme.
    pub scheme: Scheme,
    /// The operations it implements for the scheme.
    pub operations: Vec<crate::case::OperationKind>,
    /// Accepted forms per parameter of the scheme; a parameter not named accepts every
    /// value.
    #[serde(skip_serializing_if = "std::collections::BTreeMap::is_empty")]
    pub parameters: std::collections::BTreeMap<String, Vec<serde_json::Value>>,
    /// The dtypes of this entry, preferred first; empty: the kernel's top-level dtypes.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub dtypes: Vec<Dtype>,
}

/// What a kernel says about itself in the handshake.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct KernelInfo {
    /// The kernel's name.
    pub name: String,
    /// The kernel's version.
    pub version: String,
    /// The schemes and operations it implements.
    pub supports: Vec<Support>,
    /// The dtypes it computes in, preferred first.
    pub dtypes: Vec<Dtype>,
    /// Conventions the kernel declares, free text (e.g. "masked scores hold -1e9").
    /// Informational: the harness observes conventions itself and reports what it saw.
    pub conventions: Vec<String>,
}

impl KernelInfo {
    /// Whether the kernel declares the case: its scheme, operation and parameter values
    /// ([`KernelInfo::declares`] says why not).
    pub fn supports(&self, case: &Case) -> bool {
        self.declares(case).is_ok()
    }

    /// The dtype to ask for: the case's own if the kernel computes the case in it, else
    /// the first dtype it declares for the case (its first top-level one for a case it
    /// does not declare).
    pub fn dtype_for(&self, case: &Case) -> Dtype {
        let declared = self.dtypes_for(case);
        if declared.contains(&case.dtype) {
            case.dtype
        } else {
            declared
                .first()
                .or(self.dtypes.first())
                .copied()
                .unwrap_or(Dtype::F64)
        }
    }
}

/// A kernel's answer to one case.
#[derive(Debug, Clone, PartialEq)]
pub enum Answer {
    /// The outputs, and the kernel's own timing when it gave one.
    Outputs {
        /// Named output arrays.
        outputs: Arrays,
        /// Milliseconds the kernel says the computation took.
        elapsed_ms: Option<f64>,
    },
    /// The kernel does not implement this case.
    Unsupported(String),
}

/// The dtype and shape of one output array, as a dry run asks for it.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize)]
pub struct ArraySpec {
    /// The dtype to answer in.
    pub dtype: Dtype,
    /// The shape.
    pub shape: Vec<usize>,
}

/// Something that computes cases: the reference, a planted-fault variant, or a team's
/// kernel behind the stdio protocol.
pub trait Kernel {
    /// The handshake: what the kernel is and supports.
    fn describe(&mut self) -> Result<KernelInfo>;

    /// Computes one case in `dtype`. `Err` means the kernel could not answer (crash,
    /// timeout, protocol violation); a wrong answer is `Ok` and judged by the caller.
    fn run(&mut self, case: &Case, dtype: Dtype, inputs: &Arrays) -> Result<Answer>;

    /// Brings the kernel back after an error (the stdio client starts a new process).
    fn restart(&mut self) -> Result<()> {
        Ok(())
    }

    /// Takes `case` and its inputs as [`run`](Self::run) does but computes nothing:
    /// answers arrays of the names, dtypes and shapes in `outputs`, whatever their
    /// values. Over the protocol this is the optional `dry_run` request
    /// (docs/protocol.md): its round trip is what the exchange alone costs, which
    /// `bench` subtracts. `Ok(None)` when the kernel has no such path (the default, and
    /// a kernel that answers `dry_run` with an error); `Err` when it could not answer.
    fn dry_run(
        &mut self,
        case: &Case,
        dtype: Dtype,
        inputs: &Arrays,
        outputs: &std::collections::BTreeMap<String, ArraySpec>,
    ) -> Result<Option<Answer>> {
        let _ = (case, dtype, inputs, outputs);
        Ok(None)
    }
}

/// The in-process reference: answers every case with the f64 oracle, or with the
/// same-precision reference when asked for a narrower dtype.
#[derive(Debug, Clone)]
pub struct ReferenceKernel {
    dtypes: Vec<Dtype>,
}

impl ReferenceKernel {
    /// A reference computing in `dtypes` (preferred first).
    pub fn new(dtypes: &[Dtype]) -> Self {
        ReferenceKernel {
            dtypes: dtypes.to_vec(),
        }
    }
}

impl Default for ReferenceKernel {
    fn default() -> Self {
        Self::new(&[Dtype::F64, Dtype::F32, Dtype::F16, Dtype::Bf16])
    }
}

/// Every scheme with every operation.
pub fn full_support() -> Vec<Support> {
    Scheme::ALL
        .iter()
        .map(|&scheme| Support::new(scheme, &crate::case::OperationKind::ALL))
        .collect()
}

/// Outputs as tensors declared in `dtype` (integer outputs as i64).
pub fn outputs_in(outputs: reference::Outputs, dtype: Dtype) -> Arrays {
    outputs
        .into_iter()
        .map(|(output, values)| {
            let dtype = if output.is_integer() {
                Dtype::I64
            } else {
                dtype
            };
            (output.name().to_string(), Tensor::from_f64(dtype, values))
        })
        .collect()
}

impl Kernel for ReferenceKernel {
    fn describe(&mut self) -> Result<KernelInfo> {
        Ok(KernelInfo {
            name: "posconform reference".into(),
            version: env!("CARGO_PKG_VERSION").into(),
            supports: full_support(),
            dtypes: self.dtypes.clone(),
            conventions: vec!["masked scores are -inf".into()],
        })
    }

    fn run(&mut self, case: &Case, dtype: Dtype, inputs: &Arrays) -> Result<Answer> {
        let outputs = if dtype == Dtype::F64 {
            reference::expected(case, inputs)?
        } else {
            reference::baseline(case, inputs, dtype)?
        };
        Ok(Answer::Outputs {
            outputs: outputs_in(outputs, dtype),
            elapsed_ms: None,
        })
    }
}
