//! Property fuzzing: random cases of what a kernel declares, drawn from a seeded stream
//! (the distributions are documented in docs/conventions.md), each failure shrunk to a
//! minimal failing case and saved as a vector file.

use std::time::Instant;

use crate::case::{Case, Operation, OperationKind};
use crate::compare::{CaseReport, Verdict};
use crate::kernel::KernelInfo;
use crate::math::precision::Dtype;
use crate::math::stream::Stream;
use crate::report::{FuzzSummary, MinimalFailure};
use crate::scheme::model::{pick, range};
use crate::scheme::Scheme;
use crate::vector::VectorFile;

use super::check::{CheckOptions, ProgressFn, Runner};
use super::shrink::shrink;

/// What fuzzing produced: the counts, every random case's report (and the shrinking
/// steps that errored), the minimal failures.
pub(super) struct Fuzzed {
    pub(super) summary: FuzzSummary,
    pub(super) cases: Vec<CaseReport>,
    pub(super) minimal: Vec<MinimalFailure>,
}

pub(super) fn fuzz_and_shrink(
    runner: &mut Runner<'_>,
    options: &CheckOptions,
    progress: &mut ProgressFn<'_>,
) -> Fuzzed {
    let started = Instant::now();
    let mut stream = Stream::new(options.seed);
    let mut summary = FuzzSummary::default();
    let mut minimal: Vec<MinimalFailure> = Vec::new();
    let mut cases: Vec<CaseReport> = Vec::new();
    let filter = &options.select.filter;
    // The (scheme, operation) pairs to draw from, each with the dtypes the kernel
    // declares for it that the filter keeps (without a dtype filter, all of them: the
    // draws are then exactly those of an unfiltered run).
    let supported: Vec<(Scheme, Operation, Vec<Dtype>)> = runner
        .info
        .supports
        .iter()
        .flat_map(|s| s.operations.iter().map(move |&o| (s.scheme, o)))
        .filter(|&(scheme, op)| {
            (filter.schemes.is_empty() || filter.schemes.contains(&scheme))
                && (filter.operations.is_empty() || filter.operations.contains(&op))
        })
        .map(|(scheme, op)| {
            let dtypes: Vec<Dtype> = runner
                .info
                .operation_dtypes(scheme, op)
                .into_iter()
                .filter(|d| filter.dtypes.is_empty() || filter.dtypes.contains(d))
                .collect();
            (scheme, operation_of(op), dtypes)
        })
        .filter(|(_, _, dtypes)| filter.dtypes.is_empty() || !dtypes.is_empty())
        .collect();
    if supported.is_empty() {
        if !filter.is_empty() {
            runner.notes.push(format!(
                "fuzzing: the filters ({}) leave no declared scheme, operation and dtype to draw from; no random case ran",
                filter.describe()
            ));
        }
        return Fuzzed {
            summary,
            cases,
            minimal,
        };
    }
    // Random cases and shrinking steps are not diagnosed one by one; each minimal
    // failure is, once shrinking ends (the clearest evidence).
    let quiet = crate::compare::CompareOptions {
        diagnose: false,
        ..options.compare
    };
    // Every part draws the whole sequence from the seed (drawing is cheap: no inputs are
    // built) and runs its own contiguous share of it.
    let share = options.select.part.range(options.fuzz_cases);
    for n in 0..share.end {
        if n >= share.start
            && (options
                .fuzz_time
                .is_some_and(|limit| started.elapsed() >= limit)
                || runner.stopped.is_some())
        {
            break;
        }
        let (scheme, op, dtypes) = supported[stream.below(supported.len() as u64) as usize].clone();
        let accept = |case: &Case| runner.info.declares(case).is_ok();
        let case = random_case_where(&mut stream, scheme, op, &dtypes, n, 64, &accept);
        if n < share.start {
            continue;
        }
        progress("fuzz", n - share.start, share.len());
        let Some(case) = case else {
            continue;
        };
        let report = runner.run(&case, &quiet);
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
                    if options.compare.diagnose && runner.stopped.is_none() {
                        let again = runner.run(&m.case, &options.compare);
                        if again.verdict == Verdict::Fail {
                            m.report = again;
                        }
                    }
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
    progress("fuzz", share.len(), share.len());
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
            range(stream, 100, scheme.max_random_start()) as i64
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
        let dtype = if floats.is_empty() {
            Dtype::F64
        } else {
            pick(stream, &floats)
        };
        let hidden_keys = random_hidden_keys(stream, &operation, memory_len, query_len);
        let input_scale = random_input_scale(stream, &operation, dtype);
        let case = Case {
            id: format!("fuzz.{n:04}.{}.{}", scheme.name(), operation.name()),
            scheme: spec,
            operation,
            heads,
            query_len,
            memory_len,
            head_dim,
            query_start,
            hidden_keys,
            input_scale,
            dtype,
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

/// Hidden (padding) keys for a `scores` or `attention` case, one case in four: half
/// of those hide a prefix of at least `M + 1` keys, so the first queries see no key at
/// all (a fully masked row, which must come out as zeros), the others hide each key
/// with probability 1/3. Other operations have none.
fn random_hidden_keys(
    stream: &mut Stream,
    operation: &Operation,
    memory_len: usize,
    query_len: usize,
) -> Vec<usize> {
    if !matches!(operation, Operation::Scores | Operation::Attention) || stream.below(4) != 0 {
        return Vec::new();
    }
    let keys = memory_len + query_len;
    if stream.below(2) == 0 {
        let end = range(stream, memory_len + 1, keys);
        (0..end).collect()
    } else {
        (0..keys).filter(|_| stream.below(3) == 0).collect()
    }
}

/// The input amplitude: 1, or for one `scores`, `attention`, `stream` or `decode`
/// case in four a factor that makes the scores large enough to overflow a softmax
/// computed without subtracting the row maximum in the case's dtype (`exp` overflows
/// past about 11 in f16, 89 in f32 and bf16, 710 in f64): uniform in 3..=5 for f16,
/// 10..=14 for f32 and bf16, 30..=50 for f64.
fn random_input_scale(stream: &mut Stream, operation: &Operation, dtype: Dtype) -> f64 {
    if matches!(operation, Operation::Encode) || stream.below(4) != 0 {
        return 1.0;
    }
    let (low, high) = match dtype {
        Dtype::F16 => (3, 5),
        Dtype::F32 | Dtype::Bf16 => (10, 14),
        _ => (30, 50),
    };
    range(stream, low, high) as f64
}
