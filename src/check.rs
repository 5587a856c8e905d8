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
use std::time::{Duration, Instant};

use crate::case::{Arrays, Case, Operation, OperationKind};
use crate::compare::{compare, CaseReport, CompareOptions, Verdict, Warning};
use crate::error::{KernelErrorKind, Result};
use crate::kernel::{Answer, Kernel, KernelInfo};
use crate::math::precision::Dtype;
use crate::math::stream::Stream;
use crate::reference;
use crate::report::Report;
use crate::scheme::model::{pick, range};
use crate::scheme::Scheme;
use crate::tensor::Tensor;
use crate::vector::VectorFile;

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
        }
    }
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
    let expected = match reference::expected(case, &inputs) {
        Ok(e) => e,
        Err(e) => {
            return (
                CaseReport::error(case, format!("reference failed: {e}")),
                None,
            )
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
    match kernel.run(case, dtype, &sent) {
        Err(e) => {
            let kind = e.kernel_kind().unwrap_or(KernelErrorKind::Failed);
            (CaseReport::error(case, e.to_string()), Some(kind))
        }
        Ok(Answer::Unsupported(reason)) => (
            CaseReport::skipped(case, format!("the kernel declined: {reason}")),
            None,
        ),
        Ok(Answer::Outputs { outputs, .. }) => {
            let options = CompareOptions {
                declared: Some(dtype),
                ..*options
            };
            let mut report = match compare(case, &inputs, &expected, &outputs, &options) {
                Ok(r) => r,
                Err(e) => {
                    return (
                        CaseReport::error(case, format!("comparison failed: {e}")),
                        None,
                    )
                }
            };
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

/// Runs cases with restarts and the consecutive-failure stop, and keeps the run-level
/// notes.
struct Runner<'k> {
    kernel: &'k mut dyn Kernel,
    info: KernelInfo,
    consecutive: usize,
    limit: usize,
    stopped: Option<String>,
    notes: Vec<String>,
    /// Every case whose outputs were compared, with the dtype it was sent in.
    exercised: Vec<(Case, Dtype)>,
}

impl Runner<'_> {
    fn stop(&mut self, why: String) {
        self.notes.push(why.clone());
        self.stopped = Some(why);
    }

    fn run(&mut self, case: &Case, options: &CompareOptions) -> CaseReport {
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
    };
    for (n, case) in cases.iter().enumerate() {
        progress("suite", n, cases.len());
        report.cases.push(runner.run(case, &options.compare));
    }
    progress("suite", cases.len(), cases.len());
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
        report.notes.push(format!(
            "fuzzing: {} random cases ({} within budget, {} over budget, {} errors, {} declined{shrinking}) in {:.1} s, {:.1} cases/s (seed {})",
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
    Ok(CheckOutcome {
        info,
        report,
        fuzz,
        minimal,
    })
}

/// What fuzzing produced: the counts, every random case's report (and the shrinking
/// steps that errored), the minimal failures.
struct Fuzzed {
    summary: FuzzSummary,
    cases: Vec<CaseReport>,
    minimal: Vec<MinimalFailure>,
}

fn fuzz_and_shrink(
    runner: &mut Runner<'_>,
    options: &CheckOptions,
    progress: &mut ProgressFn<'_>,
) -> Fuzzed {
    let started = Instant::now();
    let mut stream = Stream::new(options.seed);
    let mut summary = FuzzSummary::default();
    let mut minimal: Vec<MinimalFailure> = Vec::new();
    let mut cases: Vec<CaseReport> = Vec::new();
    let supported: Vec<(Scheme, Operation)> = runner
        .info
        .supports
        .iter()
        .flat_map(|s| {
            s.operations
                .iter()
                .map(move |&o| (s.scheme, operation_of(o)))
        })
        .collect();
    if supported.is_empty() {
        return Fuzzed {
            summary,
            cases,
            minimal,
        };
    }
    for n in 0..options.fuzz_cases {
        if options
            .fuzz_time
            .is_some_and(|limit| started.elapsed() >= limit)
            || runner.stopped.is_some()
        {
            break;
        }
        progress("fuzz", n, options.fuzz_cases);
        let (scheme, op) = supported[stream.below(supported.len() as u64) as usize].clone();
        let Some(case) = random_declared_case(&mut stream, &runner.info, scheme, op, n) else {
            continue;
        };
        let report = runner.run(&case, &options.compare);
        summary.cases += 1;
        let verdict = report.verdict.clone();
        cases.push(report.clone());
        match verdict {
            Verdict::Fail => {
                summary.failed += 1;
                let key = (case.scheme.scheme(), case.operation.name());
                if !minimal
                    .iter()
                    .any(|m| (m.case.scheme.scheme(), m.case.operation.name()) == key)
                {
                    progress("shrink", 0, 0);
                    let mut m = shrink(runner, &case, report, options, &mut summary, &mut cases);
                    if let Some(dir) = &options.save_dir {
                        match VectorFile::build(&m.case, options.compare.factor)
                            .and_then(|v| v.write(dir))
                        {
                            Ok(files) => m.saved = files.last().cloned(),
                            Err(e) => runner
                                .notes
                                .push(format!("could not save minimal case {}: {e}", m.case.id)),
                        }
                    }
                    minimal.push(m);
                }
            }
            Verdict::Error(_) => summary.errors += 1,
            Verdict::Skipped(_) => summary.skipped += 1,
            Verdict::Pass => summary.passed += 1,
        }
    }
    progress("fuzz", options.fuzz_cases, options.fuzz_cases);
    summary.seconds = started.elapsed().as_secs_f64();
    Fuzzed {
        summary,
        cases,
        minimal,
    }
}

/// A placeholder operation of `kind`, whose sizes the fuzzer draws.
fn operation_of(kind: OperationKind) -> Operation {
    match kind {
        OperationKind::Encode => Operation::Encode,
        OperationKind::Scores => Operation::Scores,
        OperationKind::Attention => Operation::Attention,
        OperationKind::Stream => Operation::Stream { tokens: 1 },
        OperationKind::Decode => Operation::Decode {
            tokens: 2,
            prefill: 1,
            chunks: vec![1],
        },
    }
}

/// A random valid case of `scheme` and `operation` (None after a few invalid draws).
pub fn random_case(
    stream: &mut Stream,
    scheme: Scheme,
    operation: Operation,
    dtypes: &[Dtype],
    n: usize,
) -> Option<Case> {
    random_case_where(stream, scheme, operation, dtypes, n, 20, &|_| true)
}

/// A random valid case of `scheme` and `operation` that `info` declares, in one of the
/// dtypes it declares for the operation (None when many draws found none: the
/// declared values lie outside what the fuzzer draws).
pub fn random_declared_case(
    stream: &mut Stream,
    info: &KernelInfo,
    scheme: Scheme,
    operation: Operation,
    n: usize,
) -> Option<Case> {
    let dtypes = info.operation_dtypes(scheme, operation.kind());
    random_case_where(stream, scheme, operation, &dtypes, n, 64, &|case| {
        info.declares(case).is_ok()
    })
}

/// The first of `attempts` random draws that is valid and `accept`ed.
fn random_case_where(
    stream: &mut Stream,
    scheme: Scheme,
    operation: Operation,
    dtypes: &[Dtype],
    n: usize,
    attempts: usize,
    accept: &dyn Fn(&Case) -> bool,
) -> Option<Case> {
    let floats: Vec<Dtype> = dtypes.iter().copied().filter(|d| d.is_float()).collect();
    for _ in 0..attempts {
        let heads = range(stream, 1, scheme.max_random_heads());
        let query_len = range(stream, 1, 9);
        let memory_len = if stream.below(4) == 0 {
            0
        } else {
            range(stream, 1, 14)
        };
        let head_dim = 2 * range(stream, 1, 8);
        let far = stream.below(2) == 0;
        let query_start = if far {
            range(stream, 100, 100_000) as i64
        } else {
            range(stream, 0, 40) as i64
        };
        let operation = match &operation {
            Operation::Stream { .. } => Operation::Stream {
                tokens: query_len * range(stream, 1, 3) + range(stream, 0, query_len - 1),
            },
            Operation::Decode { .. } => {
                let tokens = range(stream, 2, 16);
                let prefill = range(stream, 1, tokens - 1);
                let mut left = tokens - prefill;
                let mut chunks = Vec::new();
                while left > 0 {
                    let c = range(stream, 1, left.min(4));
                    chunks.push(c);
                    left -= c;
                }
                Operation::Decode {
                    tokens,
                    prefill,
                    chunks,
                }
            }
            other => other.clone(),
        };
        let shape = crate::shape::Shape {
            heads,
            query_len,
            memory_len,
            head_dim,
            query_start,
            operation: &operation,
        };
        let spec = scheme.random_spec(stream, &shape);
        let case = Case {
            id: format!("fuzz.{n:04}.{}.{}", scheme.name(), operation.name()),
            scheme: spec,
            operation,
            heads,
            query_len,
            memory_len,
            head_dim,
            query_start,
            hidden_keys: Vec::new(),
            dtype: if floats.is_empty() {
                Dtype::F64
            } else {
                pick(stream, &floats)
            },
            seed: stream.below(u64::MAX),
            faults: Vec::new(),
            purpose: "random case from the fuzzer".into(),
        };
        if case.validate().is_ok() && accept(&case) {
            return Some(case);
        }
    }
    None
}

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

fn shrink(
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
            let r = runner.run(&candidate, &options.compare);
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
