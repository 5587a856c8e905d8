//! Shrinking a failing case: smaller variants (sizes, positions, scheme parameters)
//! tried greedily, most aggressive first, while the case still fails.

use crate::case::{Case, Operation};
use crate::compare::{CaseReport, Verdict};
use crate::report::{FuzzSummary, MinimalFailure};

use super::check::{CheckOptions, Runner};

/// Smaller variants of `case`, most aggressive first, all valid.
fn smaller(case: &Case) -> Vec<Case> {
    let mut out = Vec::new();
    let mut push = |f: &dyn Fn(&mut Case)| {
        let mut c = case.clone();
        f(&mut c);
        if c != *case && c.validate().is_ok() {
            out.push(c);
        }
    };
    let halves = |x: usize| [0, 1, x / 2, x.saturating_sub(1)];
    for v in halves(case.memory_len) {
        push(&|c| c.memory_len = v);
    }
    for v in halves(case.query_len) {
        push(&|c| c.query_len = v.max(1));
    }
    for v in halves(case.heads) {
        push(&|c| c.heads = v.max(1));
    }
    for v in [2, case.head_dim / 2, case.head_dim.saturating_sub(2)] {
        push(&|c| {
            c.head_dim = v.max(2) & !1;
            if let Some(fitted) = c.model().fit_head_dim(c.head_dim) {
                c.scheme = fitted;
            }
        });
    }
    for v in [
        0,
        case.query_start / 2,
        case.query_start - case.query_start.signum(),
    ] {
        push(&|c| c.query_start = v);
    }
    match &case.operation {
        Operation::Stream { tokens } => {
            for v in halves(*tokens) {
                push(&|c| c.operation = Operation::Stream { tokens: v.max(1) });
            }
        }
        Operation::Decode {
            tokens,
            prefill,
            chunks,
        } => {
            let (tokens, prefill, chunks) = (*tokens, *prefill, chunks.clone());
            if chunks.len() > 1 {
                push(&|c| {
                    let mut shorter = chunks.clone();
                    let last = shorter.pop().unwrap_or(0);
                    c.operation = Operation::Decode {
                        tokens: tokens - last,
                        prefill,
                        chunks: shorter,
                    };
                });
            }
            if prefill > 1 {
                push(&|c| {
                    c.operation = Operation::Decode {
                        tokens: tokens - prefill + 1,
                        prefill: 1,
                        chunks: chunks.clone(),
                    }
                });
            }
        }
        _ => {}
    }
    for simpler in case.model().simpler(&case.shape()) {
        push(&|c| c.scheme = simpler.clone());
    }
    out
}

/// How far a case is from the simplest one: element count, then distance of the
/// positions from 0, then how many parameters differ from their plain defaults.
fn complexity(case: &Case) -> (usize, i64, usize) {
    let elements =
        case.heads * case.tokens().max(case.query_len) * (case.key_len() + case.head_dim);
    let extras = case.model().extras(&case.shape()) + case.hidden_keys.len();
    (elements, case.query_start.abs(), extras)
}

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
        for candidate in smaller(&best) {
            if tried >= options.shrink_budget || runner.stopped.is_some() {
                break 'outer;
            }
            if complexity(&candidate) >= complexity(&best) {
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
