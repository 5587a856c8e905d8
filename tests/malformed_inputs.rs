//! Bad shapes and parameters give typed errors that name the parameter and the
//! expected vs given value; nothing reachable through the public API panics.

use ndarray::{Array2, Array3};
use posconform::attention::{apply_causal_mask, attend, dot_scores, masked_softmax};
use posconform::learned::LearnedTable;
use posconform::math::Stream;
use posconform::recurrence::{stream, update_memory, LayerWeights, RelativeLayer};
use posconform::xl_relative::{
    relative_embeddings, scores, scores_at_positions, scores_naive, terms, RelativeInputs,
    RelativeParams,
};
use posconform::{Error, Scale, Sinusoid, SinusoidLayout, Window};
use proptest::prelude::*;

fn message(result: Result<impl std::fmt::Debug, Error>) -> String {
    result.unwrap_err().to_string()
}

fn arrays(h: usize, l: usize, k: usize, r: usize, d: usize) -> [Array3<f64>; 3] {
    let mut s = Stream::new(1);
    [
        s.array((h, l, d), 1.0),
        s.array((h, k, d), 1.0),
        s.array((h, r, d), 1.0),
    ]
}

fn relative(
    q: &Array3<f64>,
    k: &Array3<f64>,
    r: &Array3<f64>,
    u: &Array2<f64>,
    v: &Array2<f64>,
) -> [String; 3] {
    let inputs = RelativeInputs {
        q: q.view(),
        k: k.view(),
        r: r.view(),
        u: u.view(),
        v: v.view(),
    };
    let p = RelativeParams::default();
    [
        message(scores(&inputs, &p)),
        message(scores_naive(&inputs, &p)),
        message(terms(&inputs, &p)),
    ]
}

#[test]
fn relative_scoring_names_the_bad_array() {
    let u = Array2::zeros((2, 4));
    // Fewer keys than queries: M would be negative.
    let [q, k, r] = arrays(2, 5, 3, 8, 4);
    for m in relative(&q, &k, &r, &u, &u) {
        assert!(
            m.contains("`k`") && m.contains("M+L >= L = 5") && m.contains("[2, 3, 4]"),
            "{m}"
        );
    }
    // Head count disagrees.
    let [q, _, r] = arrays(2, 3, 5, 5, 4);
    let k = Array3::zeros((3, 5, 4));
    for m in relative(&q, &k, &r, &u, &u) {
        assert!(
            m.contains("`k`") && m.contains("[H, M+L, d] = [2, 5, 4]"),
            "{m}"
        );
    }
    // Relative table too short for the largest distance.
    let [q, k, r] = arrays(2, 3, 5, 4, 4);
    for m in relative(&q, &k, &r, &u, &u) {
        assert!(m.contains("`r`") && m.contains("R >= 5"), "{m}");
    }
    // Bias of the wrong width.
    let [q, k, r] = arrays(2, 3, 5, 5, 4);
    let bad_u = Array2::zeros((2, 3));
    for m in relative(&q, &k, &r, &bad_u, &u) {
        assert!(m.contains("`u`") && m.contains("[H, d] = [2, 4]"), "{m}");
    }
    // Non-finite input.
    let [mut q, k, r] = arrays(2, 3, 5, 5, 4);
    q[[1, 2, 3]] = f64::NAN;
    for m in relative(&q, &k, &r, &u, &u) {
        assert!(m.contains("`q`") && m.contains("NaN"), "{m}");
    }
    // Empty dimension.
    let [q, k, r] = arrays(2, 0, 5, 5, 4);
    for m in relative(&q, &k, &r, &u, &u) {
        assert!(m.contains("`q`") && m.contains(">= 1"), "{m}");
    }
}

#[test]
fn relative_scoring_rejects_bad_scale_and_positions() {
    let [q, k, r] = arrays(1, 2, 3, 3, 2);
    let u = Array2::zeros((1, 2));
    let inputs = RelativeInputs {
        q: q.view(),
        k: k.view(),
        r: r.view(),
        u: u.view(),
        v: u.view(),
    };
    let nan_scale = RelativeParams {
        scale: Scale::Fixed(f64::INFINITY),
        clamp_len: None,
    };
    let m = message(scores(&inputs, &nan_scale));
    assert!(m.contains("`scale`") && m.contains("inf"), "{m}");
    let p = RelativeParams::default();
    let m = message(scores_at_positions(&inputs, &p, &[0], &[0, 1, 2]));
    assert!(m.contains("`query_positions`"), "{m}");
    let m = message(scores_at_positions(&inputs, &p, &[100, 101], &[0, 1, 2]));
    assert!(m.contains("`r`") && m.contains("R >= 102"), "{m}");
    // Extreme positions do not overflow.
    let m = message(scores_at_positions(
        &inputs,
        &p,
        &[i64::MAX, 0],
        &[i64::MIN, 0, 1],
    ));
    assert!(m.contains("`r`"), "{m}");
}

#[test]
fn attention_helpers_reject_mismatches() {
    let window = Window::new(2, 3).unwrap();
    let mut wrong = Array3::zeros((1, 3, 4));
    let m = message(apply_causal_mask(&mut wrong, window));
    assert!(
        m.contains("`scores`") && m.contains("[H, L, M+L] = [1, 3, 5]"),
        "{m}"
    );
    let mut nan = Array3::zeros((1, 1, 2));
    nan[[0, 0, 1]] = f64::NAN;
    let m = message(masked_softmax(nan.view()));
    assert!(m.contains("`scores`") && m.contains("key 1"), "{m}");
    let m = message(attend(
        Array3::zeros((1, 2, 3)).view(),
        Array3::zeros((1, 4, 2)).view(),
    ));
    assert!(m.contains("`values`"), "{m}");
    let m = message(dot_scores(
        Array3::zeros((1, 2, 3)).view(),
        Array3::zeros((1, 2, 4)).view(),
        Scale::default(),
    ));
    assert!(m.contains("`k`"), "{m}");
    assert!(message(Window::new(3, 0)).contains("`query_len`"));
}

#[test]
fn encodings_reject_bad_parameters() {
    for (width, base) in [
        (0, 10_000.0),
        (5, 10_000.0),
        (4, 0.0),
        (4, f64::NAN),
        (4, -2.0),
    ] {
        let m = message(Sinusoid::new(width, base, SinusoidLayout::Interleaved));
        assert!(m.contains("`width`") || m.contains("`base`"), "{m}");
    }
    assert!(message(LearnedTable::new(Array2::zeros((0, 4)))).contains("`table`"));
    let mut nan = Array2::zeros((2, 2));
    nan[[1, 1]] = f64::INFINITY;
    assert!(message(LearnedTable::new(nan)).contains("`table`"));
    let pe = Sinusoid::paper(4).unwrap();
    let m = message(relative_embeddings(&pe, Array3::zeros((2, 6, 3)).view(), 4));
    assert!(m.contains("`w_kr`") && m.contains("d_model = 4"), "{m}");
}

fn weights(h: usize, d_model: usize, d: usize) -> LayerWeights {
    LayerWeights {
        w_q: Array3::zeros((h, d_model, d)),
        w_k: Array3::zeros((h, d_model, d)),
        w_v: Array3::zeros((h, d_model, d)),
        w_kr: Array3::zeros((h, d_model, d)),
        u: Array2::zeros((h, d)),
        v: Array2::zeros((h, d)),
        w_o: Array2::zeros((h * d, d_model)),
    }
}

#[test]
fn recurrence_rejects_bad_layers_and_inputs() {
    let pe = Sinusoid::paper(4).unwrap();
    let p = RelativeParams::default();
    let mut w = weights(2, 4, 3);
    w.w_o = Array2::zeros((5, 4));
    let m = message(RelativeLayer::new(w, pe.clone(), p));
    assert!(
        m.contains("`w_o`") && m.contains("[H*d, d_model] = [6, 4]"),
        "{m}"
    );
    let m = message(RelativeLayer::new(weights(2, 6, 3), pe.clone(), p));
    assert!(m.contains("`w_q`") && m.contains("d_model = 4"), "{m}");
    let layer = RelativeLayer::new(weights(2, 4, 3), pe, p).unwrap();
    let x = Array2::zeros((5, 4));
    assert!(message(stream(&[], x.view(), 2, 2)).contains("`layers`"));
    assert!(
        message(stream(std::slice::from_ref(&layer), x.view(), 0, 2)).contains("`segment_len`")
    );
    let m = message(stream(
        std::slice::from_ref(&layer),
        Array2::zeros((5, 3)).view(),
        2,
        2,
    ));
    assert!(m.contains("`x`") && m.contains("d_model = 4"), "{m}");
    let m = message(layer.forward(Array2::zeros((2, 5)).view(), x.view()));
    assert!(m.contains("`memory`"), "{m}");
    let m = message(update_memory(Array2::zeros((2, 5)).view(), x.view(), 3));
    assert!(m.contains("`memory`"), "{m}");
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(256))]

    /// No combination of shapes (zeros included) makes relative scoring panic: each
    /// call returns either scores of the right shape or an error.
    #[test]
    fn arbitrary_shapes_never_panic(
        dims in proptest::collection::vec(0usize..5, 12),
        clamp in proptest::option::of(0usize..4),
    ) {
        let mut s = Stream::new(dims.iter().sum::<usize>() as u64);
        let q: Array3<f64> = s.array((dims[0], dims[1], dims[2]), 1.0);
        let k: Array3<f64> = s.array((dims[3], dims[4], dims[5]), 1.0);
        let r: Array3<f64> = s.array((dims[6], dims[7], dims[8]), 1.0);
        let u: Array2<f64> = s.array((dims[9], dims[10]), 1.0);
        let v: Array2<f64> = s.array((dims[9], dims[11]), 1.0);
        let inputs = RelativeInputs { q: q.view(), k: k.view(), r: r.view(), u: u.view(), v: v.view() };
        let params = RelativeParams { clamp_len: clamp, ..Default::default() };
        let outcome = std::panic::catch_unwind(|| {
            (scores(&inputs, &params).map(|x| x.dim()), scores_naive(&inputs, &params).map(|x| x.dim()), terms(&inputs, &params).is_ok())
        });
        prop_assert!(outcome.is_ok(), "panicked on dims {:?}", dims);
        let (fast, slow, t) = outcome.unwrap();
        prop_assert_eq!(fast.is_ok(), slow.is_ok());
        prop_assert_eq!(fast.is_ok(), t);
        if let Ok(shape) = fast {
            prop_assert_eq!(shape, (dims[0], dims[1], dims[4]));
        }
    }
}

/// Renders a random JSON value of bounded depth (numbers, strings, arrays, objects with
/// the keys the array format uses).
fn json_value() -> impl Strategy<Value = serde_json::Value> {
    use serde_json::Value;
    let leaf = prop_oneof![
        Just(Value::Null),
        any::<bool>().prop_map(Value::Bool),
        any::<i64>().prop_map(Value::from),
        any::<f64>()
            .prop_map(|x| serde_json::Number::from_f64(x).map_or(Value::Null, Value::Number)),
        prop_oneof![
            Just("f64"),
            Just("bf16"),
            Just("i64"),
            Just("AAAA"),
            Just("-inf"),
            Just("nan"),
            Just("x.npy")
        ]
        .prop_map(|s| Value::String(s.to_string())),
    ];
    leaf.prop_recursive(3, 24, 6, |inner| {
        prop_oneof![
            proptest::collection::vec(inner.clone(), 0..6).prop_map(serde_json::Value::Array),
            proptest::collection::vec(
                (
                    prop_oneof![
                        Just("dtype"),
                        Just("shape"),
                        Just("data"),
                        Just("values"),
                        Just("npy"),
                        Just("x")
                    ],
                    inner
                ),
                0..5
            )
            .prop_map(|kv| serde_json::Value::Object(
                kv.into_iter().map(|(k, v)| (k.to_string(), v)).collect()
            )),
        ]
    })
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(512))]

    /// Arbitrary bytes given to the .npy reader give an array or an error, never a
    /// panic, including inputs that start with a valid header.
    #[test]
    fn npy_reader_never_panics(mut bytes in proptest::collection::vec(any::<u8>(), 0..200), prefix in any::<bool>()) {
        if prefix {
            let mut valid = posconform::tensor::Tensor::from_f64(
                posconform::math::Dtype::F32,
                ndarray::ArrayD::zeros(ndarray::IxDyn(&[2, 3])),
            )
            .to_npy()
            .unwrap();
            valid.truncate(valid.len().min(10 + bytes.len() % 80));
            valid.extend_from_slice(&bytes);
            bytes = valid;
        }
        let outcome = std::panic::catch_unwind(|| posconform::tensor::Tensor::from_npy(&bytes, &"fuzz.npy").is_ok());
        prop_assert!(outcome.is_ok());
    }

    /// Arbitrary JSON given to the array decoder gives an array or an error naming the
    /// location, never a panic.
    #[test]
    fn array_decoder_never_panics(value in json_value()) {
        let outcome = std::panic::catch_unwind(|| posconform::tensor::Tensor::from_json(&value, &"fuzz field"));
        prop_assert!(outcome.is_ok());
        if let Ok(Err(e)) = outcome {
            prop_assert!(e.to_string().contains("fuzz field"), "{e}");
        }
    }

    /// A real vector file with one field replaced by arbitrary JSON is read or
    /// refused with an error naming the file, never a panic.
    #[test]
    fn vector_reader_never_panics_on_mutated_files(field in 0usize..8, value in json_value()) {
        let dir = std::env::temp_dir().join(format!("posconform-mutate-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let case = posconform::suite::suite("core").unwrap().into_iter().find(|c| c.id == "alibi.scores.h12").unwrap();
        let path = posconform::vector::VectorFile::build(&case, 2.0).unwrap().write(&dir).unwrap().pop().unwrap();
        let mut doc: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&path).unwrap()).unwrap();
        let pointer = ["/format", "/version", "/case", "/case/heads", "/case/operation", "/inputs/q", "/expected/scores", "/budget/scores/tolerance"][field];
        if let Some(slot) = doc.pointer_mut(pointer) {
            *slot = value;
        }
        std::fs::write(&path, serde_json::to_string(&doc).unwrap()).unwrap();
        let outcome = std::panic::catch_unwind(|| posconform::vector::VectorFile::read(&path).map(drop));
        prop_assert!(outcome.is_ok(), "panicked with {pointer} replaced");
        if let Ok(Err(e)) = outcome {
            prop_assert!(e.to_string().contains("alibi.scores.h12"), "{e}");
        }
    }
}
