//! The one error type of the library: "the harness could not do what was asked".
//!
//! A kernel that disagrees with the reference is *not* an error; it is a result
//! carried in a report. `Error` is for invalid parameters and shapes, malformed
//! files, I/O failures and protocol violations.

use std::fmt;

/// Everything that can stop the library from computing an answer.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum Error {
    /// A scalar parameter is outside its valid range.
    #[error("invalid parameter `{name}`: expected {expected}, given {given}")]
    InvalidParameter {
        /// The parameter's name as it appears in the API.
        name: &'static str,
        /// What the parameter must satisfy.
        expected: String,
        /// The value that was passed.
        given: String,
    },
    /// An array has the wrong shape.
    #[error("wrong shape for `{name}`: expected {expected}, given {given:?}")]
    Shape {
        /// The array's name as it appears in the API.
        name: &'static str,
        /// The expected shape, written with the dimension names (e.g. `[H, L, d]` = `[2, 3, 4]`).
        expected: String,
        /// The shape that was passed.
        given: Vec<usize>,
    },
    /// A position lies outside what the encoding can represent.
    #[error("position {position} is out of range for `{name}`: {reason}")]
    PositionOutOfRange {
        /// The table or encoding that was indexed.
        name: &'static str,
        /// The offending position.
        position: i64,
        /// Why it is out of range.
        reason: String,
    },
    /// A case needs more memory than the machine has available.
    #[error(
        "case {case} needs about {} of memory for its arrays ({detail}), more than the {} available ({source_of})",
        gibibytes(*.needed),
        gibibytes(*.available)
    )]
    TooLarge {
        /// The case's id.
        case: String,
        /// Bytes the case needs, estimated.
        needed: u64,
        /// Bytes available.
        available: u64,
        /// Its largest arrays.
        detail: String,
        /// Where the available memory was read.
        source_of: &'static str,
    },
    /// A file or message does not follow its documented format.
    #[error("{location}: {reason}")]
    Format {
        /// The file (and field) or message that is malformed, e.g.
        /// `results/x.json: field outputs.scores`.
        location: String,
        /// What is wrong with it.
        reason: String,
    },
    /// The kernel under test could not answer: it crashed, hung, exited, broke the
    /// protocol, returned malformed arrays or reported an error of its own.
    #[error("kernel {kernel}: {reason}")]
    Kernel {
        /// The kernel's name (or command).
        kernel: String,
        /// Which way it failed; callers decide on this, never on the message text.
        kind: KernelErrorKind,
        /// What went wrong, including the kernel's last stderr lines when there are any.
        reason: String,
    },
    /// Reading or writing a file failed.
    #[error("cannot {action} {path}")]
    Io {
        /// What was being done: "read", "write", "create", "list".
        action: &'static str,
        /// The path involved.
        path: std::path::PathBuf,
        /// The operating system's error.
        #[source]
        source: std::io::Error,
    },
}

/// The ways a kernel can fail to answer, as carried by [`Error::Kernel`].
///
/// The checker treats them differently: a [`Failed`](Self::Failed) reply or a
/// [`MalformedResult`](Self::MalformedResult) costs one case and nothing else, while a
/// [`Timeout`](Self::Timeout), an [`Exited`](Self::Exited) process or
/// [`Garbage`](Self::Garbage) on stdout means the process can no longer be trusted: it is
/// replaced, and such failures in a row stop the run.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize)]
#[serde(rename_all = "snake_case")]
#[non_exhaustive]
pub enum KernelErrorKind {
    /// The program could not be started (missing, not executable, no resources).
    CouldNotStart,
    /// No complete answer within the timeout; the request write counts too.
    Timeout,
    /// The process exited, crashed or closed its stdout before answering.
    Exited,
    /// Something on stdout that is not the awaited JSON-RPC response: not JSON, the
    /// wrong id, neither `result` nor `error`, or a line over the size limit.
    Garbage,
    /// A well-formed reply whose content is wrong: no `outputs`, arrays whose data do
    /// not fit their shape, unknown dtypes.
    MalformedResult,
    /// The kernel reported that it failed on this case (a JSON-RPC error reply, or an
    /// in-process kernel's own error).
    Failed,
    /// The handshake was refused or malformed (protocol version, missing fields).
    Handshake,
    /// posconform received a signal and stopped the kernel.
    Interrupted,
}

impl KernelErrorKind {
    /// Whether the process must be replaced after this failure (and the failure counts
    /// towards the consecutive-failure stop): crashes, hangs and garbage on stdout.
    pub fn needs_restart(self) -> bool {
        matches!(
            self,
            KernelErrorKind::Timeout | KernelErrorKind::Exited | KernelErrorKind::Garbage
        )
    }

    /// A short lowercase name (`timeout`, `exited`, ...), as in the JSON report.
    pub fn name(self) -> &'static str {
        match self {
            KernelErrorKind::CouldNotStart => "could_not_start",
            KernelErrorKind::Timeout => "timeout",
            KernelErrorKind::Exited => "exited",
            KernelErrorKind::Garbage => "garbage",
            KernelErrorKind::MalformedResult => "malformed_result",
            KernelErrorKind::Failed => "failed",
            KernelErrorKind::Handshake => "handshake",
            KernelErrorKind::Interrupted => "interrupted",
        }
    }
}

impl fmt::Display for KernelErrorKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// The library's result type.
pub type Result<T> = std::result::Result<T, Error>;

impl Error {
    /// Shorthand for [`Error::InvalidParameter`].
    pub(crate) fn param(
        name: &'static str,
        expected: impl Into<String>,
        given: impl fmt::Display,
    ) -> Self {
        Error::InvalidParameter {
            name,
            expected: expected.into(),
            given: given.to_string(),
        }
    }

    /// Shorthand for [`Error::Format`].
    pub(crate) fn format(location: impl fmt::Display, reason: impl Into<String>) -> Self {
        Error::Format {
            location: location.to_string(),
            reason: reason.into(),
        }
    }

    /// Shorthand for [`Error::Io`].
    pub(crate) fn io(action: &'static str, path: &std::path::Path, source: std::io::Error) -> Self {
        Error::Io {
            action,
            path: path.to_path_buf(),
            source,
        }
    }

    /// An [`Error::Kernel`] of `kind` for the kernel `kernel`.
    pub fn kernel(
        kind: KernelErrorKind,
        kernel: impl Into<String>,
        reason: impl Into<String>,
    ) -> Self {
        Error::Kernel {
            kernel: kernel.into(),
            kind,
            reason: reason.into(),
        }
    }

    /// The kind of a kernel failure; `None` for every other error.
    pub fn kernel_kind(&self) -> Option<KernelErrorKind> {
        match self {
            Error::Kernel { kind, .. } => Some(*kind),
            _ => None,
        }
    }

    /// Shorthand for [`Error::Shape`].
    pub(crate) fn shape(name: &'static str, expected: impl Into<String>, given: &[usize]) -> Self {
        Error::Shape {
            name,
            expected: expected.into(),
            given: given.to_vec(),
        }
    }
}

/// Checks that `given` equals `expected`, naming each dimension in the error.
///
/// `dims` names the dimensions (e.g. `["H", "L", "d"]`) so that the message reads
/// `expected [H, L, d] = [2, 3, 4]`.
pub(crate) fn expect_shape(
    name: &'static str,
    dims: &[&str],
    expected: &[usize],
    given: &[usize],
) -> Result<()> {
    if given == expected {
        return Ok(());
    }
    let names = dims.join(", ");
    let values: Vec<String> = expected.iter().map(|x| x.to_string()).collect();
    Err(Error::shape(
        name,
        format!("[{names}] = [{}]", values.join(", ")),
        given,
    ))
}

/// Checks that every value of an array is finite.
pub(crate) fn expect_finite<'a>(
    name: &'static str,
    values: impl IntoIterator<Item = &'a f64>,
) -> Result<()> {
    for (index, x) in values.into_iter().enumerate() {
        if !x.is_finite() {
            return Err(Error::param(
                name,
                "finite values only",
                format!("{x} at flat index {index}"),
            ));
        }
    }
    Ok(())
}

/// Bytes as GiB with two decimals, for messages.
fn gibibytes(bytes: u64) -> String {
    format!("{:.2} GiB", bytes as f64 / (1u64 << 30) as f64)
}
