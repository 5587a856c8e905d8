"""Serve an attention kernel to ``posconform check`` over its stdio protocol (v1).

This module does all the plumbing of docs/protocol.md -- line-delimited JSON-RPC 2.0,
the handshake, array (de)serialisation, error codes -- so that wrapping your own
PyTorch, JAX or numpy function takes a few lines. It needs Python 3 and numpy, nothing
else (tested with Python 3.11 and numpy 2; your own function may use anything), and it
works on its own, without the package's native extension: examples/python/
posconform_kernel.py loads this very file from a checkout of the repository.

It is the subprocess path. In the same process, ``posconform.check`` calls the same
handlers directly (docs/python.md); ``posconform.Kernel(...).serve()`` serves a kernel
declared for that path over this protocol.

Example (a kernel that only implements half-split rotary ``encode``)::

    import numpy as np
    from posconform.protocol import Unsupported, serve

    def rotary_encode(case, dtype, inputs):
        x, positions = inputs["x"], inputs["positions"]     # np.ndarray each
        if case["scheme"]["pairing"] != "half_split":
            raise Unsupported("only half-split pairing")     # an older harness may ask
        rotated = my_rope(x.astype(np.float32), positions)    # your function
        return {"rotated": rotated}                           # answered as f32

    serve("my-kernel", "0.1.0", None, ["f32"], {("rotary", "encode"): rotary_encode},
          parameters={"rotary": {"pairing": ["half_split"]}})  # never sent adjacent

Handlers
    ``handler(case, dtype, inputs) -> {name: array}``. ``case`` is the case object of
    the request (a dict, as in a vector file), ``dtype`` the dtype to compute in
    (``"f64"``, ``"f32"``, ...), ``inputs`` the named input arrays as numpy arrays in
    their wire dtype (bf16 arrives upcast to float32, i64 as int64). ``handler`` is
    one function for everything, or a dict keyed by ``(scheme, operation)`` or nested
    ``{scheme: {operation: fn}}``; with a dict, ``supports`` may be ``None`` and is
    derived from its keys.

Capabilities
    ``parameters={scheme: {parameter: [accepted values]}}`` narrows what the handshake
    declares (docs/protocol.md, "Capabilities"): the harness then never sends a case
    with another value, and its report lists what was never exercised. For full control
    pass ``supports`` as the protocol's own list of entries (``[{"scheme": ...,
    "operations": [...], "parameters": {...}, "dtypes": [...]}]``), sent as is.
    Declaring is a promise to the harness, not a filter in this module.

Outputs
    Each output is answered in the dtype its array carries (float64 -> f64,
    float32 -> f32, float16 -> f16, any integer -> i64). To answer in another dtype,
    return ``(array, "bf16")`` instead of the array; bf16 is rounded to nearest even.

Errors
    Raise :class:`Unsupported` to decline a case (JSON-RPC error -32001, reported as
    skipped). Any other exception is answered as -32000 with its message; the
    traceback goes to stderr, which the harness keeps in its run log.

Timing
    Each ``run`` reply carries ``elapsed_ms``, the time the handler took
    (``time.perf_counter`` around the call: decoding the request and encoding the reply
    are left out). A ``dry_run`` request (sent by ``posconform bench``) is read like a
    ``run`` and answered with zeros of the requested shapes, without calling the
    handler: its round trip is the protocol's own cost. For a GPU kernel, synchronise
    before returning so that ``elapsed_ms`` covers the computation.

Binary arrays
    When the harness offers it, the handshake declares the binary framing
    (docs/protocol.md, "Binary arrays"): arrays then travel as raw bytes after the
    message line instead of base64 text, which a large case needs (a reply of several
    gigabytes) and every case profits from. ``serve(..., binary=False)`` keeps
    base64 text.

stdout belongs to the protocol: while :func:`serve` runs, ``print`` and anything a
native library writes to file descriptor 1 are sent to stderr instead.
"""

from __future__ import annotations

import base64
import json
import os
import sys
import time
import traceback
from typing import Any, Callable, Mapping

import numpy as np

__all__ = [
    "PROTOCOL",
    "Unsupported",
    "decode_array",
    "encode_array",
    "numpy_dtype",
    "call_handler",
    "serve",
]

PROTOCOL = 1
BINARY_FRAMING = "binary"

UNSUPPORTED = -32001
KERNEL_FAILED = -32000
PARSE_ERROR = -32700
INVALID_REQUEST = -32600
METHOD_NOT_FOUND = -32601
INVALID_PARAMS = -32602

_WIRE = {"f64": "<f8", "f32": "<f4", "f16": "<f2", "i64": "<i8", "bf16": "<u2"}
_SPECIAL = {"inf": np.inf, "+inf": np.inf, "-inf": -np.inf, "nan": np.nan}


class Unsupported(Exception):
    """Raised by a handler for a case it does not implement (answered as -32001)."""


class _RpcError(Exception):
    def __init__(self, code: int, message: str):
        super().__init__(message)
        self.code = code
        self.message = message


def numpy_dtype(name: str) -> np.dtype:
    """The numpy dtype to compute in for a protocol dtype name.

    numpy has no bf16, so bf16 maps to float32: a kernel computing "bf16" this way is
    more accurate than a real bf16 kernel, never less.
    """
    table = {"f64": np.float64, "f32": np.float32, "f16": np.float16,
             "bf16": np.float32, "i64": np.int64}
    if name not in table:
        raise ValueError(f"unknown dtype {name!r}")
    return np.dtype(table[name])


def _bf16_bits_to_f32(bits: np.ndarray) -> np.ndarray:
    return (bits.astype(np.uint32) << 16).view(np.float32)


def _f32_to_bf16_bits(x: np.ndarray) -> np.ndarray:
    bits = np.ascontiguousarray(x, dtype=np.float32).view(np.uint32)
    # Round to nearest, ties to even, on the 16 bits that are dropped.
    rounded = ((bits + 0x7FFF + ((bits >> 16) & 1)) >> 16).astype(np.uint16)
    # The carry above could turn a NaN payload into inf; keep NaN a quiet NaN.
    return np.where(np.isnan(x), np.uint16(0x7FC0), rounded)


def decode_array(obj: Mapping[str, Any], base_dir: str | None = None,
                 blocks: list | None = None) -> np.ndarray:
    """A protocol array object as a numpy array.

    Accepts ``{"dtype", "shape", "data": base64}`` (little-endian, row-major),
    ``{"dtype", "shape", "values": [...]}`` (numbers or "inf"/"-inf"/"nan"),
    ``{"dtype", "shape", "block": i}`` (the binary framing: the bytes are
    ``blocks[i]``) and, for vector files, ``{"npy": file}`` relative to ``base_dir``.
    bf16 becomes float32 (exact), i64 int64, f16 float16, f32 float32, f64 float64.
    """
    if not isinstance(obj, Mapping):
        raise ValueError("an array must be a JSON object")
    if "npy" in obj:
        return np.load(os.path.join(base_dir or ".", obj["npy"]), allow_pickle=False)
    dtype = obj.get("dtype")
    if dtype not in _WIRE:
        raise ValueError(f"array dtype {dtype!r} is not one of {sorted(_WIRE)}")
    shape = obj.get("shape")
    if not isinstance(shape, list) or not all(isinstance(n, int) and n >= 0 for n in shape):
        raise ValueError(f"array shape {shape!r} is not a list of non-negative integers")
    count = int(np.prod(shape, dtype=np.int64))
    if "block" in obj:
        index = obj["block"]
        if "data" in obj or "values" in obj:
            raise ValueError("an array gives `block` alone, without `data` or `values`")
        if not isinstance(index, int) or isinstance(index, bool) or not (
                0 <= index < len(blocks or [])):
            raise ValueError(f"array block {index!r} is not one of the message's "
                             f"{len(blocks or [])} blocks")
        raw = blocks[index]
    elif ("data" in obj) == ("values" in obj):
        raise ValueError("an array needs exactly one of `data` and `values`")
    if "block" in obj or "data" in obj:
        if "data" in obj:
            raw = base64.b64decode(obj["data"], validate=True)
        width = np.dtype(_WIRE[dtype]).itemsize
        if len(raw) != count * width:
            raise ValueError(
                f"array data holds {len(raw)} bytes; shape {shape} of {dtype} needs {count * width}")
        flat = np.frombuffer(raw, dtype=_WIRE[dtype])
        if dtype == "bf16":
            flat = _bf16_bits_to_f32(flat)
        else:
            flat = flat.astype(flat.dtype.newbyteorder("="))
    else:
        values = obj["values"]
        if not isinstance(values, list) or len(values) != count:
            raise ValueError(f"array values: shape {shape} needs a flat list of {count}")
        if any(isinstance(v, str) for v in values):
            values = [_SPECIAL[v] if isinstance(v, str) else v for v in values]
        if dtype == "i64":
            flat = np.array(values, dtype=np.int64)
        else:
            flat = np.array(values, dtype=np.float64).astype(numpy_dtype(dtype))
    return flat.reshape(shape)


def _dtype_of(arr: np.ndarray) -> str:
    if arr.dtype == np.float64:
        return "f64"
    if arr.dtype == np.float32:
        return "f32"
    if arr.dtype == np.float16:
        return "f16"
    if np.issubdtype(arr.dtype, np.integer) or arr.dtype == np.bool_:
        return "i64"
    if np.issubdtype(arr.dtype, np.floating):
        return "f64"
    raise ValueError(f"cannot send an array of numpy dtype {arr.dtype}")


def encode_array(arr: Any, dtype: str | None = None, blocks: list | None = None) -> dict:
    """A numpy array (or anything ``np.asarray`` takes) as a protocol array object.

    ``dtype`` defaults to the array's own (integers as i64). bf16 is rounded from
    float32 to nearest even; other conversions are numpy casts. With ``blocks`` (a
    list) the bytes are appended to it and the object names their block (the binary
    framing); otherwise they are base64 text.
    """
    arr = np.asarray(arr)
    dtype = dtype or _dtype_of(arr)
    if dtype == "bf16":
        payload = _f32_to_bf16_bits(arr.astype(np.float32))
    elif dtype in _WIRE:
        payload = arr.astype(_WIRE[dtype], copy=False)
    else:
        raise ValueError(f"unknown dtype {dtype!r}")
    payload = np.ascontiguousarray(payload)
    if blocks is not None:
        blocks.append(memoryview(payload).cast("B"))
        return {"dtype": dtype, "shape": list(arr.shape), "block": len(blocks) - 1}
    data = base64.b64encode(payload.tobytes()).decode("ascii")
    return {"dtype": dtype, "shape": list(arr.shape), "data": data}


def _scheme_name(case: Mapping[str, Any]) -> str:
    return case["scheme"]["name"]


def _operation_name(case: Mapping[str, Any]) -> str:
    return case["operation"]["kind"]


def _flatten_handlers(handler: Any) -> dict | None:
    if callable(handler):
        return None
    table = {}
    for key, value in handler.items():
        if isinstance(key, tuple):
            table[key] = value
        else:
            for op, fn in value.items():
                table[(key, op)] = fn
    return table


def call_handler(handler: Any, case: dict, dtype: str, inputs: dict) -> dict:
    """Runs ``handler`` (a function or a dict of them) on one case, in-process.

    Returns the outputs as given by the handler (arrays, or ``(array, dtype)``).
    Useful to test a kernel without the harness.
    """
    table = _flatten_handlers(handler)
    if table is None:
        return handler(case, dtype, inputs)
    key = (_scheme_name(case), _operation_name(case))
    if key not in table:
        raise Unsupported(f"no handler for {key[0]} {key[1]}")
    return table[key](case, dtype, inputs)


def _encode_outputs(outputs: Any, blocks: list | None = None) -> dict:
    if not isinstance(outputs, Mapping):
        raise TypeError(f"a handler must return a dict of arrays, not {type(outputs).__name__}")
    encoded = {}
    for name, value in outputs.items():
        if isinstance(value, tuple):
            array, dtype = value
            encoded[name] = encode_array(array, dtype, blocks)
        else:
            encoded[name] = encode_array(value, None, blocks)
    return encoded


def _entries(supports, parameters) -> list:
    """The handshake's ``supports`` list from a dict or a list of protocol entries."""
    if isinstance(supports, Mapping):
        entries = [{"scheme": s, "operations": list(ops)} for s, ops in supports.items()]
    else:
        entries = [dict(entry) for entry in supports]
        for entry in entries:
            if not isinstance(entry.get("scheme"), str) or not isinstance(
                    entry.get("operations"), list):
                raise ValueError(f"a supports entry needs `scheme` and `operations`: {entry!r}")
    for scheme, narrowed in (parameters or {}).items():
        matching = [e for e in entries if e["scheme"] == scheme]
        if not matching:
            raise ValueError(f"parameters given for {scheme!r}, which supports does not list")
        for entry in matching:
            entry["parameters"] = {**entry.get("parameters", {}), **narrowed}
    return entries


class _Server:
    def __init__(self, name, version, supports, dtypes, handler, parameters=None,
                 binary=True):
        table = _flatten_handlers(handler)
        if supports is None:
            if table is None:
                raise ValueError("supports is required when handler is a single function")
            supports = {}
            for scheme, op in table:
                supports.setdefault(scheme, []).append(op)
        entries = _entries(supports, parameters)
        self.supported = {(e["scheme"], op) for e in entries for op in e["operations"]}
        self.description = {
            "protocol": PROTOCOL,
            "name": name,
            "version": version,
            "supports": entries,
            "dtypes": list(dtypes),
        }
        # Every dtype some entry declares may be asked for.
        self.dtypes = list(dtypes) + [d for e in entries for d in e.get("dtypes", [])
                                      if d not in dtypes]
        self.handler = handler
        self.allow_binary = binary
        # Set by the handshake: whether arrays travel as binary blocks from then on.
        self.binary = False
        # The blocks of the request being served, and of its reply.
        self.blocks: list = []
        self.reply_blocks: list = []

    def handshake(self, params):
        if isinstance(params, Mapping) and params.get("protocol", PROTOCOL) != PROTOCOL:
            _log(f"harness speaks protocol {params.get('protocol')}; this kernel speaks {PROTOCOL}")
        offered = params.get("framing") if isinstance(params, Mapping) else None
        self.binary = self.allow_binary and isinstance(offered, list) and \
            BINARY_FRAMING in offered
        if self.binary:
            return {**self.description, "framing": BINARY_FRAMING}
        return self.description

    def run(self, params):
        if not isinstance(params, Mapping):
            raise _RpcError(INVALID_PARAMS, "run: params must be an object")
        case, dtype, wire = params.get("case"), params.get("dtype"), params.get("inputs", {})
        if not isinstance(case, Mapping) or not isinstance(wire, Mapping):
            raise _RpcError(INVALID_PARAMS, "run: params need `case` and `inputs` objects")
        try:
            key = (_scheme_name(case), _operation_name(case))
        except (KeyError, TypeError):
            raise _RpcError(INVALID_PARAMS, "run: case needs scheme.name and operation.kind")
        if key not in self.supported:
            raise Unsupported(f"{key[0]} {key[1]} is not in this kernel's supports")
        if dtype not in self.dtypes:
            raise Unsupported(f"dtype {dtype!r} is not one this kernel declared ({self.dtypes})")
        try:
            inputs = {name: decode_array(obj, blocks=self.blocks) for name, obj in wire.items()}
        except (ValueError, TypeError, KeyError) as e:
            raise _RpcError(INVALID_PARAMS, f"run: bad input array: {e}")
        start = time.perf_counter()
        outputs = call_handler(self.handler, dict(case), dtype, inputs)
        elapsed_ms = (time.perf_counter() - start) * 1e3
        blocks = [] if self.binary else None
        encoded = _encode_outputs(outputs, blocks)
        self.reply_blocks = blocks or []
        return {"outputs": encoded, "elapsed_ms": elapsed_ms}

    def dry_run(self, params):
        """Reads a request as ``run`` does and answers zeros of the requested outputs.

        The handler is not called: the round trip is what the exchange alone costs
        (docs/protocol.md, "Dry run"), which ``posconform bench`` subtracts.
        """
        if not isinstance(params, Mapping):
            raise _RpcError(INVALID_PARAMS, "dry_run: params must be an object")
        wire, requested = params.get("inputs", {}), params.get("outputs")
        if not isinstance(wire, Mapping) or not isinstance(requested, Mapping):
            raise _RpcError(INVALID_PARAMS, "dry_run: params need `inputs` and `outputs` objects")
        try:
            for obj in wire.values():
                decode_array(obj, blocks=self.blocks)
            blocks = [] if self.binary else None
            zeros = {name: encode_array(np.zeros(spec["shape"], numpy_dtype(spec["dtype"])),
                                        spec["dtype"], blocks)
                     for name, spec in requested.items()}
            self.reply_blocks = blocks or []
        except (ValueError, TypeError, KeyError) as e:
            raise _RpcError(INVALID_PARAMS, f"dry_run: bad array: {e}")
        return {"outputs": zeros}

    def respond(self, line: bytes, blocks: list | None = None) -> tuple[dict | None, bool]:
        """The response to one request line (None for a notification) and whether to stop.

        ``blocks`` are the binary blocks that came after the line; the reply's own are
        left in ``self.reply_blocks``.
        """
        self.blocks = blocks or []
        self.reply_blocks = []
        try:
            message = json.loads(line)
        except (ValueError, UnicodeDecodeError) as e:
            return _error(None, PARSE_ERROR, f"parse error: {e}"), False
        if not isinstance(message, dict):
            return _error(None, INVALID_REQUEST, "a request must be a JSON object"), False
        has_id = "id" in message
        rid = message.get("id")
        if message.get("jsonrpc") != "2.0" or not isinstance(message.get("method"), str):
            return _error(rid if _valid_id(rid) else None, INVALID_REQUEST,
                          "not a JSON-RPC 2.0 request (jsonrpc \"2.0\" and a method name)"), False
        method = message["method"]
        if not has_id:
            if method == "shutdown":
                return None, True
            _log(f"ignoring notification {method!r}")
            return None, False
        if method == "shutdown":
            # Sent as a request by mistake: answer it, then stop as asked.
            return {"jsonrpc": "2.0", "id": rid, "result": None}, True
        methods = {"handshake": self.handshake, "run": self.run, "dry_run": self.dry_run}
        if method not in methods:
            return _error(rid, METHOD_NOT_FOUND, f"method not found: {method}"), False
        try:
            result = methods[method](message.get("params"))
        except _RpcError as e:
            return _error(rid, e.code, e.message), False
        except Unsupported as e:
            return _error(rid, UNSUPPORTED, str(e) or "unsupported"), False
        except Exception as e:  # the kernel's own failure: report it and keep serving
            traceback.print_exc(file=sys.stderr)
            return _error(rid, KERNEL_FAILED, f"{type(e).__name__}: {e}"), False
        return {"jsonrpc": "2.0", "id": rid, "result": result}, False


def _valid_id(rid: Any) -> bool:
    return rid is None or isinstance(rid, (str, int)) and not isinstance(rid, bool)


def _error(rid: Any, code: int, message: str) -> dict:
    return {"jsonrpc": "2.0", "id": rid, "error": {"code": code, "message": message}}


def _log(text: str) -> None:
    print(f"[posconform.protocol] {text}", file=sys.stderr, flush=True)


def _protocol_streams():
    """(reader, writer) for the protocol, with fd 1 redirected to stderr.

    A stray print or a native library writing to stdout would corrupt the stream the
    harness parses, so the real stdout is kept for responses only.
    """
    reader = sys.stdin.buffer
    try:
        sys.stdout.flush()
        proto_fd = os.dup(1)
        os.dup2(2, 1)
        writer = os.fdopen(proto_fd, "wb", buffering=0)
    except (OSError, ValueError, AttributeError):
        writer = sys.stdout.buffer
    sys.stdout = sys.stderr
    return reader, writer


def _block_lengths(line: bytes) -> list:
    """The lengths of the blocks announced by a message line (its ``blocks`` member)."""
    if b'"blocks"' not in line:
        return []
    try:
        message = json.loads(line)
    except (ValueError, UnicodeDecodeError):
        return []
    lengths = message.get("blocks") if isinstance(message, dict) else None
    if isinstance(lengths, list) and all(isinstance(n, int) and n >= 0 for n in lengths):
        return lengths
    return []


def _read_exactly(reader, count: int) -> bytes:
    chunks, left = [], count
    while left > 0:
        chunk = reader.read(left)
        if not chunk:
            raise EOFError(f"input ended {left} bytes before the end of a binary block")
        chunks.append(chunk)
        left -= len(chunk)
    return b"".join(chunks)


def serve(name: str, version: str, supports: Mapping[str, list] | list | None,
          dtypes: list[str], handler: Callable | Mapping, *,
          parameters: Mapping[str, Mapping[str, list]] | None = None,
          reader=None, writer=None, binary: bool = True) -> None:
    """Answers requests until a ``shutdown`` notification or end of input.

    ``supports`` maps scheme names to operation names, e.g. ``{"rotary": ["encode",
    "scores"]}`` (``None`` with a dict ``handler``: derived from it), or is the
    protocol's list of ``supports`` entries. ``dtypes`` lists what the kernel computes
    in, preferred first. ``parameters`` maps a scheme to the parameter values it
    accepts, e.g. ``{"rotary": {"pairing": ["half_split"]}}``. ``reader``/``writer``
    (binary file objects) default to stdin/stdout. ``binary=False`` never declares
    the binary framing (arrays stay base64 text).
    """
    server = _Server(name, version, supports, dtypes, handler, parameters, binary)
    if reader is None or writer is None:
        default_reader, default_writer = _protocol_streams()
        reader = reader or default_reader
        writer = writer or default_writer
    while True:
        try:
            line = reader.readline()
        except KeyboardInterrupt:
            return
        if not line:
            return
        if not line.strip():
            continue
        try:
            blocks = [_read_exactly(reader, n) for n in _block_lengths(line)]
        except EOFError as e:
            _log(str(e))
            return
        response, stop = server.respond(line, blocks)
        if response is not None:
            reply_blocks = server.reply_blocks
            if reply_blocks and "result" in response:
                response = {**response, "blocks": [len(b) for b in reply_blocks]}
            else:
                reply_blocks = []
            try:
                text = json.dumps(response, separators=(",", ":"), allow_nan=False)
            except ValueError as e:
                reply_blocks = []
                text = json.dumps(_error(response.get("id"), KERNEL_FAILED,
                                         f"result not serialisable: {e}"))
            try:
                writer.write(text.encode("utf-8") + b"\n")
                for block in reply_blocks:
                    writer.write(block)
                writer.flush()
            except BrokenPipeError:
                return
        if stop:
            return
