//! The machine-readable report: one pretty-printed JSON document per run.
//!
//! Layout (keys always in this order; `version` changes only when a key is removed or
//! changes meaning, never when one is added):
//!
//! ```json
//! {
//!   "format": "posconform.report",
//!   "version": 2,
//!   "mode": "verify",
//!   "subject": "vectors/core",
//!   "exit_code": 1,
//!   "counts": { "passed": 40, "failed": 1, "skipped": 2, "errors": 0 },
//!   "notes": [],
//!   "never_exercised": [{ "what": "rotary pairing \"adjacent\"", "declared": false }],
//!   "cases": [
//!     {
//!       "id": "xl_relative.scores.short_memory",
//!       "scheme": "xl_relative",
//!       "operation": "scores",
//!       "faults": ["rel-shift-off-by-one", "memory-keys-masked"],
//!       "memory_len": 4,
//!       "query_len": 9,
//!       "random": false,
//!       "verdict": { "kind": "fail" },
//!       "warnings": [],
//!       "time": { "round_trip_ms": 3.1, "kernel_ms": 1.2 },
//!       "outputs": [
//!         {
//!           "name": "scores", "shape": [2, 9, 13], "dtype": "f64", "budget_dtype": "f64",
//!           "passed": false, "decided_by": "baseline",
//!           "elements": 180, "over_budget": 36, "non_finite": 1,
//!           "max_abs": 0.001, "max_rel": 0.004, "max_ulp": 1.2e13, "allowance": 3.5e-15,
//!           "worst": { "index": [0, 2, 5], "got": "nan", "expected": 0.31,
//!                      "error": "nan", "tolerance": 1e-15, "ratio": "inf" },
//!           "masking": { "kind": "negative_infinity" },
//!           "patterns": [{ "kind": "memory_columns_only" }]
//!         }
//!       ],
//!       "diagnosis": {
//!         "finding": { "kind": "explained", "faults": ["memory-keys-masked"] },
//!         "tried": 23,
//!         "candidates": [{ "fault": "memory-keys-masked", "explains": true,
//!                          "reproduced": 1.0, "contradicted": 0.0, "distance": 0.0 }]
//!       }
//!     }
//!   ],
//!   "diagnosis": {
//!     "conclusive": "memory-keys-masked", "tied": [], "diagnosed": 1,
//!     "ranked": [{ "fault": "memory-keys-masked", "explains": ["xl_relative.scores.short_memory"],
//!                  "misses": [], "contradicted_by": [] }]
//!   }
//! }
//! ```
//!
//! Version 2 (from version 1): `faults` lists fault ids (words, `posconform explain ID`)
//! instead of numbers; `diagnosis` blocks were added, per case (failing cases that were
//! diagnosed; absent otherwise) and per run (absent when no failing case was diagnosed).
//! A case's `finding.kind` is `explained` (`faults`: each reproduces every element
//! alone), `combined` (`faults`: two that reproduce it together), `partial` (`faults`:
//! the closest, none complete) or `unexplained`; candidates are ranked best first, with
//! `reproduced` the share of over-budget elements the fault reproduces, `contradicted`
//! the share of within-budget elements it gets wrong, `distance` how far the kernel is
//! from it relative to the reference. The run's `conclusive` is the one fault that
//! explains every diagnosed failing case with no passing case against it (`null`
//! otherwise); `tied` lists the faults when several do equally (the evidence cannot
//! tell them apart). docs/faults.md says how a fault is matched.
//!
//! `never_exercised` lists what no compared case covered in a `check` run (schemes,
//! operations, parameter values, dtypes), each marked whether the kernel declared it
//! (docs/protocol.md, "Capabilities"); it is empty for `verify`.
//!
//! `time` (added within version 1) is how long a live kernel took for the case in a
//! `check` run: `round_trip_ms` as the harness measured it (request written,
//! computation, reply read and parsed), `kernel_ms` the kernel's own `elapsed_ms`
//! (docs/protocol.md), `null` when it reported none. `time` is left out for `verify` and
//! for cases that were skipped or could not be compared.
//!
//! `verdict.kind` is `pass`, `fail`, `skipped` or `error`; the last two carry a
//! `reason` string (for an error, the kernel's message and its last stderr lines).
//! `random` is true for cases the fuzzer drew (and shrinking steps the kernel could not
//! answer); they count in `counts` like every other case. `worst` is the element
//! furthest over its own tolerance (`ratio` = `error / tolerance`), `null` when no
//! element was compared. `dtype` is the dtype the kernel declared for the case (budgets
//! follow it), `array_dtype` the dtype of the array it returned. `masking` is `null`
//! for outputs that have no masked entries by construction.
//!
//! Non-finite numbers: JSON numbers cannot express infinities or NaN (serde_json would
//! silently write `null`, indistinguishable from "absent"), so every floating-point
//! field is written as a number when finite and as the string `"inf"`, `"-inf"` or
//! `"nan"` otherwise, the same spelling the vector format uses for array values
//! ([`crate::tensor`]). A consumer should accept either a number or one of these three
//! strings wherever a real number is expected.

use serde::{Serialize, Serializer};

use super::{Counts, Report};
use crate::compare::{CaseReport, Criterion, Masking, OutputReport, Pattern, Verdict};
use crate::math::precision::Dtype;

/// The value of `"format"`, naming this document type.
pub const FORMAT: &str = "posconform.report";

/// The value of `"version"`, the layout revision.
pub const VERSION: u32 = 2;

/// Renders `report` as a pretty-printed JSON document ending in a newline.
pub fn render(report: &Report) -> String {
    let document = Document {
        format: FORMAT,
        version: VERSION,
        mode: &report.mode,
        subject: &report.subject,
        exit_code: report.exit_code(),
        counts: report.counts(),
        notes: &report.notes,
        never_exercised: &report.never_exercised,
        diagnosis: report.diagnosis.as_ref().map(RunDiagnosisDocument::from),
        cases: report
            .cases
            .iter()
            .map(|c| CaseDocument::new(c, report.random.contains(&c.case)))
            .collect(),
    };
    // Every field is a string, integer, bool or finite-or-string real, so
    // serialisation cannot fail; a panic here would be a bug in this module.
    let mut text =
        serde_json::to_string_pretty(&document).expect("a report always serialises to JSON");
    text.push('\n');
    text
}

/// A real number that keeps infinities and NaN as strings instead of `null`.
#[derive(Clone, Copy)]
struct Real(f64);

impl Serialize for Real {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        let x = self.0;
        if x.is_finite() {
            serializer.serialize_f64(x)
        } else if x.is_nan() {
            serializer.serialize_str("nan")
        } else if x > 0.0 {
            serializer.serialize_str("inf")
        } else {
            serializer.serialize_str("-inf")
        }
    }
}

// Mirror structs rather than the library types' own derives: the document's layout is
// a published contract, and it must not change because a field is added to (or
// reordered in) a comparison type, nor lose non-finite values through plain f64 fields.

#[derive(Serialize)]
struct Document<'a> {
    format: &'static str,
    version: u32,
    mode: &'a str,
    subject: &'a str,
    exit_code: u8,
    counts: Counts,
    notes: &'a [String],
    never_exercised: &'a [crate::kernel::capability::Gap],
    #[serde(skip_serializing_if = "Option::is_none")]
    diagnosis: Option<RunDiagnosisDocument<'a>>,
    cases: Vec<CaseDocument<'a>>,
}

#[derive(Serialize)]
struct CaseDocument<'a> {
    id: &'a str,
    scheme: &'a str,
    operation: &'a str,
    faults: &'a [String],
    memory_len: usize,
    query_len: usize,
    random: bool,
    verdict: &'a Verdict,
    warnings: &'a [crate::compare::Warning],
    #[serde(skip_serializing_if = "Option::is_none")]
    time: Option<TimeDocument>,
    outputs: Vec<OutputDocument<'a>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    diagnosis: Option<CaseDiagnosisDocument<'a>>,
}

#[derive(Serialize)]
struct TimeDocument {
    round_trip_ms: Real,
    kernel_ms: Option<Real>,
}

impl<'a> CaseDocument<'a> {
    fn new(case: &'a CaseReport, random: bool) -> Self {
        CaseDocument {
            id: &case.case,
            scheme: case.scheme_name(),
            operation: case.operation_name(),
            faults: &case.faults,
            memory_len: case.memory_len,
            query_len: case.query_len,
            random,
            verdict: &case.verdict,
            warnings: &case.warnings,
            time: case.time.map(|t| TimeDocument {
                round_trip_ms: Real(t.round_trip_ms),
                kernel_ms: t.kernel_ms.map(Real),
            }),
            outputs: case.outputs.iter().map(OutputDocument::from).collect(),
            diagnosis: case.diagnosis.as_ref().map(CaseDiagnosisDocument::from),
        }
    }
}

#[derive(Serialize)]
struct OutputDocument<'a> {
    name: &'a str,
    shape: &'a [usize],
    dtype: Dtype,
    array_dtype: Dtype,
    budget_dtype: Dtype,
    passed: bool,
    decided_by: Criterion,
    elements: usize,
    over_budget: usize,
    non_finite: usize,
    max_abs: Real,
    max_rel: Real,
    max_ulp: Real,
    allowance: Real,
    worst: Option<WorstDocument<'a>>,
    masking: Option<MaskingDocument>,
    patterns: Vec<PatternDocument>,
}

impl<'a> From<&'a OutputReport> for OutputDocument<'a> {
    fn from(output: &'a OutputReport) -> Self {
        OutputDocument {
            name: output.name.name(),
            shape: &output.shape,
            dtype: output.dtype,
            array_dtype: output.array_dtype,
            budget_dtype: output.budget_dtype,
            passed: output.passed,
            decided_by: output.decided_by,
            elements: output.elements,
            over_budget: output.over_budget,
            non_finite: output.non_finite,
            max_abs: Real(output.max_abs),
            max_rel: Real(output.max_rel),
            max_ulp: Real(output.max_ulp),
            allowance: Real(output.allowance),
            worst: output.worst.as_deref().map(|index| WorstDocument {
                index,
                got: Real(output.worst_got),
                expected: Real(output.worst_expected),
                error: Real(output.worst_error),
                tolerance: Real(output.worst_tolerance),
                ratio: Real(output.worst_ratio),
            }),
            masking: output.masking.map(MaskingDocument::from),
            patterns: output.patterns.iter().map(PatternDocument::from).collect(),
        }
    }
}

#[derive(Serialize)]
struct WorstDocument<'a> {
    index: &'a [usize],
    got: Real,
    expected: Real,
    error: Real,
    tolerance: Real,
    ratio: Real,
}

#[derive(Serialize)]
#[serde(rename_all = "snake_case", tag = "kind")]
enum MaskingDocument {
    NegativeInfinity,
    Sentinel { value: Real },
    Leak { count: usize },
    NonFinite { count: usize },
}

impl From<Masking> for MaskingDocument {
    fn from(masking: Masking) -> Self {
        match masking {
            Masking::NegativeInfinity => MaskingDocument::NegativeInfinity,
            Masking::Sentinel { value } => MaskingDocument::Sentinel { value: Real(value) },
            Masking::Leak { count } => MaskingDocument::Leak { count },
            Masking::NonFinite { count } => MaskingDocument::NonFinite { count },
        }
    }
}

#[derive(Serialize)]
#[serde(rename_all = "snake_case", tag = "kind")]
enum PatternDocument {
    MaskedEntriesOnly,
    MemoryColumnsOnly,
    DistanceBand { from: i64, to: i64 },
    GrowsWithPosition { ratio: Real },
    VisibleKeysMasked { count: usize, top_left: bool },
    BeginsAtRow { row: usize },
    FullyMaskedRows { rows: usize, nan: bool },
    RowConstantShift { largest: Real },
}

impl From<&Pattern> for PatternDocument {
    fn from(pattern: &Pattern) -> Self {
        match *pattern {
            Pattern::MaskedEntriesOnly => PatternDocument::MaskedEntriesOnly,
            Pattern::MemoryColumnsOnly => PatternDocument::MemoryColumnsOnly,
            Pattern::DistanceBand { from, to } => PatternDocument::DistanceBand { from, to },
            Pattern::GrowsWithPosition { ratio } => {
                PatternDocument::GrowsWithPosition { ratio: Real(ratio) }
            }
            Pattern::VisibleKeysMasked { count, top_left } => {
                PatternDocument::VisibleKeysMasked { count, top_left }
            }
            Pattern::BeginsAtRow { row } => PatternDocument::BeginsAtRow { row },
            Pattern::FullyMaskedRows { rows, nan } => {
                PatternDocument::FullyMaskedRows { rows, nan }
            }
            Pattern::RowConstantShift { largest } => PatternDocument::RowConstantShift {
                largest: Real(largest),
            },
        }
    }
}

#[derive(Serialize)]
struct CaseDiagnosisDocument<'a> {
    finding: &'a crate::diagnose::Finding,
    tried: usize,
    candidates: Vec<CandidateDocument>,
}

impl<'a> From<&'a crate::diagnose::CaseDiagnosis> for CaseDiagnosisDocument<'a> {
    fn from(d: &'a crate::diagnose::CaseDiagnosis) -> Self {
        CaseDiagnosisDocument {
            finding: &d.finding,
            tried: d.tried,
            candidates: d
                .candidates
                .iter()
                .map(|c| CandidateDocument {
                    fault: c.fault,
                    explains: c.explains,
                    reproduced: Real(c.reproduced),
                    contradicted: Real(c.contradicted),
                    distance: Real(c.distance),
                })
                .collect(),
        }
    }
}

#[derive(Serialize)]
struct CandidateDocument {
    fault: &'static str,
    explains: bool,
    reproduced: Real,
    contradicted: Real,
    distance: Real,
}

#[derive(Serialize)]
struct RunDiagnosisDocument<'a> {
    conclusive: Option<&'static str>,
    tied: Vec<&'static str>,
    diagnosed: usize,
    ranked: &'a [crate::diagnose::RunCandidate],
}

impl<'a> From<&'a crate::diagnose::RunDiagnosis> for RunDiagnosisDocument<'a> {
    fn from(d: &'a crate::diagnose::RunDiagnosis) -> Self {
        RunDiagnosisDocument {
            conclusive: d.conclusive().map(|c| c.fault),
            tied: d.tied(),
            diagnosed: d.diagnosed,
            ranked: &d.ranked,
        }
    }
}
