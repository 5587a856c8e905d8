//! No false alarm on random cases: a random correct variant and a random case of a
//! random scheme and operation it lists (the checker's own generator,
//! `posconform::check::random_case`, driven by a seeded `posconform::math::Stream`)
//! pass through `posconform::check::run_case`. The companion plants each bug in the
//! drawn variant and shows the same property then fails.

use posconform::case::Operation;
use posconform::case::OperationKind;
use posconform::check::{random_case, run_case};
use posconform::compare::{CompareOptions, Verdict};
use posconform::kernel::{Kernel, KernelInfo};
use posconform::math::Stream;
use proptest::prelude::*;
use proptest::test_runner::{Config, TestCaseError, TestRunner};

use crate::harness::{case_line, describe};
use crate::kernel::{Bug, Variant, ZooKernel};
use crate::variants;

fn config() -> Config {
    Config {
        cases: 128,
        failure_persistence: None,
        ..Config::default()
    }
}

fn operation(kind: &OperationKind) -> Operation {
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

/// The property: `variant` passes (or declines) one random case drawn from `seed`.
fn no_false_alarm(variant: &Variant, seed: u64) -> Result<(), TestCaseError> {
    let mut kernel = ZooKernel::new(variant.clone());
    let info: KernelInfo = kernel.describe().expect("describe");
    let mut stream = Stream::new(seed);
    let pairs: Vec<_> = info
        .supports
        .iter()
        .flat_map(|s| s.operations.iter().map(move |o| (s.scheme, *o)))
        .collect();
    let (scheme, op) = pairs[stream.below(pairs.len() as u64) as usize];
    let Some(case) = random_case(&mut stream, scheme, operation(&op), &info.dtypes, 0) else {
        return Ok(());
    };
    let (report, _) = run_case(&mut kernel, &info, &case, &CompareOptions::default());
    match &report.verdict {
        Verdict::Pass => Ok(()),
        Verdict::Skipped(why) if why.contains("declined") => Ok(()),
        _ => Err(TestCaseError::fail(format!(
            "{}\n    case: {}",
            describe(&variant.name, &report, "property"),
            case_line(&case)
        ))),
    }
}

fn strategy() -> impl Strategy<Value = (usize, u64)> {
    (0..variants::correct().len(), any::<u64>())
}

proptest! {
    #![proptest_config(config())]
    /// A random correct variant on a random case: never over budget, never an error.
    #[test]
    fn correct_variants_raise_no_false_alarm((index, seed) in strategy()) {
        no_false_alarm(&variants::correct()[index], seed)?;
    }
}

/// The companion: the same strategy with a bug planted in the drawn variant fails,
/// for every planted bug.
#[test]
fn the_property_fails_for_every_planted_bug() {
    for bug in Bug::ALL {
        let mut runner = TestRunner::new(config());
        let result = runner.run(&strategy(), |(index, seed)| {
            no_false_alarm(&variants::correct()[index].with_bug(bug), seed)
        });
        assert!(
            result.is_err(),
            "{}: {} random cases raised no alarm",
            bug.name(),
            config().cases
        );
    }
}
