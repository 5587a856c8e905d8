//! Running zoo kernels through the checker and describing what it found.

use posconform::case::{Case, Operation};
use posconform::check::{check, CheckOptions, CheckOutcome};
use posconform::compare::{CaseReport, Verdict};
use posconform::kernel::Kernel;
use posconform::math::Dtype;
use posconform::math::Stream;
use posconform::scheme::SchemeSpec;
use posconform::Scheme;

use crate::kernel::{Variant, ZooKernel};

/// Counts of one checker run.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Tally {
    /// Cases that ran (suite and fuzz).
    pub run: usize,
    /// Over budget.
    pub over: usize,
    /// Errors (the kernel or the harness could not answer).
    pub errors: usize,
    /// Declined or not listed.
    pub skipped: usize,
}

impl std::ops::AddAssign for Tally {
    fn add_assign(&mut self, o: Tally) {
        self.run += o.run;
        self.over += o.over;
        self.errors += o.errors;
        self.skipped += o.skipped;
    }
}

/// What a check of one variant found: counts and a line per failing case.
#[derive(Debug, Clone, Default)]
pub struct Findings {
    /// Counts.
    pub tally: Tally,
    /// One block per failing or erroring case (suite cases, and the shrunk fuzz failures).
    pub lines: Vec<String>,
    /// Skip reasons, one per skipped suite case.
    pub skips: Vec<String>,
}

/// Options of a zoo check: no saving, a small shrink budget (shrinking only sharpens
/// the report of a failure, it never decides one).
pub fn options(fuzz_cases: usize, seed: u64) -> CheckOptions {
    CheckOptions {
        fuzz_cases,
        seed,
        shrink_budget: 40,
        save_dir: None,
        ..CheckOptions::default()
    }
}

/// Runs `variant` on `cases` and `fuzz_cases` random cases from `seed`.
pub fn run(
    variant: &Variant,
    cases: &[Case],
    fuzz_cases: usize,
    seed: u64,
) -> (CheckOutcome, Findings) {
    let mut kernel = ZooKernel::new(variant.clone());
    let outcome = check(
        &mut kernel,
        cases,
        &options(fuzz_cases, seed),
        &mut |_, _, _| {},
    )
    .unwrap_or_else(|e| panic!("{}: the check could not run: {e}", variant.name));
    let findings = findings(&variant.name, &outcome, cases.len(), seed);
    (outcome, findings)
}

fn findings(variant: &str, outcome: &CheckOutcome, suite_len: usize, seed: u64) -> Findings {
    let mut f = Findings::default();
    let suite = &outcome.report.cases[..suite_len.min(outcome.report.cases.len())];
    for r in suite {
        match &r.verdict {
            Verdict::Skipped(why) => {
                f.tally.skipped += 1;
                f.skips
                    .push(format!("{variant}: {} skipped: {why}", r.case));
            }
            Verdict::Pass => f.tally.run += 1,
            Verdict::Fail => {
                f.tally.run += 1;
                f.tally.over += 1;
                f.lines.push(describe(variant, r, "suite"));
            }
            Verdict::Error(why) => {
                f.tally.run += 1;
                f.tally.errors += 1;
                f.lines.push(format!("{variant}: {} ERROR: {why}", r.case));
            }
        }
    }
    if let Some(fuzz) = &outcome.fuzz {
        f.tally.run += fuzz.cases - fuzz.skipped;
        f.tally.over += fuzz.failed;
        f.tally.errors += fuzz.errors;
        f.tally.skipped += fuzz.skipped;
        for m in &outcome.minimal {
            f.lines.push(describe(
                variant,
                &m.report,
                &format!("fuzz, shrunk from {}", m.found),
            ));
            f.lines
                .push(format!("    minimal case: {}", case_line(&m.case)));
        }
        if fuzz.failed > 0 {
            f.lines.push(format!(
                "{variant}: {} of {} fuzz cases over budget (seed {seed}; the first failure of each scheme/operation is shown, shrunk)",
                fuzz.failed, fuzz.cases
            ));
        }
    }
    f
}

/// A case's shape in one line.
pub fn case_line(c: &Case) -> String {
    format!(
        "{} {} {:?} H={} L={} M={} d={} p0={} dtype={} seed={}",
        c.scheme.scheme().name(),
        c.operation.name(),
        scheme_params(&c.scheme),
        c.heads,
        c.query_len,
        c.memory_len,
        c.head_dim,
        c.query_start,
        c.dtype,
        c.seed
    )
}

fn scheme_params(s: &SchemeSpec) -> String {
    serde_json::to_string(s).unwrap_or_default()
}

/// One failing case: every output over budget with its worst element relative to its
/// own tolerance, the error, the tolerance and their ratio.
pub fn describe(variant: &str, r: &CaseReport, origin: &str) -> String {
    let mut s = format!(
        "{variant}: {} [{} {}] ({origin}) {:?}",
        r.case,
        r.scheme_name(),
        r.operation_name(),
        short(&r.verdict)
    );
    for o in r.outputs.iter().filter(|o| !o.passed) {
        let err = (o.worst_got - o.worst_expected).abs();
        let ratio = if o.worst_tolerance > 0.0 {
            err / o.worst_tolerance
        } else {
            f64::INFINITY
        };
        s.push_str(&format!(
            "\n    {}: {} of {} elements over budget (answered {}, budget {}); worst {:?}: got {:.17e}, expected {:.17e}, error {:.3e}, tolerance {:.3e}, ratio {:.3}; masking {:?}; patterns {:?}",
            o.name,
            o.over_budget,
            o.elements,
            o.dtype,
            o.budget_dtype,
            o.worst.as_deref().unwrap_or(&[]),
            o.worst_got,
            o.worst_expected,
            err,
            o.worst_tolerance,
            ratio,
            o.masking,
            o.patterns
        ));
    }
    for w in &r.warnings {
        s.push_str(&format!("\n    warning: {w}"));
    }
    s
}

fn short(v: &Verdict) -> &'static str {
    match v {
        Verdict::Pass => "pass",
        Verdict::Fail => "OVER BUDGET",
        Verdict::Skipped(_) => "skipped",
        Verdict::Error(_) => "ERROR",
    }
}

/// `n` random cases from `seed` over every scheme and operation, dtypes from `dtypes`.
pub fn random_cases(seed: u64, n: usize, dtypes: &[Dtype]) -> Vec<Case> {
    let ops = [
        Operation::Encode,
        Operation::Scores,
        Operation::Attention,
        Operation::Stream { tokens: 1 },
        Operation::Decode {
            tokens: 2,
            prefill: 1,
            chunks: vec![1],
        },
    ];
    let schemes = [
        Scheme::Sinusoidal,
        Scheme::Learned,
        Scheme::XlRelative,
        Scheme::Rotary,
        Scheme::Alibi,
        Scheme::Bucketed,
        Scheme::Clipped,
    ];
    let mut stream = Stream::new(seed);
    let mut out = Vec::new();
    let mut k = 0;
    while out.len() < n {
        let scheme = schemes[k % schemes.len()];
        let op = ops[(k / schemes.len()) % ops.len()].clone();
        if let Some(c) = posconform::check::random_case(&mut stream, scheme, op, dtypes, k) {
            out.push(c);
        }
        k += 1;
    }
    out
}

/// Runs one case on a kernel directly (no budgets), in `dtype`, inputs as the case
/// generates them converted to `dtype`.
pub fn raw_run(kernel: &mut ZooKernel, case: &Case, dtype: Dtype) -> posconform::kernel::Answer {
    let inputs = case.inputs().expect("valid case");
    let sent = inputs
        .into_iter()
        .map(|(n, t)| {
            let t = if t.dtype().is_float() {
                posconform::tensor::Tensor::from_f64(dtype, t.into_values())
            } else {
                t
            };
            (n, t)
        })
        .collect();
    kernel
        .run(case, dtype, &sent)
        .unwrap_or_else(|e| panic!("{}: {e}", case.id))
}
