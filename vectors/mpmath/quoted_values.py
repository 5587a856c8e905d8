"""Independent recomputation of the check values quoted in tests/published_values/ and
docs/conventions.md.

Each value there is quoted to 15 significant digits; this script recomputes every one
with mpmath at 50 significant digits (the T5 bucket table and the relative-shift
example are integer procedures, evaluated in plain Python), independently of the Rust
code. Writes quoted_values.json next to this script:

    python3 vectors/mpmath/quoted_values.py

CI does not rerun it; the tests quote the values and cite this file.
"""
import json
import math
import os

import mpmath as mp

mp.mp.dps = 50


def s15(x):
    return mp.nstr(x, 15)


def sinusoid(p, d, layout):
    sines, cosines = [], []
    for i in range(d // 2):
        angle = p * mp.mpf(10000) ** (-mp.mpf(2 * i) / d)
        sines.append(mp.sin(angle))
        cosines.append(mp.cos(angle))
    if layout == "interleaved":
        return [v for pair in zip(sines, cosines) for v in pair]
    return sines + cosines


def rotate(x, m, pairing):
    """RoFormer eq. 34 (adjacent) or the half-split pairing, base 10000."""
    d = len(x)
    out = list(x)
    for j in range(d // 2):
        angle = m * mp.mpf(10000) ** (-mp.mpf(2 * j) / d)
        c, s = mp.cos(angle), mp.sin(angle)
        a, b = (2 * j, 2 * j + 1) if pairing == "adjacent" else (j, j + d // 2)
        out[a] = x[a] * c - x[b] * s
        out[b] = x[a] * s + x[b] * c
    return out


def alibi_slopes(n):
    """Press et al. 2022, section 3, and the authors' rule for other head counts."""
    def power_of_two(k):
        return [mp.mpf(2) ** (-mp.mpf(8) * h / k) for h in range(1, k + 1)]
    if n & (n - 1) == 0:
        return power_of_two(n)
    c = 2 ** int(math.log2(n))
    return power_of_two(c) + power_of_two(2 * c)[0::2][: n - c]


def t5_bucket(rel, nb, max_distance, bidirectional):
    """The bucket function of docs/conventions.md, "bucketed", in Python floats."""
    n = -rel
    if bidirectional:
        nb //= 2
        offset = nb if n < 0 else 0
        n = abs(n)
    else:
        offset = 0
        n = max(n, 0)
    max_exact = nb // 2
    if n < max_exact:
        return offset + n
    b = max_exact + int(math.log(n / max_exact) / math.log(max_distance / max_exact)
                        * (nb - max_exact))
    return offset + min(b, nb - 1)


def rel_shift(bd):
    """Prepend a zero column, reshape (L, K+1) to (K+1, L), drop the first row,
    reshape to (L, K): the relative shift of Dai et al. 2019, appendix B."""
    rows, cols = len(bd), len(bd[0])
    flat = [v for row in bd for v in [0] + row][rows:]
    return [flat[i * cols:(i + 1) * cols] for i in range(rows)]


def main():
    x = [mp.mpf(v) for v in (1, 2, 3, 4)]
    q = [mp.mpf(v) for v in ("0.5", "-1", "2", "0.25")]
    k = [mp.mpf(v) for v in ("1.5", "0.75", "-0.5", "1")]
    rels = [-200, -128, -20, -8, -1, 0, 1, 8, 20, 128, 200]
    table = {
        "generator": "vectors/mpmath/quoted_values.py",
        "mpmath_version": mp.__version__,
        "digits": mp.mp.dps,
        "sinusoid": {
            "p1_d4_interleaved": [s15(v) for v in sinusoid(1, 4, "interleaved")],
            "p10_d8_interleaved": [s15(v) for v in sinusoid(10, 8, "interleaved")],
            "p10_d8_concatenated": [s15(v) for v in sinusoid(10, 8, "concatenated")],
        },
        "rotary_d4_x1234": {
            f"{pairing}_m{m}": [s15(v) for v in rotate(x, m, pairing)]
            for pairing in ("adjacent", "half_split") for m in (1, 10)
        },
        "rotary_relative_adjacent": {
            f"m{m}_n{n}": s15(mp.fsum(a * b for a, b in zip(rotate(q, m, "adjacent"),
                                                             rotate(k, n, "adjacent"))))
            for m, n in [(5, 3), (2, 0), (102, 100), (3, 5)]
        },
        "ntk_base_d128": {
            f"s{s}": s15(mp.mpf(10000) * mp.mpf(s) ** (mp.mpf(128) / 126)) for s in (2, 4, 8)
        },
        "alibi_slopes": {str(n): [s15(v) for v in alibi_slopes(n)] for n in (6, 8, 12)},
        "t5_buckets_nb32_d128": {
            "relative_positions": rels,
            "bidirectional": [t5_bucket(r, 32, 128, True) for r in rels],
            "causal": [t5_bucket(r, 32, 128, False) for r in rels],
        },
        "rel_shift_L3_M2": rel_shift([[1000 * (i + 1) + c for c in range(5)] for i in range(3)]),
    }
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "quoted_values.json")
    with open(path, "w") as f:
        json.dump(table, f, indent=1)
        f.write("\n")


if __name__ == "__main__":
    main()
