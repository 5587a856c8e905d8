"""numpy's matrix product on the shapes of benches/product.rs, timed the way a user
would (`a @ b`, median of repeated calls), for the side-by-side figures that bench
prints. Usage: python3 numpy_products.py M K N [M K N ...]; prints one line per shape:
`M K N median_seconds`.
"""
import sys
import time

import numpy as np

args = [int(x) for x in sys.argv[1:]]
rng = np.random.default_rng(0)
for m, k, n in zip(args[0::3], args[1::3], args[2::3]):
    a = rng.uniform(-1, 1, (m, k))
    b = rng.uniform(-1, 1, (n, k)).T  # a transposed view, as q @ k.T is
    a @ b
    times = []
    started = time.perf_counter()
    while len(times) < 15 or (time.perf_counter() - started < 2 and len(times) < 200):
        t = time.perf_counter()
        a @ b
        times.append(time.perf_counter() - t)
    times.sort()
    print(m, k, n, times[len(times) // 2], flush=True)
