"""Independent 50-digit values of the absolute sinusoidal encoding.

PE(p, 2i) = sin(p * w_i), PE(p, 2i+1) = cos(p * w_i), w_i = base^(-2i/d)
(Vaswani et al. 2017, section 3.5; interleaved layout). Computed with mpmath at 50
significant digits, independently of the Rust code. Writes sinusoid.json next to this
script. Regenerate with:  python3 vectors/mpmath/sinusoid.py
"""
import json
import os

import mpmath

mpmath.mp.dps = 50

# (width, base) pairs and positions: several widths and bases, positions up to 10^6,
# including negative and zero.
CONFIGS = [(4, 10000), (8, 10000), (16, 10000), (64, 10000), (64, 500000), (128, 10000), (32, 1000)]
POSITIONS = [-7, 0, 1, 2, 10, 255, 256, 2047, 2048, 4095, 65535, 123457, 1000000]


def encode(p, width, base):
    out = []
    for i in range(width // 2):
        w = mpmath.power(base, mpmath.mpf(-2 * i) / width)
        out.append(mpmath.sin(p * w))
        out.append(mpmath.cos(p * w))
    return out


def main():
    cases = []
    for width, base in CONFIGS:
        for p in POSITIONS:
            values = encode(mpmath.mpf(p), width, base)
            cases.append({
                "width": width,
                "base": base,
                "position": p,
                # 20 significant digits: more than f64 resolves, so the stored value
                # rounds to the correctly rounded double.
                "interleaved": [mpmath.nstr(x, 20) for x in values],
            })
    doc = {
        "what": "absolute sinusoidal encoding, interleaved layout (Vaswani et al. 2017, section 3.5)",
        "generator": "vectors/mpmath/sinusoid.py",
        "library": "mpmath " + mpmath.__version__,
        "digits": mpmath.mp.dps,
        "cases": cases,
    }
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "sinusoid.json")
    with open(path, "w") as f:
        json.dump(doc, f, indent=1)
        f.write("\n")


if __name__ == "__main__":
    main()
