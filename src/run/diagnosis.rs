//! The run-level diagnosis: the faults named for a run's failing cases, checked against
//! the cases it passed.

use crate::budget::budgets;
use crate::case::Case;
use crate::compare::{CompareOptions, Verdict};
use crate::diagnose::{diagnose_run, CaseEvidence, RunDiagnosis};
use crate::math::Dtype;
use crate::reference;
use crate::report::Report;

/// The largest passing case (in output elements) checked against the candidates.
const PASSING_ELEMENTS: usize = 1 << 18;

/// At most this many passing cases are checked.
const PASSING_CASES: usize = 400;

fn elements(case: &Case) -> usize {
    case.output_shapes()
        .iter()
        .map(|(_, shape)| shape.iter().product::<usize>())
        .sum()
}

/// Combines the diagnoses of `report`'s failing cases and checks the candidates
/// against `passed` (cases the kernel passed, with the dtype each ran in). `None` when
/// no failing case was diagnosed.
pub(super) fn run_diagnosis(
    report: &Report,
    passed: &[(Case, Dtype)],
    options: &CompareOptions,
) -> Option<RunDiagnosis> {
    let failing: Vec<_> = report
        .cases
        .iter()
        .filter_map(|c| Some((c.case.clone(), c.diagnosis.clone()?)))
        .collect();
    if failing.is_empty() {
        return None;
    }
    let mut run = diagnose_run(&failing);
    let passing = passed.iter().filter(|(case, _)| {
        report
            .cases
            .iter()
            .any(|c| c.case == case.id && c.verdict == Verdict::Pass)
            && elements(case) <= PASSING_ELEMENTS
            && run.needs(case)
    });
    let passing: Vec<&(Case, Dtype)> = passing.take(PASSING_CASES).collect();
    for (case, dtype) in passing {
        let Ok(inputs) = case.inputs() else { continue };
        let Ok(expected) = reference::expected(case, &inputs) else {
            continue;
        };
        let budget_dtype = options.budget_dtype.unwrap_or(*dtype);
        let Ok(budgets) = budgets(case, &inputs, &expected, budget_dtype, options.factor) else {
            continue;
        };
        run.check_passing(&CaseEvidence {
            case,
            inputs: &inputs,
            expected: &expected,
            budgets: &budgets,
            dtype: *dtype,
        });
    }
    run.finish();
    Some(run)
}
