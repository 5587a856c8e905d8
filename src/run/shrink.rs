//! Shrinking a failing case: smaller variants (sizes, positions, scheme parameters)
//! tried greedily, most aggressive first, while the case still fails.

use crate::case::Case;
use crate::compare::{CaseReport, Verdict};
use crate::report::{FuzzSummary, MinimalFailure};

use super::check::{CheckOptions, Runner};

pub(super) fn shrink(
    runner: &mut Runner<'_>,
    found: &Case,
    report: CaseReport,
    options: &CheckOptions,
    summary: &mut FuzzSummary,
    unanswered: &mut Vec<CaseReport>,
) -> MinimalFailure {
    let mut best = found.clone();
    let mut best_report = report;
    let mut tried = 0;
    'outer: loop {
        for candidate in best.smaller() {
            if tried >= options.shrink_budget || runner.stopped.is_some() {
                break 'outer;
            }
            if candidate.complexity() >= best.complexity() {
                continue;
            }
            tried += 1;
            summary.shrink_runs += 1;
            let mut candidate = candidate;
            // Each step gets an id of its own, so an unanswered one can be reported.
            candidate.id = format!("{}.shrink{tried}", found.id);
            let quiet = crate::compare::CompareOptions {
                diagnose: false,
                ..options.compare
            };
            let r = runner.run(&candidate, &quiet);
            match r.verdict {
                Verdict::Fail => {
                    best = candidate;
                    best_report = r;
                    continue 'outer;
                }
                Verdict::Error(_) => {
                    summary.shrink_errors += 1;
                    unanswered.push(r);
                }
                _ => {}
            }
        }
        break;
    }
    let id = format!("{}.minimal", found.id);
    best.id = id.clone();
    best.purpose = format!("smallest failing case shrunk from {}", found.id);
    best_report.case = id;
    MinimalFailure {
        found: found.id.clone(),
        case: best,
        report: best_report,
        tried,
        saved: None,
    }
}
