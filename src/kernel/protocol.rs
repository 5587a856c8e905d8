//! Protocol v1 messages (docs/protocol.md) and the server side: [`serve`] answers the
//! harness on stdin/stdout for any [`Kernel`], so a Rust kernel plugs in with one call.

use std::io::{BufRead, Write};

use serde_json::{json, Map, Value};

use crate::case::{Arrays, Case};
use crate::error::{Error, Result};
use crate::kernel::{Answer, Kernel, KernelInfo};
use crate::precision::Dtype;
use crate::tensor::Tensor;

/// The protocol version this build speaks.
pub const PROTOCOL_VERSION: u64 = 1;
/// JSON-RPC error code: the kernel does not implement this case (reported as skipped).
pub const UNSUPPORTED: i64 = -32001;
/// JSON-RPC error code: the kernel failed on this case.
pub const KERNEL_FAILED: i64 = -32000;
/// JSON-RPC standard code: the request line is not JSON.
pub const PARSE_ERROR: i64 = -32700;
/// JSON-RPC standard code: unknown method.
pub const METHOD_NOT_FOUND: i64 = -32601;
/// JSON-RPC standard code: bad parameters.
pub const INVALID_PARAMS: i64 = -32602;

/// A request line.
pub fn request(id: u64, method: &str, params: Value) -> String {
    json!({"jsonrpc": "2.0", "id": id, "method": method, "params": params}).to_string()
}

/// The parameters of a `run` request.
pub fn run_params(case: &Case, dtype: Dtype, inputs: &Arrays) -> Value {
    let inputs: Map<String, Value> = inputs
        .iter()
        .map(|(n, t)| (n.clone(), t.to_json()))
        .collect();
    json!({"case": case, "dtype": dtype, "inputs": inputs})
}

/// The handshake result a kernel sends.
pub fn handshake_result(info: &KernelInfo) -> Value {
    json!({
        "protocol": PROTOCOL_VERSION,
        "name": info.name,
        "version": info.version,
        "supports": info.supports,
        "dtypes": info.dtypes,
        "conventions": info.conventions,
    })
}

/// Parses a handshake result; `who` names the kernel in errors.
pub fn parse_handshake(result: &Value, who: &str) -> Result<KernelInfo> {
    let bad = |reason: String| Error::Kernel {
        kernel: who.to_string(),
        reason: format!("handshake: {reason}"),
    };
    match result.get("protocol").and_then(Value::as_u64) {
        Some(PROTOCOL_VERSION) => {}
        Some(v) => {
            return Err(bad(format!(
                "speaks protocol {v}; this build speaks {PROTOCOL_VERSION}"
            )))
        }
        None => return Err(bad("missing `protocol`".into())),
    }
    let text = |field: &str| {
        result
            .get(field)
            .and_then(Value::as_str)
            .map(str::to_string)
    };
    let supports =
        crate::kernel::capability::parse_supports(result.get("supports")).map_err(bad)?;
    let dtypes: Vec<Dtype> = serde_json::from_value(
        result.get("dtypes").cloned().unwrap_or(Value::Null),
    )
    .map_err(|e| {
        bad(format!(
            "`dtypes` must be a list of f64, f32, f16, bf16: {e}"
        ))
    })?;
    if dtypes.is_empty() {
        return Err(bad("`dtypes` is empty".into()));
    }
    let conventions: Vec<String> = match result.get("conventions") {
        None | Some(Value::Null) => Vec::new(),
        Some(v) => serde_json::from_value(v.clone())
            .map_err(|e| bad(format!("`conventions` must be a list of strings: {e}")))?,
    };
    Ok(KernelInfo {
        name: text("name").ok_or_else(|| bad("missing `name`".into()))?,
        version: text("version").unwrap_or_default(),
        supports,
        dtypes,
        conventions,
    })
}

/// Parses a `run` result into outputs; `who` names the kernel in errors.
pub fn parse_outputs(result: &Value, who: &str) -> Result<Answer> {
    let object = result
        .get("outputs")
        .and_then(Value::as_object)
        .ok_or_else(|| Error::Kernel {
            kernel: who.to_string(),
            reason: "run result has no `outputs` object".into(),
        })?;
    let mut outputs = Arrays::new();
    for (name, v) in object {
        let tensor = Tensor::from_json(v, &format!("kernel reply, field `outputs.{name}`"))
            .map_err(|e| Error::Kernel {
                kernel: who.to_string(),
                reason: format!("malformed reply: {e}"),
            })?;
        outputs.insert(name.clone(), tensor);
    }
    Ok(Answer::Outputs {
        outputs,
        elapsed_ms: result.get("elapsed_ms").and_then(Value::as_f64),
    })
}

fn response(id: &Value, outcome: std::result::Result<Value, (i64, String)>) -> String {
    match outcome {
        Ok(result) => json!({"jsonrpc": "2.0", "id": id, "result": result}).to_string(),
        Err((code, message)) => {
            json!({"jsonrpc": "2.0", "id": id, "error": {"code": code, "message": message}})
                .to_string()
        }
    }
}

/// Serves `kernel` over the protocol: reads requests from `input`, writes one response
/// line per request to `output`, returns on `shutdown` or end of input.
pub fn serve(kernel: &mut dyn Kernel, input: impl BufRead, mut output: impl Write) -> Result<()> {
    let io = |e| Error::io("write", std::path::Path::new("<stdout>"), e);
    for line in input.lines() {
        let line = line.map_err(|e| Error::io("read", std::path::Path::new("<stdin>"), e))?;
        if line.trim().is_empty() {
            continue;
        }
        let message: Value = match serde_json::from_str(&line) {
            Ok(m) => m,
            Err(e) => {
                writeln!(
                    output,
                    "{}",
                    response(&Value::Null, Err((PARSE_ERROR, format!("not JSON: {e}"))))
                )
                .map_err(io)?;
                output.flush().map_err(io)?;
                continue;
            }
        };
        let method = message.get("method").and_then(Value::as_str).unwrap_or("");
        let Some(id) = message.get("id").cloned() else {
            if method == "shutdown" {
                return Ok(());
            }
            continue;
        };
        let params = message.get("params").cloned().unwrap_or(Value::Null);
        let outcome = match method {
            "handshake" => kernel
                .describe()
                .map(|info| handshake_result(&info))
                .map_err(|e| (KERNEL_FAILED, e.to_string())),
            "run" => serve_run(kernel, &params),
            other => Err((METHOD_NOT_FOUND, format!("unknown method `{other}`"))),
        };
        writeln!(output, "{}", response(&id, outcome)).map_err(io)?;
        output.flush().map_err(io)?;
    }
    Ok(())
}

fn serve_run(kernel: &mut dyn Kernel, params: &Value) -> std::result::Result<Value, (i64, String)> {
    let invalid = |m: String| (INVALID_PARAMS, m);
    let case: Case = serde_json::from_value(params.get("case").cloned().unwrap_or(Value::Null))
        .map_err(|e| invalid(format!("`case`: {e}")))?;
    let dtype: Dtype = serde_json::from_value(params.get("dtype").cloned().unwrap_or(Value::Null))
        .map_err(|e| invalid(format!("`dtype`: {e}")))?;
    let mut inputs = Arrays::new();
    if let Some(object) = params.get("inputs").and_then(Value::as_object) {
        for (name, v) in object {
            let t = Tensor::from_json(v, &format!("inputs.{name}"))
                .map_err(|e| invalid(e.to_string()))?;
            inputs.insert(name.clone(), t);
        }
    }
    let started = std::time::Instant::now();
    match kernel.run(&case, dtype, &inputs) {
        Ok(Answer::Outputs {
            outputs,
            elapsed_ms,
        }) => {
            let object: Map<String, Value> = outputs
                .iter()
                .map(|(n, t)| (n.clone(), t.to_json()))
                .collect();
            let elapsed = elapsed_ms.unwrap_or(started.elapsed().as_secs_f64() * 1e3);
            Ok(json!({"outputs": object, "elapsed_ms": elapsed}))
        }
        Ok(Answer::Unsupported(reason)) => Err((UNSUPPORTED, reason)),
        Err(e) => Err((KERNEL_FAILED, e.to_string())),
    }
}
