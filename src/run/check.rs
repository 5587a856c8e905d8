//! Checking a live kernel: the suite, then property fuzzing on random shapes, and
//! shrinking of each failure to a minimal failing case.
//!
//! Everything is deterministic given the seed (and a deterministic kernel). A kernel
//! that crashes, hangs or prints garbage costs one case (reported as an error) and a
//! restart; after `max_consecutive_errors` such cases in a row the run stops and the
//! remaining cases are reported as not run. A kernel that answers a case with an error
//! (or with malformed arrays) costs that case only: no restart, no count towards the
//! stop. A signal to posconform stops the run the same way. Finished results are never
//! dropped: every random case is in the report too (the text report summarises them),
//! and so is every shrinking step the kernel could not answer.

use std::path::PathBuf;
use std::time::Duration;

use crate::budget;
use crate::case::{Arrays, Case};
use crate::compare::{
    compare_with_budgets, CaseReport, CaseTime, CompareOptions, Verdict, Warning,
};
use crate::error::{KernelErrorKind, Result};
use crate::kernel::{Answer, Kernel, KernelInfo};
use crate::math::precision::Dtype;
use crate::report::{FuzzSummary, MinimalFailure, Report};

use super::fuzz::fuzz_and_shrink;
use super::select::Selection;
use crate::tensor::Tensor;

/// How to check a kernel.
#[derive(Debug, Clone)]
pub struct CheckOptions {
    /// Budget options.
    pub compare: CompareOptions,
    /// Random cases to try after the suite (0: no fuzzing).
    pub fuzz_cases: usize,
    /// Stop fuzzing after this long, whatever the count.
    pub fuzz_time: Option<Duration>,
    /// Seed of the fuzzer.
    pub seed: u64,
    /// Kernel failures in a row after which the run stops.
    pub max_consecutive_errors: usize,
    /// Kernel runs the shrinker may spend on one failure.
    pub shrink_budget: usize,
    /// Where minimal failing cases are saved as vector files.
    pub save_dir: Option<PathBuf>,
    /// Which cases to run: filters and one part of N (docs in [`super::select`]). The
    /// filters apply to the cases given and to what the fuzzer draws (its scheme,
    /// operation and dtype; id patterns select given cases only); the part takes its
    /// share of both.
    pub select: Selection,
}

impl Default for CheckOptions {
    fn default() -> Self {
        CheckOptions {
            compare: CompareOptions::default(),
            fuzz_cases: 200,
            fuzz_time: None,
            seed: 0x5eed,
            max_consecutive_errors: 3,
            shrink_budget: 300,
            save_dir: None,
            select: Selection::everything(),
        }
    }
}

/// The result of a check run.
#[derive(Debug, Clone, PartialEq)]
pub struct CheckOutcome {
    /// The kernel's handshake.
    pub info: KernelInfo,
    /// Every case that ran: the suite, every random case, the shrunk minimal cases,
    /// and the shrinking steps the kernel could not answer.
    pub report: Report,
    /// Fuzzing statistics, when fuzzing ran.
    pub fuzz: Option<FuzzSummary>,
    /// Minimal failing cases, one per scheme and operation that failed under fuzzing.
    pub minimal: Vec<MinimalFailure>,
}

/// Progress of a run: `(phase, done, total)`; total 0 when unknown.
pub type ProgressFn<'a> = dyn FnMut(&str, usize, usize) + 'a;

/// Runs one case and compares; never fails (problems become the verdict). The second
/// value is the kind of the kernel's failure when it could not answer (an in-process
/// kernel's own error counts as [`KernelErrorKind::Failed`]).
pub fn run_case(
    kernel: &mut dyn Kernel,
    info: &KernelInfo,
    case: &Case,
    options: &CompareOptions,
) -> (CaseReport, Option<KernelErrorKind>) {
    if let Err(reason) = info.declares(case) {
        return (CaseReport::skipped(case, reason), None);
    }
    let dtype = info.dtype_for(case);
    let inputs = match case.inputs() {
        Ok(i) => i,
        Err(e) => {
            return (
                CaseReport::error(case, format!("cannot build inputs: {e}")),
                None,
            )
        }
    };
    // Expected outputs and the budgets of the dtype the kernel is judged in, in one
    // pass of the reference; budgets for any other dtype are derived on demand. A
    // large case is compared head by head once the answer is in (crate::headwise):
    // nothing of its reference is held while the kernel computes.
    let budget_dtype = options.budget_dtype.unwrap_or(dtype);
    let by_head = crate::headwise::compared_by_head(case);
    let reference = if by_head {
        None
    } else {
        match budget::expected_and_budgets(case, &inputs, budget_dtype, options.factor) {
            Ok(e) => Some(e),
            Err(e) => {
                return (
                    CaseReport::error(case, format!("reference failed: {e}")),
                    None,
                )
            }
        }
    };
    let sent: Arrays = inputs
        .iter()
        .map(|(n, t)| {
            let t = if t.dtype().is_float() {
                Tensor::from_f64(dtype, t.view().to_owned())
            } else {
                t.clone()
            };
            (n.clone(), t)
        })
        .collect();
    let started = std::time::Instant::now();
    let answer = kernel.run(case, dtype, &sent);
    let round_trip_ms = started.elapsed().as_secs_f64() * 1e3;
    match answer {
        Err(e) => {
            let kind = e.kernel_kind().unwrap_or(KernelErrorKind::Failed);
            (CaseReport::error(case, e.to_string()), Some(kind))
        }
        Ok(Answer::Unsupported(reason)) => (
            CaseReport::skipped(case, format!("the kernel declined: {reason}")),
            None,
        ),
        Ok(Answer::Outputs {
            outputs,
            elapsed_ms,
        }) => {
            let options = CompareOptions {
                declared: Some(dtype),
                ..*options
            };
            let compared = match reference {
                None => crate::headwise::compare_by_head(case, &inputs, &outputs, &options),
                Some((expected, budgets)) => {
                    compare_whole(case, &inputs, expected, budgets, &outputs, &options)
                }
            };
            let mut report = match compared {
                Ok(r) => r,
                Err(e) => {
                    return (
                        CaseReport::error(case, format!("comparison failed: {e}")),
                        None,
                    )
                }
            };
            report.time = Some(CaseTime {
                round_trip_ms,
                kernel_ms: elapsed_ms.filter(|ms| ms.is_finite() && *ms >= 0.0),
            });
            if dtype != case.dtype {
                // Replaces compare's generic note with the reason the dtypes differ.
                report
                    .warnings
                    .retain(|w| !matches!(w, Warning::ComputedIn { .. }));
                report.warnings.insert(
                    0,
                    Warning::NotListed {
                        case: case.dtype,
                        ran: dtype,
                    },
                );
            }
            (report, None)
        }
    }
}

/// The whole-array comparison of `check`, with the expected outputs and budgets
/// computed before the kernel ran.
fn compare_whole(
    case: &Case,
    inputs: &Arrays,
    expected: crate::reference::Outputs,
    budgets: crate::budget::Budgets,
    outputs: &Arrays,
    options: &CompareOptions,
) -> Result<CaseReport> {
    let budget_dtype = options
        .budget_dtype
        .or(options.declared)
        .unwrap_or(case.dtype);
    let mut ready = Some(budgets);
    let mut source = |wanted: Dtype| match ready.take_if(|_| wanted == budget_dtype) {
        Some(b) => Ok(b),
        None => budget::budgets(case, inputs, &expected, wanted, options.factor),
    };
    compare_with_budgets(case, inputs, &expected, outputs, options, &mut source)
}

/// Runs cases with restarts and the consecutive-failure stop, and keeps the run-level
/// notes.
pub(super) struct Runner<'k> {
    pub(super) kernel: &'k mut dyn Kernel,
    pub(super) info: KernelInfo,
    pub(super) consecutive: usize,
    pub(super) limit: usize,
    pub(super) stopped: Option<String>,
    pub(super) notes: Vec<String>,
    /// Every case whose outputs were compared, with the dtype it was sent in.
    pub(super) exercised: Vec<(Case, Dtype)>,
}

impl Runner<'_> {
    fn stop(&mut self, why: String) {
        self.notes.push(why.clone());
        self.stopped = Some(why);
    }

    pub(super) fn run(&mut self, case: &Case, options: &CompareOptions) -> CaseReport {
        if self.stopped.is_none() {
            if let Some(signal) = crate::kernel::stdio::interrupted() {
                self.stop(format!(
                    "posconform received signal {signal}; the run stopped"
                ));
            }
        }
        if let Some(why) = &self.stopped {
            return CaseReport::error(case, format!("not run: {why}"));
        }
        let (report, failure) = run_case(self.kernel, &self.info, case, options);
        if matches!(report.verdict, Verdict::Pass | Verdict::Fail) {
            self.exercised
                .push((case.clone(), self.info.dtype_for(case)));
        }
        match failure {
            None => self.consecutive = 0,
            Some(KernelErrorKind::Interrupted) => {
                let signal = crate::kernel::stdio::interrupted().unwrap_or(0);
                self.stop(format!(
                    "posconform received signal {signal} during case {}; the run stopped",
                    case.id
                ));
            }
            Some(KernelErrorKind::CouldNotStart | KernelErrorKind::Handshake) => {
                self.stop(format!(
                    "the kernel could not be started again (case {}); the run stopped",
                    case.id
                ));
            }
            Some(kind) if kind.needs_restart() => {
                self.consecutive += 1;
                if self.consecutive >= self.limit {
                    self.stop(format!(
                        "the kernel failed {} cases in a row; the run stopped",
                        self.consecutive
                    ));
                } else if let Err(e) = self.kernel.restart() {
                    self.notes.push(format!(
                        "restarting the kernel after case {} failed: {e}",
                        case.id
                    ));
                    self.stopped = Some(format!("the kernel could not be restarted: {e}"));
                } else {
                    self.notes
                        .push(format!("the kernel was restarted after case {}", case.id));
                }
            }
            // The kernel answered (with an error, or with malformed arrays): the case
            // is lost, the process is fine.
            Some(_) => self.consecutive = 0,
        }
        report
    }
}

/// Checks `kernel` on `cases`, then fuzzes and shrinks as `options` say.
pub fn check(
    kernel: &mut dyn Kernel,
    cases: &[Case],
    options: &CheckOptions,
    progress: &mut ProgressFn<'_>,
) -> Result<CheckOutcome> {
    let selected = options.select.cases(cases.to_vec(), "cases")?;
    let cases = &selected.items;
    let info = kernel.describe()?;
    let mut runner = Runner {
        kernel,
        info: info.clone(),
        consecutive: 0,
        limit: options.max_consecutive_errors.max(1),
        stopped: None,
        notes: Vec::new(),
        exercised: Vec::new(),
    };
    let mut report = Report {
        mode: "check".into(),
        subject: format!("{} {}", info.name, info.version).trim().to_string(),
        cases: Vec::new(),
        notes: Vec::new(),
        never_exercised: Vec::new(),
        random: Default::default(),
        diagnosis: None,
    };
    for (n, case) in cases.iter().enumerate() {
        progress("suite", n, cases.len());
        report.cases.push(runner.run(case, &options.compare));
    }
    progress("suite", cases.len(), cases.len());
    if !options.select.is_everything() {
        report
            .notes
            .push(selected.note("cases given", &options.select));
    }
    let mut fuzz = None;
    let mut minimal = Vec::new();
    if options.fuzz_cases > 0 && runner.stopped.is_none() {
        let fuzzed = fuzz_and_shrink(&mut runner, options, progress);
        let summary = fuzzed.summary;
        let shrinking = if summary.shrink_runs > 0 {
            format!(
                "; {} shrinking runs, {} of them unanswered",
                summary.shrink_runs, summary.shrink_errors
            )
        } else {
            String::new()
        };
        let share = options.select.part.range(options.fuzz_cases);
        let part = if options.select.part.is_whole() {
            String::new()
        } else {
            format!(
                "; part {}: random cases {} to {} of {}",
                options.select.part,
                share.start,
                share.end.saturating_sub(1),
                options.fuzz_cases
            )
        };
        report.notes.push(format!(
            "fuzzing: {} random cases ({} within budget, {} over budget, {} errors, {} declined{shrinking}) in {:.1} s, {:.1} cases/s (seed {}{part})",
            summary.cases,
            summary.passed,
            summary.failed,
            summary.errors,
            summary.skipped,
            summary.seconds,
            summary.cases as f64 / summary.seconds.max(1e-9),
            options.seed
        ));
        for case in fuzzed.cases {
            report.random.insert(case.case.clone());
            report.cases.push(case);
        }
        for m in &fuzzed.minimal {
            report.cases.push(m.report.clone());
        }
        fuzz = Some(summary);
        minimal = fuzzed.minimal;
    }
    if !info.conventions.is_empty() {
        report.notes.insert(
            0,
            format!("the kernel declares: {}", info.conventions.join("; ")),
        );
    }
    report.notes.extend(runner.notes);
    report.never_exercised = crate::kernel::capability::never_exercised(&info, &runner.exercised);
    if options.compare.diagnose {
        report.diagnosis =
            super::diagnosis::run_diagnosis(&report, &runner.exercised, &options.compare);
    }
    Ok(CheckOutcome {
        info,
        report,
        fuzz,
        minimal,
    })
}

pub use super::fuzz::{random_case, random_declared_case};
