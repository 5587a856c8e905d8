//! Offline verification: compare a results directory with a vectors directory.
//!
//! Every vector file is one case. A missing, malformed or mis-shaped result makes that
//! case an error naming the file and field; the other cases still run. Only regular
//! files are read (a FIFO or a device in either directory is refused by type, never
//! opened for reading), a result file larger than its case can need is refused
//! unread, and `<id>.json` and `<id>.<output>.npy` that both hold an output must agree.

use std::collections::BTreeSet;
use std::path::Path;

use crate::compare::{compare, CaseReport, CompareOptions};
use crate::error::{Error, Result};
use crate::report::Report;
use crate::vector::{read_results_for, vector_files, VectorFile, INDEX_FILE};

/// Verifies every case of `vectors` against `results`.
///
/// Errors only when the run cannot start (an unreadable directory, no vector files).
pub fn verify(vectors: &Path, results: &Path, options: &CompareOptions) -> Result<Report> {
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
    let mut report = Report {
        mode: "verify".into(),
        subject: format!("{} against {}", vectors.display(), results.display()),
        cases: Vec::new(),
        notes: Vec::new(),
        random: Default::default(),
    };
    let mut known = BTreeSet::new();
    for file in &files {
        let stem = file
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default();
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
        report.cases.push(verify_one(&vector, results, options));
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
    let outputs: Vec<&str> = case.output_shapes().iter().map(|(n, _)| *n).collect();
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
    match compare(
        case,
        &vector.inputs,
        &vector.expected_outputs(),
        &got,
        options,
    ) {
        Ok(report) => report,
        Err(e) => CaseReport::error(case, format!("comparison failed: {e}")),
    }
}
