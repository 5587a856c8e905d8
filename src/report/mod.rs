//! Reports of a run, for people (text, SVG heatmaps) and for CI (JSON, JUnit XML).
//!
//! Every renderer is a pure function from a [`Report`] to text; writing files is the
//! caller's job (atomically, through [`write_atomic`]).

use std::path::Path;

use crate::compare::{CaseReport, Verdict};
use crate::error::{Error, Result};

pub mod json;
pub mod junit;
pub mod svg;
pub mod text;

/// Exit status: every case that ran conforms.
pub const EXIT_CONFORMING: u8 = 0;
/// Exit status: at least one case does not conform.
pub const EXIT_NONCONFORMING: u8 = 1;
/// Exit status: the run could not be completed (bad input, cases that could not be
/// compared, or nothing ran).
pub const EXIT_COULD_NOT_RUN: u8 = 2;

/// The result of a `verify` or `check` run.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Report {
    /// `"verify"` or `"check"`.
    pub mode: String,
    /// What was checked: the vectors directory, or the kernel's name.
    pub subject: String,
    /// One entry per case, in run order.
    pub cases: Vec<CaseReport>,
    /// Run-level notes (unknown result files, kernel restarts, ...).
    pub notes: Vec<String>,
    /// What no compared case covered (`check` only; docs/protocol.md, "Capabilities").
    pub never_exercised: Vec<crate::kernel::capability::Gap>,
}

/// How many cases ended each way.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize)]
pub struct Counts {
    /// Within budget.
    pub passed: usize,
    /// Over budget.
    pub failed: usize,
    /// Not supported by the kernel.
    pub skipped: usize,
    /// Could not be compared.
    pub errors: usize,
}

impl Report {
    /// Counts by verdict.
    pub fn counts(&self) -> Counts {
        let mut c = Counts::default();
        for case in &self.cases {
            match case.verdict {
                Verdict::Pass => c.passed += 1,
                Verdict::Fail => c.failed += 1,
                Verdict::Skipped(_) => c.skipped += 1,
                Verdict::Error(_) => c.errors += 1,
            }
        }
        c
    }

    /// [`EXIT_NONCONFORMING`] if any case failed; otherwise [`EXIT_COULD_NOT_RUN`] if any
    /// case could not be compared or none passed; otherwise [`EXIT_CONFORMING`].
    pub fn exit_code(&self) -> u8 {
        let c = self.counts();
        if c.failed > 0 {
            EXIT_NONCONFORMING
        } else if c.errors > 0 || c.passed == 0 {
            EXIT_COULD_NOT_RUN
        } else {
            EXIT_CONFORMING
        }
    }
}

/// Writes `contents` to `path` through a temporary file in the same directory and a
/// rename, so a reader never sees a half-written report.
pub fn write_atomic(path: &Path, contents: &[u8]) -> Result<()> {
    let dir = path
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    std::fs::create_dir_all(dir).map_err(|e| Error::io("create", dir, e))?;
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let temp = dir.join(format!(".{name}.tmp{}", std::process::id()));
    std::fs::write(&temp, contents).map_err(|e| Error::io("write", &temp, e))?;
    std::fs::rename(&temp, path).map_err(|e| {
        let _ = std::fs::remove_file(&temp);
        Error::io("write", path, e)
    })
}
