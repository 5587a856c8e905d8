"""An ALiBi kernel written from docs/protocol.md and docs/conventions.md alone.

It exists to prove those two pages are enough: nothing here comes from posconform's
code or from the other examples. Python 3 standard library only (no numpy), so it is
slow on big shapes and fine on the suites' small ones.

    ./target/release/posconform check --kernel "python3 examples/from_docs/alibi_kernel.py"

Operations: encode, scores, attention, stream, decode, for the `alibi` scheme with
either scale. It computes in f64 and answers in the request's dtype (f64 or f32).
"""

import base64
import json
import math
import struct
import sys
import time

NEG_INF = float("-inf")

# docs/protocol.md, "Arrays": little-endian element formats for the struct module.
FORMATS = {"f64": "d", "f32": "f", "f16": "e", "i64": "q"}


def decode_array(obj):
    """A protocol array as (flat list of floats or ints, shape)."""
    dtype, shape = obj["dtype"], obj["shape"]
    count = 1
    for n in shape:
        count *= n
    if "values" in obj:
        special = {"inf": math.inf, "-inf": -math.inf, "nan": math.nan}
        flat = [special[v] if isinstance(v, str) else v for v in obj["values"]]
    else:
        raw = base64.b64decode(obj["data"])
        if dtype == "bf16":
            # The upper 16 bits of a binary32: shift left by 16, read as binary32.
            halves = struct.unpack("<%dH" % count, raw)
            flat = [struct.unpack("<f", struct.pack("<I", h << 16))[0] for h in halves]
        else:
            flat = list(struct.unpack("<%d%s" % (count, FORMATS[dtype]), raw))
    if len(flat) != count:
        raise ValueError("array of shape %s holds %d elements" % (shape, len(flat)))
    return flat, shape


def encode_array(flat, shape, dtype):
    data = struct.pack("<%d%s" % (len(flat), FORMATS[dtype]), *flat)
    return {"dtype": dtype, "shape": list(shape), "data": base64.b64encode(data).decode("ascii")}


def tensor3(flat, shape):
    """A [A, B, C] flat list as nested lists."""
    a, b, c = shape
    return [[flat[(x * b + y) * c:(x * b + y + 1) * c] for y in range(b)] for x in range(a)]


def flatten(nested):
    out = []
    for block in nested:
        for row in block:
            out.extend(row)
    return out


# docs/conventions.md, "alibi": slopes for H heads.
def power_of_two_slopes(n):
    return [2.0 ** (-8.0 * (h + 1) / n) for h in range(n)]


def slopes(heads):
    if heads & (heads - 1) == 0:
        return power_of_two_slopes(heads)
    c = 1
    while c * 2 < heads:
        c *= 2
    return power_of_two_slopes(c) + power_of_two_slopes(2 * c)[0::2][: heads - c]


# docs/conventions.md, "Scale".
def scale_factor(scale, d):
    if scale == "inverse_sqrt_dim":
        return 1.0 / math.sqrt(d)
    return float(scale["fixed"])


def dot(a, b):
    return sum(x * y for x, y in zip(a, b))


def attend(q, k, v, q_pos, k_pos, slope, factor, hidden=()):
    """One head: scores, probabilities and outputs of queries at q_pos over keys at
    k_pos. A key is visible iff pos_q - pos_k >= 0 and it is not hidden."""
    scores, probs, outputs = [], [], []
    width = len(v[0]) if v else 0
    for qi, pq in zip(q, q_pos):
        row = []
        for j, (kj, pk) in enumerate(zip(k, k_pos)):
            delta = pq - pk
            if delta < 0 or j in hidden:
                row.append(NEG_INF)
            else:
                row.append(factor * dot(qi, kj) - slope * delta)
        scores.append(row)
        top = max(row)
        if top == NEG_INF:
            # Fully masked: zero probabilities, zero output (never NaN).
            probs.append([0.0] * len(row))
            outputs.append([0.0] * width)
            continue
        weights = [math.exp(s - top) if s != NEG_INF else 0.0 for s in row]
        total = sum(weights)
        p = [w / total for w in weights]
        probs.append(p)
        if v:
            outputs.append([sum(p[j] * v[j][c] for j in range(len(p))) for c in range(width)])
    return scores, probs, outputs


def run(case, dtype, inputs):
    if case["scheme"]["name"] != "alibi":
        raise Unsupported("only alibi")
    kind = case["operation"]["kind"]
    heads, d, p0 = case["heads"], case["head_dim"], case["query_start"]
    m = slopes(heads)
    if kind == "encode":
        return {"slopes": (m, [heads])}
    factor = scale_factor(case["scheme"]["scale"], d)
    q = tensor3(*inputs["q"])
    k = tensor3(*inputs["k"])
    v = tensor3(*inputs["v"]) if "v" in inputs else None
    if kind in ("scores", "attention"):
        L, M = case["query_len"], case["memory_len"]
        q_pos = [p0 + i for i in range(L)]
        k_pos = [p0 - M + j for j in range(M + L)]
        hidden = set(case.get("hidden_keys", []))
        results = [attend(q[h], k[h], v[h] if v else None, q_pos, k_pos, m[h], factor, hidden)
                   for h in range(heads)]
        if kind == "scores":
            return {"scores": (flatten([r[0] for r in results]), [heads, L, M + L])}
        return {"probs": (flatten([r[1] for r in results]), [heads, L, M + L]),
                "output": (flatten([r[2] for r in results]), [heads, L, d])}
    if kind == "stream":
        T, L, M = case["operation"]["tokens"], case["query_len"], case["memory_len"]
        out = [[None] * T for _ in range(heads)]
        for start in range(0, T, L):
            end = min(start + L, T)
            first = max(0, start - M)  # the newest min(start, M) earlier tokens
            for h in range(heads):
                _, _, o = attend(q[h][start:end], k[h][first:end], v[h][first:end],
                                 [p0 + t for t in range(start, end)],
                                 [p0 + t for t in range(first, end)], m[h], factor)
                out[h][start:end] = o
        return {"output": (flatten(out), [heads, T, d])}
    if kind == "decode":
        op = case["operation"]
        T, P = op["tokens"], op["prefill"]
        out = [[] for _ in range(heads)]
        for h in range(heads):
            cache_k, cache_v, cache_pos = k[h][:P], v[h][:P], [p0 + t for t in range(P)]
            t = P
            for size in op["chunks"]:
                chunk = range(t, t + size)
                cache_k = cache_k + k[h][t:t + size]
                cache_v = cache_v + v[h][t:t + size]
                cache_pos = cache_pos + [p0 + u for u in chunk]
                _, _, o = attend(q[h][t:t + size], cache_k, cache_v,
                                 [p0 + u for u in chunk], cache_pos, m[h], factor)
                out[h].extend(o)
                t += size
        return {"output": (flatten(out), [heads, T - P, d])}
    raise Unsupported("no operation " + kind)


class Unsupported(Exception):
    pass


HANDSHAKE = {
    "protocol": 1,
    "name": "alibi-from-docs",
    "version": "1.0",
    "supports": [{"scheme": "alibi",
                  "operations": ["encode", "scores", "attention", "stream", "decode"],
                  "parameters": {"scale": ["inverse_sqrt_dim", "fixed"]}}],
    "dtypes": ["f64", "f32"],
    "conventions": ["masked scores are -inf"],
}


def answer(message):
    method, params = message.get("method"), message.get("params") or {}
    if method == "handshake":
        return {"result": HANDSHAKE}
    if method != "run":
        return {"error": {"code": -32601, "message": "method not found: %s" % method}}
    try:
        dtype = params["dtype"]
        inputs = {name: decode_array(obj) for name, obj in params["inputs"].items()}
        started = time.perf_counter()
        outputs = run(params["case"], dtype, inputs)
        elapsed = (time.perf_counter() - started) * 1e3
    except Unsupported as e:
        return {"error": {"code": -32001, "message": str(e)}}
    except Exception as e:  # this case failed; say why and keep serving
        return {"error": {"code": -32000, "message": "%s: %s" % (type(e).__name__, e)}}
    wire = "f32" if dtype == "f32" else "f64"
    encoded = {}
    for name, (flat, shape) in outputs.items():
        encoded[name] = encode_array(flat, shape, wire)
    return {"result": {"outputs": encoded, "elapsed_ms": elapsed}}


def main():
    for line in sys.stdin:
        if not line.strip():
            continue
        try:
            message = json.loads(line)
        except ValueError as e:
            reply = {"jsonrpc": "2.0", "id": None,
                     "error": {"code": -32700, "message": "parse error: %s" % e}}
        else:
            if "id" not in message:
                if message.get("method") == "shutdown":
                    return
                continue
            reply = {"jsonrpc": "2.0", "id": message["id"]}
            reply.update(answer(message))
        sys.stdout.write(json.dumps(reply) + "\n")
        sys.stdout.flush()


if __name__ == "__main__":
    main()
