//! Protocol v1 messages (docs/protocol.md) and the server side: [`serve`] answers the
//! harness on stdin/stdout for any [`Kernel`], so a Rust kernel plugs in with one call.

use std::collections::BTreeMap;
use std::io::{BufRead, Write};

use serde::Deserialize as _;
use serde_json::value::RawValue;
use serde_json::{json, Map, Value};

use crate::case::{Arrays, Case};
use crate::error::{Error, KernelErrorKind, Result};
use crate::kernel::{Answer, Kernel, KernelInfo};
use crate::math::precision::Dtype;
use crate::tensor::WireArray;

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

/// The framing a kernel declares in its handshake (`"framing": "binary"`) to move
/// arrays as raw bytes after the message line instead of base64 text (docs/protocol.md,
/// "Binary arrays"). The harness offers it in its handshake request.
pub const BINARY_FRAMING: &str = "binary";

/// A request line.
pub fn request(id: u64, method: &str, params: Value) -> String {
    json!({"jsonrpc": "2.0", "id": id, "method": method, "params": params}).to_string()
}

/// One message of the protocol: a JSON line and, under the binary framing, the blocks
/// that follow it (their lengths are the line's `blocks` member).
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Message {
    /// The JSON text, without its line feed.
    pub line: String,
    /// Raw blocks sent after the line, in order.
    pub blocks: Vec<Vec<u8>>,
}

impl Message {
    /// The bytes on the wire: the line, a line feed, then each block.
    pub fn len(&self) -> usize {
        self.line.len() + 1 + self.blocks.iter().map(Vec::len).sum::<usize>()
    }

    /// Whether the message is empty (never: a line feed is always sent).
    pub fn is_empty(&self) -> bool {
        false
    }
}

/// Arrays as JSON array objects: base64 text, or under the binary framing `"block"`
/// references whose bytes go to `blocks`.
fn encode_arrays(arrays: &Arrays, blocks: Option<&mut Vec<Vec<u8>>>) -> Map<String, Value> {
    match blocks {
        None => arrays
            .iter()
            .map(|(n, t)| (n.clone(), t.to_json()))
            .collect(),
        Some(blocks) => arrays
            .iter()
            .map(|(n, t)| {
                let (object, bytes) = t.to_block(blocks.len());
                blocks.push(bytes);
                (n.clone(), object)
            })
            .collect(),
    }
}

/// `message` with a `blocks` member listing the lengths of `blocks` (none when empty),
/// as one line.
fn framed(mut message: Value, blocks: Vec<Vec<u8>>) -> Message {
    if !blocks.is_empty() {
        let lengths: Vec<usize> = blocks.iter().map(Vec::len).collect();
        message["blocks"] = json!(lengths);
    }
    Message {
        line: message.to_string(),
        blocks,
    }
}

/// The `run` request for `case`, its arrays as base64 text or, with `binary`, as
/// blocks after the line.
pub fn run_request(id: u64, case: &Case, dtype: Dtype, inputs: &Arrays, binary: bool) -> Message {
    case_request(id, "run", case, dtype, inputs, None, binary)
}

/// A `run` request, or with `outputs` (the arrays to answer) a `dry_run` request, its
/// arrays as base64 text or, with `binary`, as blocks after the line.
pub fn case_request(
    id: u64,
    method: &str,
    case: &Case,
    dtype: Dtype,
    inputs: &Arrays,
    outputs: Option<&BTreeMap<String, crate::kernel::ArraySpec>>,
    binary: bool,
) -> Message {
    let mut blocks = Vec::new();
    let inputs = encode_arrays(inputs, binary.then_some(&mut blocks));
    let mut params = json!({"case": case, "dtype": dtype, "inputs": inputs});
    if let Some(outputs) = outputs {
        params["outputs"] = json!(outputs);
    }
    framed(
        json!({"jsonrpc": "2.0", "id": id, "method": method, "params": params}),
        blocks,
    )
}

/// The lengths of the blocks that follow `line` (its top-level `blocks` member), or
/// `None` when it has none or is not a JSON object.
pub fn block_lengths(line: &[u8]) -> Option<Vec<u64>> {
    #[derive(serde::Deserialize)]
    struct Framing {
        #[serde(default)]
        blocks: Option<Vec<u64>>,
    }
    serde_json::from_slice::<Framing>(line).ok()?.blocks
}

/// Whether a handshake result declares the binary framing.
pub fn declares_binary(result: &Value) -> bool {
    result.get("framing").and_then(Value::as_str) == Some(BINARY_FRAMING)
}

/// Whether a handshake request offers the binary framing (`"framing"` lists it).
pub fn offers_binary(params: &Value) -> bool {
    params
        .get("framing")
        .and_then(Value::as_array)
        .is_some_and(|f| f.iter().any(|x| x.as_str() == Some(BINARY_FRAMING)))
}

/// The parameters of a `run` request (arrays as base64 text).
pub fn run_params(case: &Case, dtype: Dtype, inputs: &Arrays) -> Value {
    let inputs = encode_arrays(inputs, None);
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

/// What a kernel said in answer to one request, parsed from one stdout line.
#[derive(Debug)]
pub enum Reply<'a> {
    /// The `result` member, still as JSON text (parsed by the caller into typed data).
    Result(&'a RawValue),
    /// A JSON-RPC error object.
    Error {
        /// Its `code` (0 when missing or not an integer).
        code: i64,
        /// Its `message`.
        message: String,
    },
}

/// The members of a response the harness reads; anything else is ignored. `result`
/// stays raw text so a large reply is parsed once, straight into typed arrays.
#[derive(serde::Deserialize)]
#[serde(expecting = "a JSON-RPC response object")]
struct Envelope<'a> {
    #[serde(borrow, default)]
    id: Option<&'a RawValue>,
    #[serde(borrow, default)]
    result: Option<&'a RawValue>,
    #[serde(default)]
    error: Option<Value>,
}

/// Parses one stdout line as the response to request `id` of `method`; `who` names
/// the kernel. Anything else is an [`Error::Kernel`] of kind
/// [`KernelErrorKind::Garbage`] that keeps the JSON parser's own reason.
pub fn parse_reply<'a>(line: &'a [u8], id: u64, method: &str, who: &str) -> Result<Reply<'a>> {
    let garbage = |reason: String| Error::kernel(KernelErrorKind::Garbage, who, reason);
    let quote = |line: &[u8]| {
        let end = line.len().min(200);
        let mut shown = String::from_utf8_lossy(&line[..end]).trim().to_string();
        if line.len() > end {
            shown.push_str(" ...");
        }
        shown
    };
    let envelope: Envelope<'a> = serde_json::from_slice(line).map_err(|e| {
        garbage(format!(
            "printed something that is not a JSON-RPC response on stdout (answering `{method}`): {e}: {:?}",
            quote(line)
        ))
    })?;
    let wanted = Value::from(id);
    let given: Option<Value> = envelope
        .id
        .and_then(|raw| serde_json::from_str(raw.get()).ok());
    if given.as_ref() != Some(&wanted) {
        let given = envelope.id.map_or("no id".to_string(), |raw| {
            format!("id {}", quote(raw.get().as_bytes()))
        });
        return Err(garbage(format!(
            "answered `{method}` request {id} with {given}"
        )));
    }
    if let Some(error) = envelope.error.filter(|e| !e.is_null()) {
        let code = error.get("code").and_then(Value::as_i64).unwrap_or(0);
        let message = match error.get("message") {
            Some(Value::String(m)) => m.clone(),
            Some(other) => other.to_string(),
            None => String::new(),
        };
        return Ok(Reply::Error { code, message });
    }
    match envelope.result {
        Some(result) => Ok(Reply::Result(result)),
        None => Err(garbage(format!(
            "reply to `{method}` has neither `result` nor `error`"
        ))),
    }
}

/// Parses a handshake result; `who` names the kernel in errors.
pub fn parse_handshake(result: &Value, who: &str) -> Result<KernelInfo> {
    let bad = |reason: String| {
        Error::kernel(
            KernelErrorKind::Handshake,
            who,
            format!("handshake: {reason}"),
        )
    };
    match result.get("protocol") {
        Some(Value::Number(n)) if n.as_u64() == Some(PROTOCOL_VERSION) => {}
        Some(Value::Number(n)) => {
            return Err(bad(format!(
                "speaks protocol {n}; this build speaks {PROTOCOL_VERSION} (the JSON integer {PROTOCOL_VERSION})"
            )))
        }
        Some(Value::String(text)) => {
            return Err(bad(format!(
                "gives `protocol` as the string {:?}; this build speaks protocol {PROTOCOL_VERSION}, written as the JSON integer {PROTOCOL_VERSION}",
                text.chars().take(40).collect::<String>()
            )))
        }
        Some(other) => {
            let mut shown = other.to_string();
            shown.truncate(60);
            return Err(bad(format!(
                "`protocol` is {shown}; this build speaks protocol {PROTOCOL_VERSION}, written as the JSON integer {PROTOCOL_VERSION}"
            )));
        }
        None => {
            return Err(bad(format!(
                "missing `protocol` (this build speaks protocol {PROTOCOL_VERSION})"
            )))
        }
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

/// The members of a `run` result the harness reads, parsed in one pass into typed
/// arrays.
#[derive(serde::Deserialize)]
#[serde(expecting = "a run result object {outputs, elapsed_ms}")]
struct RunResult {
    #[serde(default)]
    outputs: Option<BTreeMap<String, WireArray>>,
    #[serde(default)]
    elapsed_ms: Option<Value>,
}

fn outputs_of(result: RunResult, blocks: &mut [Option<Vec<u8>>], who: &str) -> Result<Answer> {
    let malformed = |reason: String| Error::kernel(KernelErrorKind::MalformedResult, who, reason);
    let object = result
        .outputs
        .ok_or_else(|| malformed("run result has no `outputs` object".into()))?;
    let mut outputs = Arrays::new();
    for (name, wire) in object {
        let tensor = wire
            .into_tensor_from(blocks, &format!("kernel reply, field `outputs.{name}`"))
            .map_err(|e| malformed(format!("malformed reply: {e}")))?;
        outputs.insert(name, tensor);
    }
    Ok(Answer::Outputs {
        outputs,
        elapsed_ms: result.elapsed_ms.as_ref().and_then(Value::as_f64),
    })
}

/// Parses a `run` result (the raw `result` text of a reply) into outputs; `who` names
/// the kernel in errors.
pub fn parse_run_result(result: &RawValue, who: &str) -> Result<Answer> {
    parse_run_result_from(result, Vec::new(), who)
}

/// [`parse_run_result`] for a reply that came with binary blocks.
pub fn parse_run_result_from(result: &RawValue, blocks: Vec<Vec<u8>>, who: &str) -> Result<Answer> {
    let parsed: RunResult = serde_json::from_str(result.get()).map_err(|e| {
        Error::kernel(
            KernelErrorKind::MalformedResult,
            who,
            format!("malformed run result: {e}"),
        )
    })?;
    let mut blocks: Vec<Option<Vec<u8>>> = blocks.into_iter().map(Some).collect();
    outputs_of(parsed, &mut blocks, who)
}

/// Parses a `run` result into outputs; `who` names the kernel in errors.
pub fn parse_outputs(result: &Value, who: &str) -> Result<Answer> {
    let parsed = RunResult::deserialize(result).map_err(|e| {
        Error::kernel(
            KernelErrorKind::MalformedResult,
            who,
            format!("malformed run result: {e}"),
        )
    })?;
    outputs_of(parsed, &mut [], who)
}

fn response(id: &Value, outcome: std::result::Result<Value, (i64, String)>) -> Value {
    match outcome {
        Ok(result) => json!({"jsonrpc": "2.0", "id": id, "result": result}),
        Err((code, message)) => {
            json!({"jsonrpc": "2.0", "id": id, "error": {"code": code, "message": message}})
        }
    }
}

/// Serves `kernel` over the protocol: reads requests from `input`, writes one response
/// line per request to `output`, returns on `shutdown` or end of input. When the
/// harness offers the binary framing the handshake declares it, and arrays then move
/// as blocks both ways.
pub fn serve(kernel: &mut dyn Kernel, input: impl BufRead, mut output: impl Write) -> Result<()> {
    let io = |e| Error::io("write", std::path::Path::new("<stdout>"), e);
    let mut input = input;
    let mut bytes = Vec::new();
    let mut binary = false;
    loop {
        bytes.clear();
        let read = input
            .read_until(b'\n', &mut bytes)
            .map_err(|e| Error::io("read", std::path::Path::new("<stdin>"), e))?;
        if read == 0 {
            break;
        }
        if bytes.iter().all(u8::is_ascii_whitespace) {
            continue;
        }
        let mut blocks = Vec::new();
        for length in block_lengths(&bytes).unwrap_or_default() {
            let mut block = vec![0u8; usize::try_from(length).unwrap_or(usize::MAX)];
            input
                .read_exact(&mut block)
                .map_err(|e| Error::io("read", std::path::Path::new("<stdin>"), e))?;
            blocks.push(Some(block));
        }
        let message: Value = match serde_json::from_slice(&bytes) {
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
        let mut reply_blocks = Vec::new();
        let outcome = match method {
            "handshake" => {
                binary = offers_binary(&params);
                kernel
                    .describe()
                    .map(|info| {
                        let mut result = handshake_result(&info);
                        if binary {
                            result["framing"] = json!(BINARY_FRAMING);
                        }
                        result
                    })
                    .map_err(|e| (KERNEL_FAILED, e.to_string()))
            }
            "run" => serve_run(
                kernel,
                &params,
                &mut blocks,
                binary.then_some(&mut reply_blocks),
            ),
            "dry_run" => serve_dry_run(&params, &mut blocks, binary.then_some(&mut reply_blocks)),
            other => Err((METHOD_NOT_FOUND, format!("unknown method `{other}`"))),
        };
        let reply = framed(response(&id, outcome), reply_blocks);
        writeln!(output, "{}", reply.line).map_err(io)?;
        for block in &reply.blocks {
            output.write_all(block).map_err(io)?;
        }
        output.flush().map_err(io)?;
    }
    Ok(())
}

/// Answers a `dry_run`: reads the request as `run` does, then answers zeros of the
/// requested dtypes and shapes without asking the kernel.
fn serve_dry_run(
    params: &Value,
    blocks: &mut [Option<Vec<u8>>],
    reply_blocks: Option<&mut Vec<Vec<u8>>>,
) -> std::result::Result<Value, (i64, String)> {
    let invalid = |m: String| (INVALID_PARAMS, m);
    read_run_params(params, blocks)?;
    let requested = params
        .get("outputs")
        .and_then(Value::as_object)
        .ok_or_else(|| invalid("`outputs` must be an object of {dtype, shape}".into()))?;
    let mut zeros = Arrays::new();
    for (name, spec) in requested {
        let dtype: Dtype =
            serde_json::from_value(spec.get("dtype").cloned().unwrap_or(Value::Null))
                .map_err(|e| invalid(format!("`outputs.{name}.dtype`: {e}")))?;
        let shape: Vec<usize> =
            serde_json::from_value(spec.get("shape").cloned().unwrap_or(Value::Null))
                .map_err(|e| invalid(format!("`outputs.{name}.shape`: {e}")))?;
        crate::tensor::element_count(&shape, &format!("`outputs.{name}.shape`"))
            .map_err(|e| invalid(e.to_string()))?;
        let zero = ndarray::ArrayD::<f64>::zeros(shape);
        zeros.insert(name.clone(), crate::tensor::Tensor::from_f64(dtype, zero));
    }
    Ok(json!({ "outputs": encode_arrays(&zeros, reply_blocks) }))
}

type RunParams = (Case, Dtype, Arrays);

fn read_run_params(
    params: &Value,
    blocks: &mut [Option<Vec<u8>>],
) -> std::result::Result<RunParams, (i64, String)> {
    let invalid = |m: String| (INVALID_PARAMS, m);
    let case: Case = serde_json::from_value(params.get("case").cloned().unwrap_or(Value::Null))
        .map_err(|e| invalid(format!("`case`: {e}")))?;
    let dtype: Dtype = serde_json::from_value(params.get("dtype").cloned().unwrap_or(Value::Null))
        .map_err(|e| invalid(format!("`dtype`: {e}")))?;
    let mut inputs = Arrays::new();
    if let Some(object) = params.get("inputs").and_then(Value::as_object) {
        for (name, v) in object {
            let t = WireArray::deserialize(v)
                .map_err(|e| e.to_string())
                .and_then(|wire| {
                    wire.into_tensor_from(blocks, &format!("inputs.{name}"))
                        .map_err(|e| e.to_string())
                })
                .map_err(invalid)?;
            inputs.insert(name.clone(), t);
        }
    }
    Ok((case, dtype, inputs))
}

fn serve_run(
    kernel: &mut dyn Kernel,
    params: &Value,
    blocks: &mut [Option<Vec<u8>>],
    reply_blocks: Option<&mut Vec<Vec<u8>>>,
) -> std::result::Result<Value, (i64, String)> {
    let (case, dtype, inputs) = read_run_params(params, blocks)?;
    let started = std::time::Instant::now();
    match kernel.run(&case, dtype, &inputs) {
        Ok(Answer::Outputs {
            outputs,
            elapsed_ms,
        }) => {
            let object = encode_arrays(&outputs, reply_blocks);
            let elapsed = elapsed_ms.unwrap_or(started.elapsed().as_secs_f64() * 1e3);
            Ok(json!({"outputs": object, "elapsed_ms": elapsed}))
        }
        Ok(Answer::Unsupported(reason)) => Err((UNSUPPORTED, reason)),
        Err(e) => Err((KERNEL_FAILED, e.to_string())),
    }
}
