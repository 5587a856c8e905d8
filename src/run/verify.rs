//! Offline verification: compare a results directory with a vectors directory; failing
//! cases are diagnosed, and the faults named are checked against the cases that passed.
//!
//! Every vector file is one case. A missing, malformed or mis-shaped result makes that
//! case an error naming the file and field; the other cases still run. A selection
//! ([`verify_selected`]) verifies a subset and reports only that subset. Only regular
//! files are read (a FIFO or a device in either directory is refused by type, never
//! opened for reading), a result file larger than its case can need is refused
//! unread, and `<id>.json` and `<id>.<output>.npy` that both hold an output must agree.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};

use super::select::Selection;
use crate::budget::budgets;
use crate::case::Case;
use crate::compare::{compare_with_budgets, CaseReport, CompareOptions, Warning};
use crate::error::{Error, Result};
use crate::report::Report;
use crate::vector::{read_results_for, vector_files, VectorFile, INDEX_FILE};

/// Verifies every case of `vectors` against `results`.
///
/// Errors only when the run cannot start (an unreadable directory, no vector files).
pub fn verify(vectors: &Path, results: &Path, options: &CompareOptions) -> Result<Report> {
    verify_selected(vectors, results, options, &Selection::everything())
}

/// Verifies the cases of `vectors` that `selection` keeps (vector files in file-name
/// order, filtered, then this part's round-robin share) against `results`. The cases
/// left out are not reported, so a kernel that implements one scheme verifies just that
/// scheme cleanly; a note says how many were selected. A vector file whose case cannot
/// be read is kept whatever the scheme, operation and dtype filters say (only its file
/// name can be matched against the id patterns), so a broken file is never skipped
/// silently.
///
/// Errors when the run cannot start (an unreadable directory, no vector files) or when
/// the filters keep none of the files.
pub fn verify_selected(
    vectors: &Path,
    results: &Path,
    options: &CompareOptions,
    selection: &Selection,
) -> Result<Report> {
    let files = vector_files(vectors)?;
    if files.is_empty() {
        return Err(Error::format(
            vectors.display(),
            "no vector files (*.json) in this directory",
        ));
    }
    if !results.is_dir() {
        return Err(Error::format(results.display(), "not a directory"));
    }
    let stem_of = |file: &Path| {
        file.file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default()
    };
    // Every vector's id, selected or not: a result file of a case left out is not a
    // stray.
    let mut known: BTreeSet<String> = files.iter().map(|f| stem_of(f)).collect();
    let filter = &selection.filter;
    let entries: Vec<(PathBuf, Option<Case>)> = files
        .into_iter()
        .map(|file| {
            let case = if filter.ids_only() {
                None
            } else {
                VectorFile::read_case(&file).ok()
            };
            (file, case)
        })
        .collect();
    for case in entries.iter().filter_map(|(_, c)| c.as_ref()) {
        known.insert(case.id.clone());
    }
    let selected = selection.apply(entries, |filter, (file, case)| match case {
        Some(case) => filter.keeps(case),
        None => filter.keeps_id(&stem_of(file)),
    });
    if selected.kept == 0 {
        return Err(Error::format(
            filter.describe(),
            format!(
                "these filters select none of the {} vector files in {}; nothing to verify",
                selected.total,
                vectors.display()
            ),
        ));
    }
    let mut report = Report {
        mode: "verify".into(),
        subject: format!("{} against {}", vectors.display(), results.display()),
        cases: Vec::new(),
        notes: Vec::new(),
        never_exercised: Vec::new(),
        random: Default::default(),
        diagnosis: None,
    };
    if !selection.is_everything() {
        report.notes.push(selected.note("vector files", selection));
    }
    // Cases the results passed: evidence for or against the faults named for the others.
    let mut passed: Vec<(Case, crate::math::Dtype)> = Vec::new();
    for (file, _) in &selected.items {
        let stem = stem_of(file);
        let vector = match VectorFile::read(file) {
            Ok(v) => v,
            Err(e) => {
                report.cases.push(CaseReport::unreadable(
                    &stem,
                    format!("vector file unreadable: {e}"),
                ));
                continue;
            }
        };
        known.insert(vector.case.id.clone());
        let case_report = verify_one(&vector, results, options);
        if case_report.verdict == crate::compare::Verdict::Pass {
            let dtype = options.declared.unwrap_or(vector.case.dtype);
            passed.push((vector.case.clone(), dtype));
        }
        report.cases.push(case_report);
    }
    if options.diagnose {
        report.diagnosis = super::diagnosis::run_diagnosis(&report, &passed, options);
    }
    if let Ok(entries) = std::fs::read_dir(results) {
        let mut strays: Vec<String> = entries
            .filter_map(|e| e.ok())
            .map(|e| e.file_name().to_string_lossy().into_owned())
            .filter(|name| {
                name != INDEX_FILE && (name.ends_with(".json") || name.ends_with(".npy"))
            })
            .filter(|name| !known.iter().any(|id| name.starts_with(&format!("{id}."))))
            .collect();
        strays.sort();
        for name in strays {
            report.notes.push(format!(
                "result file {name} matches no vector and was ignored"
            ));
        }
    }
    Ok(report)
}

/// Verifies one case; never fails (problems become an error verdict).
pub fn verify_one(vector: &VectorFile, results: &Path, options: &CompareOptions) -> CaseReport {
    let case = &vector.case;
    let outputs: Vec<&str> = case.output_shapes().iter().map(|(o, _)| o.name()).collect();
    let got = match read_results_for(results, case) {
        Ok(Some(got)) => got,
        Ok(None) => {
            let npy: Vec<String> = outputs
                .iter()
                .map(|o| format!("{}.{o}.npy", case.id))
                .collect();
            return CaseReport::error(
                case,
                format!(
                    "no results for this case: expected {} or {}",
                    results.join(format!("{}.json", case.id)).display(),
                    npy.join(" + ")
                ),
            );
        }
        Err(e) => return CaseReport::error(case, format!("results unreadable: {e}")),
    };
    // Judged with the expected values and budgets stored in the file; budgets are
    // derived afresh only for another dtype or factor than the ones stored.
    let expected = vector.expected_outputs();
    let stored = vector.budgets();
    let mut source = |dtype| {
        let usable = !stored.is_empty()
            && stored
                .values()
                .all(|b| (b.exact || b.dtype == dtype) && b.factor == options.factor);
        if usable && dtype == case.dtype {
            Ok(stored.clone())
        } else {
            budgets(case, &vector.inputs, &expected, dtype, options.factor)
        }
    };
    let mut report =
        match compare_with_budgets(case, &vector.inputs, &expected, &got, options, &mut source) {
            Ok(report) => report,
            Err(e) => return CaseReport::error(case, format!("comparison failed: {e}")),
        };
    if let Some(note) = consistency(vector, options) {
        report.warnings.push(note);
    }
    report
}

/// For a vector written by another version of posconform: derives its expected values
/// and budgets with this build and says how much they differ (the stored ones are used
/// either way). `None` for files this version wrote, or when nothing differs.
fn consistency(vector: &VectorFile, options: &CompareOptions) -> Option<Warning> {
    let this = format!("posconform {}", env!("CARGO_PKG_VERSION"));
    let writer = vector
        .provenance
        .get("generator")
        .and_then(serde_json::Value::as_str)
        .unwrap_or("an unknown generator");
    if writer == this {
        return None;
    }
    let factor = vector
        .budget
        .values()
        .map(|b| b.factor)
        .next()
        .unwrap_or(options.factor);
    let fresh = match VectorFile::build(&vector.case, factor) {
        Ok(v) => v,
        Err(e) => {
            return Some(Warning::NotRederived {
                writer: writer.to_string(),
                this,
                reason: e.to_string(),
            })
        }
    };
    let largest = |a: &crate::case::Arrays, b: &crate::case::Arrays| -> f64 {
        a.iter()
            .filter_map(|(name, x)| b.get(name).map(|y| (x, y)))
            .flat_map(|(x, y)| {
                x.view()
                    .iter()
                    .zip(y.view().iter())
                    .map(|(p, q)| {
                        if p == q {
                            0.0
                        } else if p.is_finite() && q.is_finite() {
                            (p - q).abs() / p.abs().max(q.abs()).max(f64::MIN_POSITIVE)
                        } else {
                            f64::INFINITY
                        }
                    })
                    .collect::<Vec<_>>()
            })
            .fold(0.0, f64::max)
    };
    let expected = largest(&vector.expected, &fresh.expected);
    let tolerance = largest(
        &vector
            .budget
            .iter()
            .map(|(n, b)| (n.clone(), b.tolerance.clone()))
            .collect(),
        &fresh
            .budget
            .iter()
            .map(|(n, b)| (n.clone(), b.tolerance.clone()))
            .collect(),
    );
    (expected > 0.0 || tolerance > 0.0).then(|| Warning::OtherVersion {
        writer: writer.to_string(),
        this,
        expected,
        tolerance,
    })
}
