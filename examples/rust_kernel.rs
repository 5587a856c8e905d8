//! A minimal Rust kernel behind the posconform protocol.
//!
//! It implements one operation, rotary `encode`, with its own arithmetic (nothing
//! borrowed from posconform's reference), and lets `posconform::kernel::protocol::serve`
//! do all the plumbing. Try it:
//!
//! ```sh
//! cargo build --release --example rust_kernel
//! ./target/release/posconform check --kernel target/release/examples/rust_kernel
//! ```
//!
//! Its handshake declares what it does (docs/protocol.md, "Capabilities"): rotary
//! `encode` without context-extension scaling, in f64. The harness never sends it
//! anything else; the report lists the rest as skipped ("not declared") and names what
//! was never exercised. A case that slips through anyway (an older harness ignores
//! capabilities) is still declined with `-32001`.

use ndarray::{Array1, Array3};
use posconform::case::{Arrays, Case, Operation};
use posconform::kernel::{Answer, Kernel, KernelInfo, Support};
use posconform::math::Dtype;
use posconform::rotary::{Pairing, RotaryScaling};
use posconform::scheme::{rotary::RotarySpec, SchemeSpec};
use posconform::tensor::Tensor;
use posconform::{Result, Scheme};

/// Rotates each pair `(a, b)` of the first `rotary_dim` dims by `p·θ_j`.
struct MyRope;

impl Kernel for MyRope {
    fn describe(&mut self) -> Result<KernelInfo> {
        Ok(KernelInfo {
            name: "example-rust-rope".into(),
            version: "0.1.0".into(),
            supports: vec![Support::new(
                Scheme::Rotary,
                &[posconform::case::OperationKind::Encode],
            )
            .with_parameter("scaling", vec![serde_json::json!("none")])],
            dtypes: vec![Dtype::F64],
            conventions: Vec::new(),
        })
    }

    fn run(&mut self, case: &Case, _dtype: Dtype, inputs: &Arrays) -> Result<Answer> {
        let (
            SchemeSpec::Rotary(RotarySpec {
                rotary_dim,
                base,
                pairing,
                scaling,
                ..
            }),
            Operation::Encode,
        ) = (&case.scheme, &case.operation)
        else {
            return Ok(Answer::Unsupported("only rotary encode".into()));
        };
        if *scaling != RotaryScaling::None {
            return Ok(Answer::Unsupported("no context-extension scaling".into()));
        }
        // Malformed requests become JSON-RPC errors, never a panic.
        case.validate()?;
        let bad = |what: &str| {
            posconform::Error::kernel(
                posconform::KernelErrorKind::Failed,
                "example-rust-rope",
                what,
            )
        };
        let (x, positions) = match (inputs.get("x"), inputs.get("positions")) {
            (Some(x), Some(p)) => (x, p),
            _ => return Err(bad("inputs `x` and `positions` are required")),
        };
        let x = x
            .view()
            .into_dimensionality::<ndarray::Ix3>()
            .map_err(|_| bad("`x` must be [H, L, d]"))?;
        let positions: Array1<f64> = positions.view().iter().copied().collect();
        if x.dim() != (case.heads, case.query_len, case.head_dim)
            || positions.len() != case.query_len
        {
            return Err(bad(
                "`x` must be [H, L, d] and `positions` [L] for this case",
            ));
        }
        let half = rotary_dim / 2;
        let mut out: Array3<f64> = x.to_owned();
        for ((h, n, _), _) in x.indexed_iter().filter(|((_, _, c), _)| *c == 0) {
            for j in 0..half {
                let theta = base.powf(-((2 * j) as f64) / *rotary_dim as f64);
                let (sin, cos) = (positions[n] * theta).sin_cos();
                let (a, b) = match pairing {
                    Pairing::Adjacent => (2 * j, 2 * j + 1),
                    Pairing::HalfSplit => (j, j + half),
                };
                let (xa, xb) = (x[[h, n, a]], x[[h, n, b]]);
                out[[h, n, a]] = xa * cos - xb * sin;
                out[[h, n, b]] = xa * sin + xb * cos;
            }
        }
        let mut outputs = Arrays::new();
        outputs.insert(
            "rotated".into(),
            Tensor::from_f64(Dtype::F64, out.into_dyn()),
        );
        Ok(Answer::Outputs {
            outputs,
            elapsed_ms: None,
        })
    }
}

fn main() -> std::process::ExitCode {
    let (stdin, stdout) = (std::io::stdin().lock(), std::io::stdout().lock());
    match posconform::kernel::protocol::serve(&mut MyRope, stdin, stdout) {
        Ok(()) => std::process::ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("example-rust-rope: {e}");
            std::process::ExitCode::FAILURE
        }
    }
}
