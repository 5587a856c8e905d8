"""Independent 50-digit sines and cosines of rotation angles p * w, for random cases.

The reference forms its angles in double-double arithmetic and reduces them modulo
2*pi before taking sine and cosine (src/math/angle.rs). This table checks that claim on
thousands of random angles, computed here with mpmath at 50 significant digits,
independently of the Rust code:

- "sinusoid": w_i = base^(-2i/d) (Vaswani et al. 2017, section 3.5), any position p;
- "linear": rotary angle (p/s) * theta_j, theta_j = base^(-2j/d_rot) (Su et al. 2021,
  RoFormer, eq. 15; linear position interpolation of Chen et al. 2023);
- "ntk": rotary angle p * theta'_j with theta'_j from the base b * s^(d_rot/(d_rot-2))
  (NTK-aware scaling, Peng et al. 2023, YaRN, Definition 1).

The parameters are drawn from Python's `random` with a fixed seed, so the file is
reproducible. Writes angles.json next to this script. Regenerate with:
    python3 vectors/mpmath/angles.py
"""
import json
import os
import random

import mpmath

mpmath.mp.dps = 50

CASES = 3000
SEED = 20261202


def position(rng):
    """Positions spread over every scale up to 2^40, a quarter of them negative."""
    magnitude = int(2 ** rng.uniform(0, 40))
    return -magnitude if rng.random() < 0.25 else magnitude


def main():
    rng = random.Random(SEED)
    cases = []
    for n in range(CASES):
        kind = ("sinusoid", "linear", "ntk")[n % 3]
        width = 2 * rng.randint(2, 128)
        base = rng.choice([1000, 10000, 500000, 1000000])
        pair = rng.randrange(width // 2)
        p = position(rng)
        case = {"kind": kind, "width": width, "base": base, "pair": pair, "position": p}
        exponent = mpmath.mpf(-2 * pair) / width
        if kind == "sinusoid":
            angle = p * mpmath.power(base, exponent)
        elif kind == "linear":
            factor = rng.choice([2, 4, 8, 2.5, 16, 32])
            case["factor"] = factor
            angle = (mpmath.mpf(p) / mpmath.mpf(factor)) * mpmath.power(base, exponent)
        else:
            factor = rng.choice([2, 4, 8, 16])
            case["factor"] = factor
            if width <= 2:
                continue
            ntk_base = base * mpmath.power(factor, mpmath.mpf(width) / (width - 2))
            angle = p * mpmath.power(ntk_base, exponent)
        # 25 significant digits: more than f64 resolves.
        case["sin"] = mpmath.nstr(mpmath.sin(angle), 25)
        case["cos"] = mpmath.nstr(mpmath.cos(angle), 25)
        cases.append(case)
    doc = {
        "what": "sin and cos of p*w for sinusoid and rotary frequencies (see the generator's docstring)",
        "generator": "vectors/mpmath/angles.py",
        "library": "mpmath " + mpmath.__version__,
        "digits": mpmath.mp.dps,
        "seed": SEED,
        "cases": cases,
    }
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "angles.json")
    # One case per line keeps the file small and its diffs readable.
    head = json.dumps({k: v for k, v in doc.items() if k != "cases"}, indent=1)
    lines = ",\n".join(json.dumps(c) for c in cases)
    with open(path, "w") as f:
        f.write(head[:-2] + ',\n "cases": [\n' + lines + "\n ]\n}\n")


if __name__ == "__main__":
    main()
