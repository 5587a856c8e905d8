//! Capabilities declared in the handshake (docs/protocol.md, "Capabilities"): what the
//! suite and the fuzzer send, in which dtype, what the report lists as never exercised,
//! clear errors for malformed declarations, and old handshakes keeping their meaning.

use posconform::case::OperationKind;

/// The operation names, as a handshake lists them.
const OPERATION_NAMES: [&str; 5] = ["encode", "scores", "attention", "stream", "decode"];
use posconform::case::Case;
use posconform::check::{check, CheckOptions, CheckOutcome};
use posconform::compare::Verdict;
use posconform::kernel::capability::Gap;
use posconform::kernel::protocol::parse_handshake;
use posconform::kernel::{full_support, Answer, Kernel, KernelInfo, ReferenceKernel, Support};
use posconform::math::Dtype;
use posconform::report::EXIT_CONFORMING;
use posconform::rotary::Pairing;
use posconform::scheme::rotary::RotarySpec;
use posconform::suite::suite;
use posconform::{Result, Scheme};
use proptest::prelude::*;
use serde_json::json;

/// The reference behind a handshake of our choosing, recording every case it is sent
/// and the dtype it was asked for. Optionally declines adjacent rotary cases, as a
/// kernel without capabilities has to.
struct Recording {
    info: KernelInfo,
    inner: ReferenceKernel,
    received: Vec<(Case, Dtype)>,
    decline_adjacent: bool,
}

impl Recording {
    fn new(supports: Vec<Support>, dtypes: &[Dtype]) -> Self {
        Recording {
            info: KernelInfo {
                name: "recording".into(),
                version: "0".into(),
                supports,
                dtypes: dtypes.to_vec(),
                conventions: Vec::new(),
            },
            inner: ReferenceKernel::default(),
            received: Vec::new(),
            decline_adjacent: false,
        }
    }
}

impl Kernel for Recording {
    fn describe(&mut self) -> Result<KernelInfo> {
        Ok(self.info.clone())
    }

    fn run(
        &mut self,
        case: &Case,
        dtype: Dtype,
        inputs: &posconform::case::Arrays,
    ) -> Result<Answer> {
        self.received.push((case.clone(), dtype));
        if self.decline_adjacent && pairing(case) == Some(Pairing::Adjacent) {
            return Ok(Answer::Unsupported(
                "adjacent pairing not implemented".into(),
            ));
        }
        self.inner.run(case, dtype, inputs)
    }
}

fn pairing(case: &Case) -> Option<Pairing> {
    match &case.scheme {
        posconform::scheme::SchemeSpec::Rotary(RotarySpec { pairing, .. }) => Some(*pairing),
        _ => None,
    }
}

/// Every scheme and operation, rotary narrowed to half-split pairs.
fn half_split_only() -> Vec<Support> {
    full_support()
        .into_iter()
        .map(|s| {
            if s.scheme == Scheme::Rotary {
                s.with_parameter("pairing", vec![json!("half_split")])
            } else {
                s
            }
        })
        .collect()
}

fn run(kernel: &mut dyn Kernel, cases: &[Case], fuzz: usize) -> CheckOutcome {
    let options = CheckOptions {
        fuzz_cases: fuzz,
        seed: 7,
        ..Default::default()
    };
    check(kernel, cases, &options, &mut |_, _, _| {}).unwrap()
}

fn gap(what: &str, declared: bool) -> Gap {
    Gap {
        what: what.into(),
        declared,
    }
}

/// A kernel that declares only half-split rotary is never sent an adjacent case, by
/// the suite or by the fuzzer, and the report lists adjacent pairing as never
/// exercised (not declared). Without the declaration the same fuzzer does draw
/// adjacent cases, which such a kernel can only decline.
#[test]
fn a_half_split_only_kernel_is_never_sent_adjacent_cases_in_suite_or_fuzz() {
    let cases = suite("core").unwrap();
    let mut kernel = Recording::new(half_split_only(), &[Dtype::F64, Dtype::F32]);
    let outcome = run(&mut kernel, &cases, 200);
    let text = posconform::report::text::render(&outcome.report);
    let adjacent: Vec<&str> = kernel
        .received
        .iter()
        .filter(|(c, _)| pairing(c) == Some(Pairing::Adjacent))
        .map(|(c, _)| c.id.as_str())
        .collect();
    assert!(adjacent.is_empty(), "sent adjacent cases: {adjacent:?}");
    let rotary_fuzz = kernel
        .received
        .iter()
        .filter(|(c, _)| c.id.starts_with("fuzz.") && pairing(c).is_some())
        .count();
    assert!(rotary_fuzz > 0, "the fuzzer sent no rotary case at all");
    let fuzz = outcome.fuzz.unwrap();
    assert_eq!(
        (fuzz.skipped, fuzz.failed, fuzz.errors),
        (0, 0, 0),
        "{text}"
    );
    for case in cases
        .iter()
        .filter(|c| pairing(c) == Some(Pairing::Adjacent))
    {
        let report = outcome
            .report
            .cases
            .iter()
            .find(|r| r.case == case.id)
            .unwrap();
        match &report.verdict {
            Verdict::Skipped(reason) => assert!(
                reason.contains("not declared: rotary pairing \"adjacent\""),
                "{reason}"
            ),
            other => panic!("{}: {other:?}", case.id),
        }
    }
    assert!(
        outcome
            .report
            .never_exercised
            .contains(&gap("rotary pairing \"adjacent\"", false)),
        "{text}"
    );
    assert!(
        text.contains("not declared: rotary pairing \"adjacent\""),
        "{text}"
    );
    assert_eq!(outcome.report.exit_code(), EXIT_CONFORMING, "{text}");

    // The same fuzzer, no declaration, a kernel that can only decline adjacent cases.
    let mut decliner = Recording::new(full_support(), &[Dtype::F64, Dtype::F32]);
    decliner.decline_adjacent = true;
    let declined = run(&mut decliner, &[], 200).fuzz.unwrap().skipped;
    assert!(declined > 0, "the fuzzer never drew an adjacent case");
}

/// Per-entry dtypes decide what each operation is sent in: rotary `encode` in f64,
/// `scores` and `attention` in f32 (or bf16 when the case is written for it).
#[test]
fn per_operation_dtypes_decide_the_dtype_each_case_is_sent_in() {
    let supports = vec![
        Support::new(Scheme::Rotary, &[posconform::case::OperationKind::Encode])
            .with_dtypes(&[Dtype::F64]),
        Support::new(
            Scheme::Rotary,
            &[
                posconform::case::OperationKind::Scores,
                posconform::case::OperationKind::Attention,
            ],
        )
        .with_dtypes(&[Dtype::F32, Dtype::Bf16]),
    ];
    let cases = suite("core").unwrap();
    let mut kernel = Recording::new(supports, &[Dtype::F16]);
    let outcome = run(&mut kernel, &cases, 60);
    let text = posconform::report::text::render(&outcome.report);
    assert!(kernel.received.len() > 10, "{text}");
    for (case, dtype) in &kernel.received {
        let allowed: &[Dtype] = match case.operation.name() {
            "encode" => &[Dtype::F64],
            "scores" | "attention" => &[Dtype::F32, Dtype::Bf16],
            other => panic!("{other} was never declared but {} was sent", case.id),
        };
        assert!(allowed.contains(dtype), "{} sent in {dtype}", case.id);
        if case.dtype == Dtype::Bf16 && case.operation.name() == "attention" {
            assert_eq!(
                *dtype,
                Dtype::Bf16,
                "{}: its own dtype is declared",
                case.id
            );
        }
    }
    let sent = |id: &str| {
        kernel
            .received
            .iter()
            .find(|(c, _)| c.id == id)
            .map(|x| x.1)
    };
    assert_eq!(sent("rotary.encode.f16_past_2048"), Some(Dtype::F64));
    assert_eq!(sent("rotary.attention.bf16"), Some(Dtype::Bf16));
    assert_eq!(sent("rotary.scores.scaled"), Some(Dtype::F32));
    // f16 is declared at the top level only, and no entry uses it.
    assert!(
        !outcome
            .report
            .never_exercised
            .contains(&gap("dtype f16", false)),
        "{text}"
    );
    assert!(
        outcome
            .report
            .never_exercised
            .contains(&gap("rotary decode", false)),
        "{text}"
    );
}

/// Two entries for one scheme: any pairing in `encode`, half-split only in `attention`.
#[test]
fn entries_can_narrow_a_parameter_for_one_operation_only() {
    let supports = vec![
        Support::new(Scheme::Rotary, &[posconform::case::OperationKind::Encode]),
        Support::new(
            Scheme::Rotary,
            &[posconform::case::OperationKind::Attention],
        )
        .with_parameter("pairing", vec![json!("half_split")]),
    ];
    let cases = suite("core").unwrap();
    let mut kernel = Recording::new(supports, &[Dtype::F64, Dtype::F32]);
    let outcome = run(&mut kernel, &cases, 0);
    let sent: Vec<&str> = kernel.received.iter().map(|(c, _)| c.id.as_str()).collect();
    assert!(sent.contains(&"rotary.encode.adjacent"), "{sent:?}");
    assert!(
        sent.contains(&"rotary.attention.half_split_f32"),
        "{sent:?}"
    );
    assert!(!sent.contains(&"rotary.attention.f32"), "{sent:?}");
    assert!(
        !sent.contains(&"rotary.attention.ntk_aware_partial"),
        "{sent:?}"
    );
    // Adjacent pairs ran in encode, so the pairing itself was exercised.
    assert!(!outcome
        .report
        .never_exercised
        .iter()
        .any(|g| g.what.starts_with("rotary pairing")));
}

/// What was not declared is listed as such; what was declared but no compared case
/// covered is listed as declared; what ran is not listed. `scale` does not keep
/// `encode` cases from being sent.
#[test]
fn undeclared_and_unrun_combinations_are_listed_as_never_exercised() {
    let supports = vec![Support::new(
        Scheme::Alibi,
        &[
            posconform::case::OperationKind::Encode,
            posconform::case::OperationKind::Stream,
            posconform::case::OperationKind::Decode,
        ],
    )
    .with_parameter("scale", vec![json!("fixed")])];
    let cases = suite("core").unwrap();
    let mut kernel = Recording::new(supports.clone(), &[Dtype::F64]);
    let outcome = run(&mut kernel, &cases, 0);
    let gaps = &outcome.report.never_exercised;
    let sent: Vec<&str> = kernel.received.iter().map(|(c, _)| c.id.as_str()).collect();
    assert!(sent.contains(&"alibi.encode.h12"), "{sent:?}");
    assert!(sent.contains(&"alibi.stream.fixed_scale"), "{sent:?}");
    // The core decode case uses 1/sqrt(d): not declared, not sent.
    assert!(!sent.contains(&"alibi.decode.chunks"), "{sent:?}");
    for expected in [
        gap("alibi scale \"inverse_sqrt_dim\"", false),
        gap("alibi scores", false),
        gap("rotary", false),
        gap("dtype f32", false),
        gap("alibi decode", true),
    ] {
        assert!(
            gaps.contains(&expected),
            "{expected:?} missing from {gaps:?}"
        );
    }
    for covered in ["alibi encode", "alibi stream", "alibi scale \"fixed\""] {
        assert!(
            !gaps.iter().any(|g| g.what == covered),
            "{covered}: {gaps:?}"
        );
    }

    // One case only: the rest of what is declared is listed as declared, never run.
    let one: Vec<Case> = cases
        .iter()
        .filter(|c| c.id == "alibi.encode.h8")
        .cloned()
        .collect();
    let mut single = Recording::new(supports.clone(), &[Dtype::F64]);
    let replay = run(&mut single, &one, 0);
    for what in ["alibi stream", "alibi decode", "alibi scale \"fixed\""] {
        assert!(
            replay.report.never_exercised.contains(&gap(what, true)),
            "{what}: {:?}",
            replay.report.never_exercised
        );
    }
    let text = posconform::report::text::render(&replay.report);
    assert!(text.contains("Never exercised"), "{text}");
    assert!(text.contains("declared, never run: alibi stream"), "{text}");

    // Nothing run at all: a declared scheme is listed once, as declared, never run.
    let mut idle = Recording::new(supports, &[Dtype::F64]);
    let nothing = run(&mut idle, &[], 0);
    assert!(
        nothing.report.never_exercised.contains(&gap("alibi", true)),
        "{:?}",
        nothing.report.never_exercised
    );
    assert!(!nothing
        .report
        .never_exercised
        .iter()
        .any(|g| g.what.starts_with("alibi ")));
}

/// A handshake without capabilities means what it always meant: every parameter value,
/// the top-level dtypes, operation names it does not know ignored.
#[test]
fn old_handshakes_keep_their_meaning() {
    let result = json!({
        "protocol": 1, "name": "old", "version": "1",
        "supports": [{"scheme": "rotary", "operations": ["encode", "attention", "bench"], "extra": 1}],
        "dtypes": ["f32", "f64"]
    });
    let info = parse_handshake(&result, "old").unwrap();
    assert!(info.supports[0].parameters.is_empty());
    assert!(info.supports[0].dtypes.is_empty());
    for case in suite("core").unwrap() {
        let listed = case.scheme.scheme() == Scheme::Rotary
            && matches!(case.operation.name(), "encode" | "attention");
        assert_eq!(info.supports(&case), listed, "{}", case.id);
        if listed {
            let want = if [Dtype::F32, Dtype::F64].contains(&case.dtype) {
                case.dtype
            } else {
                Dtype::F32
            };
            assert_eq!(info.dtype_for(&case), want, "{}", case.id);
        }
    }
}

/// Every way a capability declaration can be malformed stops the check with an error
/// naming the field.
#[test]
fn malformed_capabilities_are_handshake_errors_naming_the_field() {
    let rotary = |entry: serde_json::Value| {
        let mut e = json!({"scheme": "rotary", "operations": ["encode"]});
        e.as_object_mut()
            .unwrap()
            .extend(entry.as_object().unwrap().clone());
        json!({"protocol": 1, "name": "k", "supports": [e], "dtypes": ["f32"]})
    };
    let cases = [
        (
            rotary(json!({"parameters": {"pairing": ["half-split"]}})),
            "supports[0].parameters.pairing[0]: \"half-split\" is not one of \"adjacent\", \"half_split\"",
        ),
        (
            rotary(json!({"parameters": {"pairng": ["half_split"]}})),
            "supports[0].parameters.pairng: rotary has no parameter \"pairng\"",
        ),
        (
            rotary(json!({"parameters": {"pairing": []}})),
            "supports[0].parameters.pairing is empty",
        ),
        (
            rotary(json!({"parameters": {"pairing": "half_split"}})),
            "supports[0].parameters.pairing must be a list",
        ),
        (
            rotary(json!({"parameters": ["pairing"]})),
            "supports[0].parameters must be an object",
        ),
        (
            rotary(json!({"parameters": {"rotary_dim": [{"min": 64, "max": 32}]}})),
            "supports[0].parameters.rotary_dim[0]: range min 64 is above max 32",
        ),
        (
            rotary(json!({"parameters": {"scaling": ["yarn"]}})),
            "supports[0].parameters.scaling[0]: \"yarn\" is not",
        ),
        (
            rotary(json!({"parameters": {"scale": [{"fixed": "big"}]}})),
            "supports[0].parameters.scale[0]",
        ),
        (
            rotary(json!({"dtypes": ["f8"]})),
            "supports[0].dtypes[0]: \"f8\" is not one of",
        ),
        (rotary(json!({"dtypes": []})), "supports[0].dtypes is empty"),
        (
            rotary(json!({"operations": "encode"})),
            "supports[0].operations must be a list",
        ),
        (
            rotary(json!({"scheme": "rope"})),
            "supports[0].scheme: \"rope\" is not one of",
        ),
        (
            json!({"protocol": 1, "name": "k", "supports": {"rotary": ["encode"]}, "dtypes": ["f32"]}),
            "`supports` must be a list",
        ),
    ];
    for (result, expected) in cases {
        let err = parse_handshake(&result, "kernel-x")
            .unwrap_err()
            .to_string();
        assert!(
            err.contains("kernel-x") && err.contains("handshake") && err.contains(expected),
            "expected {expected:?} in: {err}"
        );
    }
    // The forms the protocol page lists are accepted.
    let fine = json!({"protocol": 1, "name": "k", "dtypes": ["f32"], "supports": [
        {"scheme": "rotary", "operations": OPERATION_NAMES, "dtypes": ["bf16"], "parameters": {
            "pairing": ["half_split"], "scaling": ["none", {"linear_interpolation": {"factor": 4.0}}],
            "rotary_dim": ["full", {"max": 64}], "base": [10000], "scale": ["fixed", "inverse_sqrt_dim"]}},
        {"scheme": "xl_relative", "operations": ["scores"], "parameters": {"clamp_len": [null, {"min": 0}]}},
        {"scheme": "bucketed", "operations": ["scores"], "parameters": {"bidirectional": [false], "num_buckets": [32]}}
    ]});
    parse_handshake(&fine, "k").unwrap();
}

fn capability_json() -> impl Strategy<Value = serde_json::Value> {
    use serde_json::Value;
    let leaf = prop_oneof![
        Just(Value::Null),
        any::<bool>().prop_map(Value::Bool),
        any::<i64>().prop_map(Value::from),
        any::<f64>()
            .prop_map(|x| serde_json::Number::from_f64(x).map_or(Value::Null, Value::Number)),
        prop_oneof![
            Just("half_split"),
            Just("full"),
            Just("partial"),
            Just("fixed"),
            Just("none"),
            Just("ntk_aware"),
            Just("f32"),
            Just("rotary"),
            Just("encode")
        ]
        .prop_map(|s| Value::String(s.to_string())),
    ];
    leaf.prop_recursive(3, 24, 6, |inner| {
        prop_oneof![
            proptest::collection::vec(inner.clone(), 0..5).prop_map(Value::Array),
            proptest::collection::vec(
                (
                    prop_oneof![
                        Just("min"),
                        Just("max"),
                        Just("fixed"),
                        Just("factor"),
                        Just("pairing"),
                        Just("rotary_dim"),
                        Just("scale"),
                        Just("scaling"),
                        Just("clamp_len")
                    ],
                    inner
                ),
                0..4
            )
            .prop_map(|kv| Value::Object(
                kv.into_iter().map(|(k, v)| (k.to_string(), v)).collect()
            )),
        ]
    })
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(256))]

    /// Arbitrary JSON in an entry's `parameters` and `dtypes` gives a kernel description
    /// or an error, never a panic; a description that parses can be matched against
    /// every core case and reported on.
    #[test]
    fn arbitrary_capabilities_never_panic(
        scheme in prop_oneof![Just("rotary"), Just("xl_relative"), Just("bucketed"), Just("alibi")],
        parameters in capability_json(),
        dtypes in capability_json(),
    ) {
        let result = json!({"protocol": 1, "name": "k", "dtypes": ["f64"], "supports": [
            {"scheme": scheme, "operations": OPERATION_NAMES, "parameters": parameters, "dtypes": dtypes}]});
        let outcome = std::panic::catch_unwind(|| {
            if let Ok(info) = parse_handshake(&result, "k") {
                let cases = suite("core").unwrap();
                for case in &cases {
                    let _ = info.declares(case);
                    let _ = info.dtype_for(case);
                }
                let _ = posconform::kernel::capability::never_exercised(&info, &[]);
            }
        });
        prop_assert!(outcome.is_ok());
    }
}

/// The core suite covers every combination a kernel can declare, where it can: every
/// scheme with every operation, and every value of every enumerated parameter in an
/// operation that attends (not only in `encode`); rotary attention with memory runs in
/// f32 with both pairings.
#[test]
fn the_core_suite_exercises_every_declarable_combination() {
    let cases = suite("core").unwrap();
    for scheme in Scheme::ALL {
        for operation in OperationKind::ALL {
            assert!(
                cases
                    .iter()
                    .any(|c| c.scheme.scheme() == *scheme && c.operation.kind() == operation),
                "no core case for {} {operation}",
                scheme.name()
            );
        }
    }
    // A kernel declaring everything, computing in f64, shown only the attending cases:
    // nothing may be left unexercised but `encode` itself.
    let info = KernelInfo {
        name: "everything".into(),
        version: String::new(),
        supports: full_support(),
        dtypes: vec![Dtype::F64],
        conventions: Vec::new(),
    };
    let attending: Vec<(Case, Dtype)> = cases
        .iter()
        .filter(|c| c.operation.name() != "encode")
        .map(|c| (c.clone(), Dtype::F64))
        .collect();
    let gaps: Vec<Gap> = posconform::kernel::capability::never_exercised(&info, &attending)
        .into_iter()
        .filter(|g| !g.what.ends_with(" encode") && !g.what.starts_with("dtype "))
        .collect();
    assert!(gaps.is_empty(), "not covered outside encode: {gaps:?}");
    for wanted in [Pairing::Adjacent, Pairing::HalfSplit] {
        assert!(
            cases.iter().any(|c| pairing(c) == Some(wanted)
                && c.operation.name() == "attention"
                && c.memory_len > 0
                && c.dtype == Dtype::F32),
            "no f32 rotary attention with memory for {wanted:?}"
        );
    }
}
