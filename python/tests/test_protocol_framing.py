"""The protocol helper's binary framing (docs/protocol.md, "Binary arrays"): declared
only when the harness offers it, arrays as raw blocks after the line both ways, and
base64 text for a harness that does not offer it or a kernel that opts out."""

from __future__ import annotations

import base64
import io
import json

import numpy as np

import posconform.protocol as protocol

CASE = {"id": "framing.test", "scheme": {"name": "alibi", "scale": "inverse_sqrt_dim"},
        "operation": {"kind": "scores"}}


def doubled(case, dtype, inputs):
    return {"scores": inputs["q"] * 2.0, "half": (inputs["q"].astype(np.float32) / 2, "f32")}


def exchange(messages: list[bytes], **options) -> list[tuple[dict, list[bytes]]]:
    """Serves the helper on ``messages`` and splits what it wrote into (line, blocks)."""
    out = io.BytesIO()
    protocol.serve("framing-test", "0", {"alibi": ["scores"]}, ["f64"], doubled,
                   reader=io.BytesIO(b"".join(messages)), writer=out, **options)
    data, replies = out.getvalue(), []
    while data:
        line, data = data.split(b"\n", 1)
        reply = json.loads(line)
        blocks = []
        for length in reply.get("blocks", []):
            blocks.append(data[:length])
            data = data[length:]
        replies.append((reply, blocks))
    return replies


def handshake(offer: bool) -> bytes:
    params = {"protocol": 1, "harness": "test"}
    if offer:
        params["framing"] = ["binary"]
    return json.dumps({"jsonrpc": "2.0", "id": 0, "method": "handshake",
                       "params": params}).encode() + b"\n"


Q = np.arange(6, dtype=np.float64).reshape(1, 2, 3) - 2.5


def binary_run() -> bytes:
    line = {"jsonrpc": "2.0", "id": 1, "method": "run", "blocks": [Q.nbytes],
            "params": {"case": CASE, "dtype": "f64",
                       "inputs": {"q": {"dtype": "f64", "shape": [1, 2, 3], "block": 0}}}}
    return json.dumps(line).encode() + b"\n" + Q.astype("<f8").tobytes()


def text_run() -> bytes:
    data = base64.b64encode(Q.astype("<f8").tobytes()).decode()
    line = {"jsonrpc": "2.0", "id": 1, "method": "run",
            "params": {"case": CASE, "dtype": "f64",
                       "inputs": {"q": {"dtype": "f64", "shape": [1, 2, 3], "data": data}}}}
    return json.dumps(line).encode() + b"\n"


def test_offered_binary_framing_is_declared_and_carries_arrays_both_ways():
    (hello, _), (reply, blocks) = exchange([handshake(True), binary_run()])
    assert hello["result"]["framing"] == "binary"
    outputs = reply["result"]["outputs"]
    assert reply["blocks"] == [len(b) for b in blocks] == [48, 24]
    scores = np.frombuffer(blocks[outputs["scores"]["block"]], "<f8").reshape(1, 2, 3)
    half = np.frombuffer(blocks[outputs["half"]["block"]], "<f4").reshape(1, 2, 3)
    assert outputs["scores"]["shape"] == [1, 2, 3] and outputs["half"]["dtype"] == "f32"
    np.testing.assert_array_equal(scores, Q * 2.0)
    np.testing.assert_array_equal(half, (Q / 2).astype(np.float32))


def test_without_the_offer_arrays_stay_base64_text():
    (hello, _), (reply, blocks) = exchange([handshake(False), text_run()])
    assert "framing" not in hello["result"]
    assert blocks == [] and "blocks" not in reply
    scores = protocol.decode_array(reply["result"]["outputs"]["scores"])
    np.testing.assert_array_equal(scores, Q * 2.0)


def test_a_kernel_may_opt_out_of_the_binary_framing():
    (hello, _), (reply, blocks) = exchange([handshake(True), text_run()], binary=False)
    assert "framing" not in hello["result"] and blocks == []
    assert "data" in reply["result"]["outputs"]["scores"]


def test_a_block_reference_out_of_range_is_a_clear_error():
    line = {"jsonrpc": "2.0", "id": 1, "method": "run", "blocks": [8],
            "params": {"case": CASE, "dtype": "f64",
                       "inputs": {"q": {"dtype": "f64", "shape": [1], "block": 3}}}}
    message = json.dumps(line).encode() + b"\n" + bytes(8)
    _, (reply, _) = exchange([handshake(True), message])
    assert reply["error"]["code"] == protocol.INVALID_PARAMS
    assert "block 3" in reply["error"]["message"]
