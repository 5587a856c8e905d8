"""Independent high-precision RoPE table for tests/published_values/rotary.rs.

Rotates a fixed input vector with RoFormer's rotation (Su et al. 2021, eq. 34 for the
adjacent pairing; the half-split pairing pairs j with j + d/2), theta_j = base^(-2j/d),
using mpmath at 50 significant digits. Inputs are dyadic rationals so that f64 holds
them exactly and Rust rotates the very same vector.

Regenerate: python3 vectors/mpmath/rope.py > vectors/mpmath/rope.json
CI does not rerun this script; it reads the stored JSON.
"""
import json

import mpmath as mp

mp.mp.dps = 50
BASE = 10000
POSITIONS = [0, 1, 2047, 2048, 65535, 10**6]
HEAD_DIMS = [64, 128]
PAIRINGS = ["adjacent", "half_split"]


def digits(x):
    """17 significant digits: enough to round-trip any f64."""
    return mp.nstr(x, 17, strip_zeros=False)


def inputs(d):
    # A fixed, sign-mixed, non-repeating pattern; /32 keeps every value exact in f64.
    return [mp.mpf((i * 37) % 101 - 50) / 32 for i in range(d)]


def pair(pairing, j, d):
    return (2 * j, 2 * j + 1) if pairing == "adjacent" else (j, j + d // 2)


def rotate(x, position, pairing, base=BASE):
    d = len(x)
    out = list(x)
    for j in range(d // 2):
        angle = position * mp.mpf(base) ** (-mp.mpf(2 * j) / d)
        c, s = mp.cos(angle), mp.sin(angle)
        a, b = pair(pairing, j, d)
        out[a] = x[a] * c - x[b] * s
        out[b] = x[a] * s + x[b] * c
    return out


def main():
    cases = []
    for d in HEAD_DIMS:
        x = inputs(d)
        for pairing in PAIRINGS:
            for p in POSITIONS:
                cases.append({
                    "head_dim": d,
                    "pairing": pairing,
                    "position": p,
                    "rotated": [digits(v) for v in rotate(x, p, pairing)],
                })
    # The relative check quoted in tests/published_values/rotary.rs is for the adjacent
    # pairing only;
    # these are its half-split counterparts.
    q = [mp.mpf(v) for v in ("0.5", "-1", "2", "0.25")]
    k = [mp.mpf(v) for v in ("1.5", "0.75", "-0.5", "1")]
    relative = []
    for pairing in PAIRINGS:
        for m, n in [(5, 3), (2, 0), (102, 100), (3, 5)]:
            dot = mp.fsum(a * b for a, b in zip(rotate(q, m, pairing), rotate(k, n, pairing)))
            relative.append({"pairing": pairing, "m": m, "n": n, "dot": digits(dot)})
    table = {
        "generator": "vectors/mpmath/rope.py",
        "mpmath_version": mp.__version__,
        "digits": mp.mp.dps,
        "base": BASE,
        "inputs": {str(d): [digits(v) for v in inputs(d)] for d in HEAD_DIMS},
        "rotations": cases,
        "relative": {
            "q": [digits(v) for v in q],
            "k": [digits(v) for v in k],
            "dots": relative,
        },
    }
    print(json.dumps(table, indent=1))


if __name__ == "__main__":
    main()
