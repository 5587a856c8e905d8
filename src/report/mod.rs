//! Reports of a run, for people (text, SVG heatmaps) and for CI (JSON, JUnit XML).
//!
//! Every renderer is a pure function from a [`Report`] to text; writing files is the
//! caller's job (atomically, through [`write_atomic`]).

use crate::case::Case;
use crate::compare::{CaseReport, Verdict};
use std::path::PathBuf;

pub mod explain;
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
    /// Ids of the cases in `cases` that the fuzzer drew at random (and the shrinking
    /// steps the kernel could not answer). They count like every other case; the text
    /// report summarises the ones that passed or failed and lists each error.
    pub random: std::collections::BTreeSet<String>,
    /// The faults that explain the run's diagnosed failures, checked against the cases
    /// that passed.
    pub diagnosis: Option<crate::diagnose::RunDiagnosis>,
}

/// A failure found by fuzzing, shrunk.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct MinimalFailure {
    /// The random case that failed first.
    pub found: String,
    /// The smallest case that still fails.
    pub case: Case,
    /// Its report.
    pub report: CaseReport,
    /// How many smaller cases the shrinker tried.
    pub tried: usize,
    /// Where it was saved, if it was.
    pub saved: Option<PathBuf>,
}

/// What the self-test found for one fault.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct PlantedResult {
    /// The fault's id.
    pub fault: &'static str,
    /// The first suite case that failed, or the minimal case of the first failing
    /// random case; `None` when nothing failed.
    pub detected_by: Option<String>,
    /// Failing suite cases.
    pub failing_suite_cases: usize,
    /// Failing random cases.
    pub failing_random_cases: usize,
    /// The run diagnosis's best candidate.
    pub named: Option<&'static str>,
    /// Whether that is the planted fault.
    pub top1: bool,
    /// Whether the best candidate explains every diagnosed failure and no passing case
    /// contradicts it.
    pub conclusive: bool,
    /// Seconds the run took.
    pub seconds: f64,
}

/// What fuzzing did.
#[derive(Debug, Clone, Copy, PartialEq, Default, serde::Serialize)]
pub struct FuzzSummary {
    /// Random cases run.
    pub cases: usize,
    /// Of which within budget.
    pub passed: usize,
    /// Of which over budget.
    pub failed: usize,
    /// Of which the kernel could not answer.
    pub errors: usize,
    /// Of which the kernel declined.
    pub skipped: usize,
    /// Smaller cases the shrinker ran.
    pub shrink_runs: usize,
    /// Of which the kernel could not answer (each is in the report as an error).
    pub shrink_errors: usize,
    /// Wall time of the fuzzing phase (shrinking included).
    pub seconds: f64,
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

    /// [`EXIT_COULD_NOT_RUN`] if any case could not be compared (a verdict is then
    /// incomplete, whatever else failed) or, with no failure, if none passed;
    /// otherwise [`EXIT_NONCONFORMING`] if any case failed; otherwise
    /// [`EXIT_CONFORMING`].
    pub fn exit_code(&self) -> u8 {
        let c = self.counts();
        if c.errors > 0 {
            EXIT_COULD_NOT_RUN
        } else if c.failed > 0 {
            EXIT_NONCONFORMING
        } else if c.passed == 0 {
            EXIT_COULD_NOT_RUN
        } else {
            EXIT_CONFORMING
        }
    }
}

pub use crate::files::write_atomic;

/// `text` with every control character (line breaks included), and the invisible
/// characters that reorder text, written as a visible escape such as `\u{1b}`: what a
/// kernel sends (names, messages, stderr) cannot move the cursor, recolour the
/// terminal, or forge lines of a report.
pub fn printable(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        let invisible = matches!(c, '\u{200e}' | '\u{200f}' | '\u{202a}'..='\u{202e}' | '\u{2066}'..='\u{2069}');
        if c.is_control() || invisible {
            out.extend(c.escape_unicode());
        } else {
            out.push(c);
        }
    }
    out
}
