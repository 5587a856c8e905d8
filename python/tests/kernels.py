"""Small kernels for the package's tests, written from docs/conventions.md (not from
posconform's code), each correct or with one planted bug that the tests name.

ALiBi slopes (Press et al. 2022, "Train Short, Test Long", §3 and the authors' code):
for a power-of-two head count n the slopes are the geometric sequence 2^(-8/n), ...,
2^(-8); otherwise, with c the largest power of two below n, the c slopes of c heads
followed by every other slope of 2c heads, the first n - c of them.
"""

from __future__ import annotations

import math
import os
import sys

import numpy as np

import posconform

REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
EXAMPLES = os.path.join(REPO, "examples", "python")


def geometric_slopes(n: int) -> np.ndarray:
    return np.array([2.0 ** (-8.0 * (h + 1) / n) for h in range(n)])


def alibi_slopes(case, dtype, inputs):
    """Correct for every head count."""
    n = case["heads"]
    if n & (n - 1) == 0:
        slopes = geometric_slopes(n)
    else:
        c = 1 << (n.bit_length() - 1)
        slopes = np.concatenate([geometric_slopes(c), geometric_slopes(2 * c)[0::2][: n - c]])
    return {"slopes": slopes.astype(posconform.numpy_dtype(dtype))}


def alibi_slopes_power_of_two_rule(case, dtype, inputs):
    """Planted bug: the power-of-two rule used for every head count (right for 1, 2, 4,
    8, ... heads only)."""
    return {"slopes": geometric_slopes(case["heads"]).astype(posconform.numpy_dtype(dtype))}


CORRECT_ALIBI = posconform.Kernel(alibi_slopes, supports={"alibi": ["encode"]},
                                  dtypes=["f64"], name="alibi-slopes")
BUGGY_ALIBI = posconform.Kernel(alibi_slopes_power_of_two_rule,
                                supports={"alibi": ["encode"]}, dtypes=["f64"],
                                name="alibi-power-of-two-rule")


def numpy_example():
    """The repository's example numpy kernel (every scheme and operation) as a Kernel."""
    if EXAMPLES not in sys.path:
        sys.path.insert(0, EXAMPLES)
    import numpy_kernel
    return numpy_kernel, posconform.Kernel(
        numpy_kernel.handle, supports=numpy_kernel.SUPPORTS, dtypes=numpy_kernel.DTYPES,
        name=numpy_kernel.NAME, version=numpy_kernel.VERSION)


# -- rotary in numpy, for the array-handling tests ---------------------------------------

def rope_frequencies(rotary_dim: int, base: float) -> np.ndarray:
    return np.array([math.pow(base, -2.0 * i / rotary_dim) for i in range(rotary_dim // 2)])


def rotary_encode(case, dtype, inputs):
    """RoPE on the first rotary_dim dimensions of x [H, L, d] at positions [L], computed
    in float64 (docs/conventions.md, rotary): pairs (2i, 2i+1) for "adjacent", (i, i +
    r/2) for "half_split"; linear interpolation divides positions by its factor; NTK
    scaling multiplies the base by s^(r/(r-2))."""
    scheme = case["scheme"]
    r = scheme["rotary_dim"]
    base = float(scheme["base"])
    positions = inputs["positions"].astype(np.float64)
    scaling = scheme.get("scaling", "none")
    if isinstance(scaling, dict) and "linear_interpolation" in scaling:
        positions = positions / scaling["linear_interpolation"]["factor"]
    elif isinstance(scaling, dict) and "ntk_aware" in scaling:
        base = base * scaling["ntk_aware"]["factor"] ** (r / (r - 2.0))
    angles = positions[:, None] * rope_frequencies(r, base)[None, :]
    cos, sin = np.cos(angles), np.sin(angles)
    x = inputs["x"].astype(np.float64)
    if scheme["pairing"] == "adjacent":
        a, b = np.arange(0, r, 2), np.arange(1, r, 2)
    else:
        a, b = np.arange(r // 2), np.arange(r // 2, r)
    out = x.copy()
    out[..., a] = x[..., a] * cos - x[..., b] * sin
    out[..., b] = x[..., a] * sin + x[..., b] * cos
    return {"rotated": out}
