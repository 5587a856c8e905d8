"""A numpy kernel for every posconform scheme and operation, served over stdio.

Run it under the harness::

    posconform check --kernel "python3 examples/python/numpy_kernel.py"

It is written from the formulas of docs/conventions.md, not from posconform's code, and
it is built the way an incremental kernel is: ``decode`` keeps a KV cache (prefill, then
chunks whose positions continue from the cache length) and ``stream`` keeps a memory of
the newest M tokens' keys and values between segments. Both go through one attention
step over explicit absolute positions, so memory keys and cached keys carry their true
distances to each query.

Precision: it computes in the dtype it is asked for (f64 or f32). Positional quantities
(frequencies, angles, sin/cos, ALiBi distances) are always formed in float64 and then
cast, since angles formed in a narrow dtype lose phase with position (docs/budgets.md).

``--declare rotary.pairing=half_split`` (repeatable) narrows what the handshake declares,
to see how the harness treats a kernel that supports less (docs/protocol.md,
"Capabilities").
"""

from __future__ import annotations

import math
import os
import sys

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from posconform_kernel import Unsupported, numpy_dtype, serve  # noqa: E402

NAME = "posconform-numpy-example"
VERSION = "0.1.0"
DTYPES = ["f64", "f32"]
OPERATIONS = ["encode", "scores", "attention", "stream", "decode"]
SCHEMES = ["sinusoidal", "learned", "xl_relative", "rotary", "alibi", "bucketed", "clipped"]
SUPPORTS = {scheme: list(OPERATIONS) for scheme in SCHEMES}


# ---------------------------------------------------------------- positional pieces

def scale_factor(scale, head_dim: int) -> float:
    if scale is None or scale == "inverse_sqrt_dim":
        return 1.0 / math.sqrt(head_dim)
    if isinstance(scale, dict) and "fixed" in scale:
        return float(scale["fixed"])
    raise Unsupported(f"scale {scale!r}")


def frequencies(width: int, base: float) -> np.ndarray:
    """base^(-2i/width), i = 0..width/2-1, in float64."""
    if width <= 0 or width % 2:
        raise ValueError(f"sinusoid width must be even and > 0, got {width}")
    # math.pow is the C library's pow; numpy's vectorised power can be an ulp off, and
    # an ulp in a frequency becomes p ulps in the angle at position p.
    return np.array([math.pow(base, -(2 * i) / width) for i in range(width // 2)],
                    dtype=np.float64)


def sinusoid(positions: np.ndarray, width: int, base: float, layout: str) -> np.ndarray:
    """PE rows [N, width] in float64; positions convert to float64 exactly up to 2^53."""
    angles = np.asarray(positions, dtype=np.int64).astype(np.float64)[:, None] * \
        frequencies(width, base)[None, :]
    sin, cos = np.sin(angles), np.cos(angles)
    out = np.empty((angles.shape[0], width), dtype=np.float64)
    if layout == "interleaved":
        out[:, 0::2], out[:, 1::2] = sin, cos
    elif layout == "concatenated":
        out[:, : width // 2], out[:, width // 2:] = sin, cos
    else:
        raise Unsupported(f"sinusoid layout {layout!r}")
    return out


def alibi_slopes(heads: int) -> np.ndarray:
    """Press et al. 2022 §3: 2^(-8(h+1)/n) for a power of two n; otherwise the slopes of
    the largest power of two c below n, then every other slope of 2c, first n-c."""
    def geometric(n):
        # One exp2 per head, so no rounding accumulates along a running product.
        return np.exp2(-8.0 * np.arange(1, n + 1, dtype=np.float64) / n)
    if heads < 1:
        raise ValueError("ALiBi needs at least one head")
    if heads & (heads - 1) == 0:
        return geometric(heads)
    c = 1 << (heads.bit_length() - 1)
    return np.concatenate([geometric(c), geometric(2 * c)[0::2][: heads - c]])


def t5_bucket(relative: int, num_buckets: int, max_distance: int, bidirectional: bool) -> int:
    """T5 bucket of rel = pos_key - pos_query, with the published operation order."""
    n = -int(relative)
    per_direction = num_buckets // 2 if bidirectional else num_buckets
    offset = 0
    if bidirectional:
        if n < 0:
            offset = per_direction
        n = abs(n)
    else:
        n = max(n, 0)
    max_exact = per_direction // 2
    if n < max_exact:
        return offset + n
    # Kept in this order: at n = 16, 32, 64, 128 the exact value is an integer, and a
    # reordered expression can land just below it and truncate one bucket too low.
    fraction = math.log(n / max_exact) / math.log(max_distance / max_exact) * \
        (per_direction - max_exact)
    return offset + min(max_exact + int(fraction), per_direction - 1)


def t5_buckets(relative: np.ndarray, scheme: dict) -> np.ndarray:
    # Distances repeat a lot in a score matrix; bucket each distinct one once, in
    # Python floats, which are the same IEEE doubles as the published code.
    unique, inverse = np.unique(np.asarray(relative, dtype=np.int64), return_inverse=True)
    table = np.array([t5_bucket(r, scheme["num_buckets"], scheme["max_distance"],
                                bool(scheme["bidirectional"])) for r in unique.tolist()],
                     dtype=np.int64)
    return table[inverse].reshape(np.shape(relative))


def clip_index(relative: np.ndarray, clip: int) -> np.ndarray:
    return np.clip(np.asarray(relative, dtype=np.int64), -clip, clip) + clip


class Rope:
    def __init__(self, scheme: dict, head_dim: int):
        self.rotary_dim = int(scheme["rotary_dim"])
        if self.rotary_dim < 2 or self.rotary_dim % 2 or self.rotary_dim > head_dim:
            raise ValueError(f"rotary_dim {self.rotary_dim} must be even, 2..{head_dim}")
        self.pairing = scheme["pairing"]
        if self.pairing not in ("adjacent", "half_split"):
            raise Unsupported(f"rotary pairing {self.pairing!r}")
        base = float(scheme["base"])
        scaling = scheme.get("scaling", "none")
        self.divisor = 1.0
        if scaling == "none" or scaling is None:
            pass
        elif isinstance(scaling, dict) and "linear_interpolation" in scaling:
            self.divisor = float(scaling["linear_interpolation"]["factor"])
        elif isinstance(scaling, dict) and "ntk_aware" in scaling:
            s, d = float(scaling["ntk_aware"]["factor"]), float(self.rotary_dim)
            base = base * s ** (d / (d - 2.0))
        else:
            raise Unsupported(f"rotary scaling {scaling!r}")
        self.theta = frequencies(self.rotary_dim, base)

    def apply(self, x: np.ndarray, positions: np.ndarray) -> np.ndarray:
        """R_p x for x[H, N, d] at positions[N]; sin/cos formed in float64."""
        p = np.asarray(positions, dtype=np.int64).astype(np.float64) / self.divisor
        angles = p[:, None] * self.theta[None, :]
        cos = np.cos(angles).astype(x.dtype)
        sin = np.sin(angles).astype(x.dtype)
        half = self.rotary_dim // 2
        if self.pairing == "adjacent":
            a, b = np.arange(0, self.rotary_dim, 2), np.arange(1, self.rotary_dim, 2)
        else:
            a, b = np.arange(half), np.arange(half, self.rotary_dim)
        out = x.copy()
        xa, xb = x[..., a], x[..., b]
        out[..., a] = xa * cos - xb * sin
        out[..., b] = xa * sin + xb * cos
        return out


# ---------------------------------------------------------------- one attention step

class Attention:
    """Scores and outputs of queries at absolute positions over keys at absolute
    positions; key j is visible to query i iff pos_k[j] <= pos_q[i].

    Keys go through :meth:`key_form` once, when they enter a window, a cache or a
    memory: that is where an absolute scheme adds its encoding or rotary rotates them,
    exactly as a cached kernel stores them.
    """

    def __init__(self, case: dict, dtype: str, inputs: dict):
        self.case, self.inputs = case, inputs
        self.scheme = case["scheme"]
        self.name = self.scheme["name"]
        self.dt = numpy_dtype(dtype)
        self.d = int(case["head_dim"])
        self.factor = self.dt.type(scale_factor(self.scheme.get("scale"), self.d))
        if self.name == "rotary":
            self.rope = Rope(self.scheme, self.d)
        if self.name == "alibi":
            self.slopes = alibi_slopes(int(case["heads"]))

    def array(self, name: str) -> np.ndarray:
        if name not in self.inputs:
            raise ValueError(f"missing input array `{name}`")
        return np.asarray(self.inputs[name]).astype(self.dt)

    def absolute(self, positions: np.ndarray) -> np.ndarray:
        if self.name == "sinusoidal":
            return sinusoid(positions, self.d, float(self.scheme["base"]),
                            self.scheme["layout"]).astype(self.dt)
        table = self.array("table")
        positions = np.asarray(positions, dtype=np.int64)
        bad = positions[(positions < 0) | (positions >= table.shape[0])]
        if bad.size:
            # Wrapping or clamping would give two tokens one encoding.
            raise ValueError(f"position {int(bad[0])} is outside the learned table "
                             f"0..{table.shape[0]}")
        return table[positions]

    def key_form(self, x: np.ndarray, positions: np.ndarray) -> np.ndarray:
        if self.name in ("sinusoidal", "learned"):
            return x + self.absolute(positions)[None]
        if self.name == "rotary":
            return self.rope.apply(x, positions)
        return x

    query_form = key_form

    def scores(self, q, k, pos_q, pos_k, hidden=()):
        """[H, Lq, Lk] scores of prepared queries/keys, -inf where hidden."""
        distance = pos_q[:, None] - pos_k[None, :]
        visible = distance >= 0
        if len(hidden):
            visible[:, list(hidden)] = False
        f = self.factor
        if self.name == "xl_relative":
            u, v, r = self.array("content_bias"), self.array("position_bias"), self.array("r")
            clamp = self.scheme.get("clamp_len")
            rel = np.where(visible, distance, 0)
            if clamp is not None:
                rel = np.minimum(rel, int(clamp))
            if rel.size and rel.max() >= r.shape[1]:
                raise ValueError(f"r holds {r.shape[1]} distances; this window needs "
                                 f"{int(rel.max()) + 1}")
            content = (q + u[:, None, :]) @ k.transpose(0, 2, 1)
            # (q_i + v)·r[δ] for every δ, then each pair picks its own distance.
            by_distance = (q + v[:, None, :]) @ r.transpose(0, 2, 1)
            position = np.take_along_axis(
                by_distance, np.broadcast_to(rel, (q.shape[0],) + rel.shape), axis=2)
            s = f * (content + position)
        else:
            s = f * (q @ k.transpose(0, 2, 1))
            if self.name == "alibi":
                bias = -self.slopes[:, None, None] * distance[None].astype(np.float64)
                s = s + bias.astype(self.dt)
            elif self.name == "bucketed":
                table = self.array("bias_table")
                buckets = t5_buckets(-distance, self.scheme)
                s = s + table[:, buckets]
            elif self.name == "clipped":
                w_key = self._per_head(self.array("w_key"), q.shape[0])
                index = clip_index(-distance, int(self.scheme["clip_distance"]))
                by_row = q @ w_key.transpose(0, 2, 1)
                s = s + f * np.take_along_axis(
                    by_row, np.broadcast_to(index, (q.shape[0],) + index.shape), axis=2)
        return np.where(visible[None], s, self.dt.type(-np.inf)).astype(self.dt)

    @staticmethod
    def _per_head(table: np.ndarray, heads: int) -> np.ndarray:
        # One table shared by all heads (Shaw et al. §3.3) or one per head.
        return np.broadcast_to(table, (heads,) + table.shape[1:]) if table.shape[0] == 1 else table

    def output(self, probs, v, pos_q, pos_k):
        out = probs @ v
        if self.name == "clipped":
            w_value = self._per_head(self.array("w_value"), probs.shape[0])
            clip = int(self.scheme["clip_distance"])
            index = clip_index(pos_k[None, :] - pos_q[:, None], clip)
            one_hot = (index[:, :, None] == np.arange(2 * clip + 1)).astype(self.dt)
            # Σ_j p_ij w_V[idx(i,j)]: total probability per embedding row, then one product.
            mass = np.einsum("hij,ijr->hir", probs, one_hot)
            out = out + mass @ w_value
        return out.astype(self.dt)

    def attend(self, q, k, v, pos_q, pos_k, hidden=()):
        s = self.scores(q, k, pos_q, pos_k, hidden)
        p = softmax(s)
        return s, p, self.output(p, v, pos_q, pos_k)


def softmax(s: np.ndarray) -> np.ndarray:
    """Row softmax with max subtraction; a fully masked row is all zeros, not NaN."""
    m = s.max(axis=-1, keepdims=True)
    empty = m == -np.inf
    e = np.exp(s - np.where(empty, 0, m))
    total = e.sum(axis=-1, keepdims=True)
    return np.where(empty, 0, e / np.where(empty, 1, total)).astype(s.dtype)


# ---------------------------------------------------------------- operations

def window_positions(case: dict):
    p0, m, l = int(case["query_start"]), int(case["memory_len"]), int(case["query_len"])
    return p0 + np.arange(l, dtype=np.int64), p0 - m + np.arange(m + l, dtype=np.int64)


def op_encode(case, dtype, inputs):
    scheme, name = case["scheme"], case["scheme"]["name"]
    dt = numpy_dtype(dtype)
    d, h = int(case["head_dim"]), int(case["heads"])
    if name == "sinusoidal":
        return {"table": sinusoid(inputs["positions"], d, float(scheme["base"]),
                                  scheme["layout"]).astype(dt)}
    if name == "learned":
        att = Attention(case, dtype, inputs)
        return {"rows": att.absolute(inputs["positions"])}
    if name == "rotary":
        x = np.asarray(inputs["x"]).astype(dt)
        return {"rotated": Rope(scheme, d).apply(x, inputs["positions"])}
    if name == "xl_relative":
        count = int(case["memory_len"]) + int(case["query_len"])
        table = sinusoid(np.arange(count), d, 10000.0, "concatenated").astype(dt)
        w_kr = np.asarray(inputs["w_kr"]).astype(dt)
        return {"r": table[None] @ w_kr}
    if name == "alibi":
        return {"slopes": alibi_slopes(h).astype(dt)}
    if name == "bucketed":
        return {"buckets": t5_buckets(inputs["relative_positions"], scheme)}
    if name == "clipped":
        return {"indices": clip_index(inputs["relative_positions"], int(scheme["clip_distance"]))}
    raise Unsupported(f"scheme {name!r}")


def op_window(case, dtype, inputs):
    att = Attention(case, dtype, inputs)
    pos_q, pos_k = window_positions(case)
    q = att.query_form(att.array("q"), pos_q)
    k = att.key_form(att.array("k"), pos_k)
    hidden = case.get("hidden_keys") or ()
    if case["operation"]["kind"] == "scores":
        return {"scores": att.scores(q, k, pos_q, pos_k, hidden)}
    _, probs, out = att.attend(q, k, att.array("v"), pos_q, pos_k, hidden)
    return {"probs": probs, "output": out}


def op_stream(case, dtype, inputs):
    """Segments of L tokens; between segments only the newest M keys/values survive."""
    att = Attention(case, dtype, inputs)
    q, k, v = att.array("q"), att.array("k"), att.array("v")
    heads, tokens, d = q.shape
    seg_len, mem_len, p0 = int(case["query_len"]), int(case["memory_len"]), int(case["query_start"])
    mem_k = np.zeros((heads, 0, d), att.dt)
    mem_v = np.zeros((heads, 0, v.shape[2]), att.dt)
    mem_pos = np.zeros(0, np.int64)
    out = np.zeros((heads, tokens, v.shape[2]), att.dt)
    for start in range(0, tokens, seg_len):
        end = min(start + seg_len, tokens)
        pos = p0 + np.arange(start, end, dtype=np.int64)
        keys = np.concatenate([mem_k, att.key_form(k[:, start:end], pos)], axis=1)
        values = np.concatenate([mem_v, v[:, start:end]], axis=1)
        key_pos = np.concatenate([mem_pos, pos])
        _, _, out[:, start:end] = att.attend(att.query_form(q[:, start:end], pos),
                                             keys, values, pos, key_pos)
        keep = min(mem_len, keys.shape[1])
        first = keys.shape[1] - keep
        mem_k, mem_v, mem_pos = keys[:, first:], values[:, first:], key_pos[first:]
    return {"output": out}


class KVCache:
    """Keys (already in key form) and values of every token seen so far."""

    def __init__(self, att: Attention, heads: int, d_k: int, d_v: int, start: int):
        self.att, self.start = att, start
        self.k = np.zeros((heads, 0, d_k), att.dt)
        self.v = np.zeros((heads, 0, d_v), att.dt)

    def __len__(self):
        return self.k.shape[1]

    def append(self, k, v) -> np.ndarray:
        pos = self.start + len(self) + np.arange(k.shape[1], dtype=np.int64)
        self.k = np.concatenate([self.k, self.att.key_form(k, pos)], axis=1)
        self.v = np.concatenate([self.v, v], axis=1)
        return pos

    def positions(self):
        return self.start + np.arange(len(self), dtype=np.int64)


def op_decode(case, dtype, inputs):
    """Prefill P tokens into the cache, then decode each chunk against the cache."""
    att = Attention(case, dtype, inputs)
    q, k, v = att.array("q"), att.array("k"), att.array("v")
    heads, tokens, d = q.shape
    operation = case["operation"]
    prefill, chunks = int(operation["prefill"]), [int(c) for c in operation["chunks"]]
    if prefill + sum(chunks) != tokens:
        raise ValueError(f"prefill {prefill} + chunks {chunks} != tokens {tokens}")
    cache = KVCache(att, heads, d, v.shape[2], int(case["query_start"]))
    # The prefill's own outputs are not part of this operation's answer.
    cache.append(k[:, :prefill], v[:, :prefill])
    rows = []
    for size in chunks:
        t = len(cache)
        pos = cache.append(k[:, t:t + size], v[:, t:t + size])
        _, _, o = att.attend(att.query_form(q[:, t:t + size], pos),
                             cache.k, cache.v, pos, cache.positions())
        rows.append(o)
    return {"output": np.concatenate(rows, axis=1)}


OPERATION_HANDLERS = {
    "encode": op_encode,
    "scores": op_window,
    "attention": op_window,
    "stream": op_stream,
    "decode": op_decode,
}


def handle(case: dict, dtype: str, inputs: dict) -> dict:
    scheme, operation = case["scheme"]["name"], case["operation"]["kind"]
    if scheme not in SCHEMES or operation not in OPERATION_HANDLERS:
        raise Unsupported(f"{scheme} {operation}")
    return OPERATION_HANDLERS[operation](case, dtype, inputs)


def main(argv=None) -> None:
    import argparse
    parser = argparse.ArgumentParser(description="numpy kernel for posconform check")
    parser.add_argument("--dtypes", default=",".join(DTYPES),
                        help="dtypes to declare, preferred first (default f64,f32); "
                             "cases in an undeclared dtype are sent in the first one")
    parser.add_argument("--declare", action="append", default=[],
                        metavar="SCHEME.PARAMETER=VALUE[,VALUE...]",
                        help="declare only these values of one scheme parameter, e.g. "
                             "rotary.pairing=half_split or xl_relative.clamp_len=null "
                             "(values are read as JSON when they parse, else as strings)")
    args = parser.parse_args(argv)
    dtypes = [d.strip() for d in args.dtypes.split(",") if d.strip()]
    unknown = [d for d in dtypes if d not in DTYPES]
    if unknown or not dtypes:
        parser.error(f"--dtypes: this kernel computes in {DTYPES} only")
    parameters = {}
    for item in args.declare:
        target, _, values = item.partition("=")
        scheme, _, name = target.partition(".")
        if scheme not in SCHEMES or not name or not values:
            parser.error(f"--declare {item!r}: expected SCHEME.PARAMETER=VALUE[,VALUE...]")
        parameters.setdefault(scheme, {})[name] = [_json_or_text(v) for v in values.split(",")]
    serve(NAME, VERSION, SUPPORTS, dtypes, handle, parameters=parameters)


def _json_or_text(text: str):
    import json
    try:
        return json.loads(text)
    except ValueError:
        return text


if __name__ == "__main__":
    main()
