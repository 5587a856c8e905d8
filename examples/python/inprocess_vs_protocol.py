"""Times one check of the example numpy kernel in-process and over the protocol.

Needs the posconform package installed (``pip install .`` at the repository root, which
also installs the ``posconform`` command this script runs)::

    python3 examples/python/inprocess_vs_protocol.py [--suite core] [--fuzz 0] [--runs 5]

In-process: ``posconform.check(kernel, ...)`` on ``numpy_kernel.handle``. Protocol:
``posconform check --kernel "python3 examples/python/numpy_kernel.py" --quiet`` as a
child process. Both check the same function on the same cases (same seed); the script
prints the median, minimum and maximum wall time of each and checks that both runs
gave the same verdicts.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

import numpy_kernel  # noqa: E402
import posconform  # noqa: E402


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--suite", default="core")
    parser.add_argument("--fuzz", type=int, default=0)
    parser.add_argument("--seed", type=int, default=0x5EED)
    parser.add_argument("--runs", type=int, default=5)
    args = parser.parse_args()
    command = shutil.which("posconform", path=os.path.dirname(sys.executable)) or \
        shutil.which("posconform")
    if command is None:
        parser.error("no posconform command found: pip install . at the repository root")
    kernel = posconform.Kernel(numpy_kernel.handle, supports=numpy_kernel.SUPPORTS,
                               dtypes=numpy_kernel.DTYPES, name=numpy_kernel.NAME,
                               version=numpy_kernel.VERSION)
    served = f"{sys.executable} {os.path.join(HERE, 'numpy_kernel.py')}"
    inside, outside = [], []
    with tempfile.TemporaryDirectory() as scratch:
        report_file = os.path.join(scratch, "protocol.json")
        for _ in range(args.runs):
            start = time.perf_counter()
            report = posconform.check(kernel, suite=args.suite, fuzz=args.fuzz,
                                      seed=args.seed, save_failures=None)
            inside.append(time.perf_counter() - start)
            start = time.perf_counter()
            subprocess.run([command, "check", "--quiet", "--kernel", served, "--suite",
                            args.suite, "--fuzz", str(args.fuzz), "--seed", str(args.seed),
                            "--json", report_file, "--save-failures",
                            os.path.join(scratch, "failures")],
                           stdout=subprocess.DEVNULL, check=False)
            outside.append(time.perf_counter() - start)
        with open(report_file) as f:
            protocol_report = json.load(f)
    same = [(c.id, c.verdict) for c in report.cases] == [
        (c["id"], c["verdict"]["kind"]) for c in protocol_report["cases"]]
    print(f"suite {args.suite}, {args.fuzz} random cases, {len(report.cases)} cases in all, "
          f"{args.runs} runs each; verdict {report.verdict}; same verdicts both ways: {same}")
    for label, times in (("in-process", inside), ("protocol  ", outside)):
        print(f"{label}  median {statistics.median(times):.3f} s  "
              f"(min {min(times):.3f}, max {max(times):.3f})")
    return 0 if same else 1


if __name__ == "__main__":
    sys.exit(main())
