//! The `stream` and `decode` paths the checker itself runs (`reference::expected` on
//! stream and decode cases, window by window through `recurrence::segments` and
//! `recurrence::decode_steps`) against one-shot attention over the whole sequence: an
//! `attention` case with `L = T`, `M = 0` on the same inputs. Every scheme, random
//! shapes, positions and parameters from the fuzzer's own generator.

use posconform::case::{Case, Operation, Output};
use posconform::check::random_case;
use posconform::math::{Dtype, Stream};
use posconform::reference;
use posconform::Scheme;
use proptest::prelude::*;

/// The same tokens as one attention window: `L = T` queries, no memory, the whole
/// sequence causally.
fn one_shot(case: &Case) -> Case {
    Case {
        id: format!("{}.one_shot", case.id),
        operation: Operation::Attention,
        query_len: case.tokens(),
        memory_len: 0,
        hidden_keys: Vec::new(),
        input_scale: 1.0,
        ..case.clone()
    }
}

/// A random case of `scheme` and the kind of `operation`, from `seed`.
fn draw(seed: u64, scheme: Scheme, operation: Operation) -> Option<Case> {
    let mut stream = Stream::new(seed);
    random_case(&mut stream, scheme, operation, &[Dtype::F64], 0)
}

/// `rows` (token indices) of `got` against the same rows of the one-shot output.
fn same_rows(
    case: &Case,
    got: &ndarray::ArrayD<f64>,
    full: &ndarray::ArrayD<f64>,
    first: usize,
) -> Result<(), String> {
    let full = full.slice(ndarray::s![.., first.., ..]);
    if got.shape() != full.shape() {
        return Err(format!(
            "{}: shapes {:?} vs {:?}",
            case.id,
            got.shape(),
            full.shape()
        ));
    }
    let largest = full.iter().fold(0.0f64, |m, x| m.max(x.abs()));
    for (g, f) in got.iter().zip(full.iter()) {
        // The same window arithmetic on the same rows: equal to the last bits but for
        // the order of masked zeros in a sum.
        if (g - f).abs() > 1e-13 * largest.max(1.0) {
            return Err(format!("{}: {g} vs one-shot {f}", case.id));
        }
    }
    Ok(())
}

/// Streaming through the checker's path with memory covering every earlier token
/// equals one causal window over the whole sequence.
fn stream_equals_one_shot(seed: u64, scheme: Scheme) -> Result<(), String> {
    let Some(mut case) = draw(seed, scheme, Operation::Stream { tokens: 1 }) else {
        return Ok(());
    };
    case.memory_len = case.tokens();
    if case.validate().is_err() {
        return Ok(());
    }
    let inputs = case.inputs().map_err(|e| e.to_string())?;
    let whole = one_shot(&case);
    whole.check_inputs(&inputs).map_err(|e| e.to_string())?;
    let streamed = reference::expected(&case, &inputs).map_err(|e| e.to_string())?;
    let full = reference::expected(&whole, &inputs).map_err(|e| e.to_string())?;
    same_rows(&case, &streamed[&Output::Output], &full[&Output::Output], 0)
}

/// Cached decoding through the checker's path (a prefill, then chunks, each over every
/// earlier token) equals the rows `P..T` of one causal window over all `T` tokens.
fn decode_equals_one_shot(seed: u64, scheme: Scheme) -> Result<(), String> {
    let operation = Operation::Decode {
        tokens: 2,
        prefill: 1,
        chunks: vec![1],
    };
    let Some(case) = draw(seed, scheme, operation) else {
        return Ok(());
    };
    let Operation::Decode { prefill, .. } = case.operation else {
        return Err("the fuzzer drew another operation".into());
    };
    let inputs = case.inputs().map_err(|e| e.to_string())?;
    let whole = one_shot(&case);
    whole.check_inputs(&inputs).map_err(|e| e.to_string())?;
    let decoded = reference::expected(&case, &inputs).map_err(|e| e.to_string())?;
    let full = reference::expected(&whole, &inputs).map_err(|e| e.to_string())?;
    same_rows(
        &case,
        &decoded[&Output::Output],
        &full[&Output::Output],
        prefill,
    )
}

fn scheme_strategy() -> impl Strategy<Value = Scheme> {
    prop::sample::select(Scheme::ALL.to_vec())
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    /// Streaming with memory covering every earlier token equals one-shot attention,
    /// through the checker's own stream path, for every scheme.
    #[test]
    fn checker_stream_path_equals_one_shot(seed in any::<u64>(), scheme in scheme_strategy()) {
        prop_assert_eq!(stream_equals_one_shot(seed, scheme), Ok(()));
    }

    /// Cached decoding equals the matching rows of the full computation, through the
    /// checker's own decode path, for every scheme.
    #[test]
    fn checker_decode_path_equals_full_computation(seed in any::<u64>(), scheme in scheme_strategy()) {
        prop_assert_eq!(decode_equals_one_shot(seed, scheme), Ok(()));
    }
}

/// Planted-bug companion: a stream whose segments see no memory (each segment attends
/// only to itself) differs from the one-shot window once there is a second segment, so
/// the comparison above can fail.
#[test]
fn a_stream_without_memory_fails_the_comparison() {
    let mut failures = 0;
    for seed in 0..40 {
        for &scheme in Scheme::ALL {
            let Some(mut case) = draw(seed, scheme, Operation::Stream { tokens: 1 }) else {
                continue;
            };
            if case.tokens() <= case.query_len {
                continue;
            }
            case.memory_len = case.tokens();
            let Ok(inputs) = case.inputs() else {
                continue;
            };
            let whole = one_shot(&case);
            // The bug: the same tokens streamed with no memory at all.
            let mut forgetful = case.clone();
            forgetful.memory_len = 0;
            if forgetful.check_inputs(&inputs).is_err() {
                continue;
            }
            let streamed = reference::expected(&forgetful, &inputs).unwrap();
            let full = reference::expected(&whole, &inputs).unwrap();
            if same_rows(&case, &streamed[&Output::Output], &full[&Output::Output], 0).is_err() {
                failures += 1;
            }
        }
    }
    assert!(
        failures > 20,
        "only {failures} forgetful streams were caught"
    );
}

/// Planted-bug companion: decoding where each chunk sees only itself (the cache is
/// dropped) differs from the full computation.
#[test]
fn a_decode_without_its_cache_fails_the_comparison() {
    let mut failures = 0;
    for seed in 0..40 {
        for &scheme in Scheme::ALL {
            let operation = Operation::Decode {
                tokens: 2,
                prefill: 1,
                chunks: vec![1],
            };
            let Some(case) = draw(seed, scheme, operation) else {
                continue;
            };
            let Operation::Decode { prefill, .. } = case.operation else {
                continue;
            };
            let inputs = case.inputs().unwrap();
            let whole = one_shot(&case);
            let full = reference::expected(&whole, &inputs).unwrap();
            // The bug: every decoded token attends to itself alone (a stream of
            // one-token segments without memory, over the same inputs).
            let mut alone = case.clone();
            alone.operation = Operation::Stream {
                tokens: case.tokens(),
            };
            alone.query_len = 1;
            alone.memory_len = 0;
            if alone.check_inputs(&inputs).is_err() {
                continue;
            }
            let Ok(streamed) = reference::expected(&alone, &inputs) else {
                continue;
            };
            let rows = streamed[&Output::Output].slice(ndarray::s![.., prefill.., ..]);
            if same_rows(
                &case,
                &rows.to_owned().into_dyn(),
                &full[&Output::Output],
                prefill,
            )
            .is_err()
            {
                failures += 1;
            }
        }
    }
    assert!(
        failures > 20,
        "only {failures} cache-less decodes were caught"
    );
}
