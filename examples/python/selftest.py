"""Offline self-test of the numpy kernel, without the live harness.

1. Runs the kernel's handler in-process on every vector file of a directory (default
   vectors/core) and writes one result file per case, ``<results>/<case id>.json``
   (format "posconform.result", version 1), for ``posconform verify`` to judge:

       python3 examples/python/selftest.py [VECTORS_DIR] [--results DIR]
       cargo run --release -- verify --vectors vectors/core --results DIR

   Only the case and its inputs are given to the kernel; expected outputs are never
   read.
2. Starts the kernel as a subprocess and exchanges handshake, one run and shutdown
   over real pipes, printing the transcript (``--no-pipe`` skips it).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

from posconform_kernel import call_handler, decode_array, encode_array  # noqa: E402
import numpy_kernel  # noqa: E402

REPO = os.path.dirname(os.path.dirname(HERE))


def vector_files(directory: str) -> list[str]:
    return sorted(os.path.join(directory, f) for f in os.listdir(directory)
                  if f.endswith(".json") and f != "index.json")


def compute_dtype(case_dtype: str) -> str:
    # What the harness would send: the case dtype if declared, else the first declared.
    return case_dtype if case_dtype in numpy_kernel.DTYPES else numpy_kernel.DTYPES[0]


def write_results(vectors: str, results: str) -> int:
    os.makedirs(results, exist_ok=True)
    failures = 0
    for path in vector_files(vectors):
        with open(path) as f:
            vector = json.load(f)
        case = vector["case"]
        inputs = {name: decode_array(obj, os.path.dirname(path))
                  for name, obj in vector["inputs"].items()}
        dtype = compute_dtype(case["dtype"])
        try:
            outputs = call_handler(numpy_kernel.handle, case, dtype, inputs)
        except Exception as e:  # keep going: verify will report the missing result
            failures += 1
            print(f"{case['id']}: kernel failed: {type(e).__name__}: {e}", file=sys.stderr)
            continue
        doc = {"format": "posconform.result", "version": 1, "case": case["id"],
               "outputs": {name: encode_array(arr) for name, arr in outputs.items()}}
        target = os.path.join(results, f"{case['id']}.json")
        with open(target + ".tmp", "w") as f:
            json.dump(doc, f)
        os.replace(target + ".tmp", target)
        print(f"{case['id']}: computed in {dtype} -> {target}")
    return failures


def pipe_transcript(vectors: str) -> bool:
    """Handshake, one run, shutdown against the kernel as a child process."""
    kernel = [sys.executable, os.path.join(HERE, "numpy_kernel.py")]
    child = subprocess.Popen(kernel, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE)
    sample = os.path.join(vectors, "rotary.encode.adjacent.json")
    if not os.path.exists(sample):
        sample = vector_files(vectors)[0]
    with open(sample) as f:
        vector = json.load(f)
    requests = [
        {"jsonrpc": "2.0", "id": 0, "method": "handshake",
         "params": {"protocol": 1, "harness": "selftest"}},
        {"jsonrpc": "2.0", "id": 1, "method": "run",
         "params": {"case": vector["case"], "dtype": compute_dtype(vector["case"]["dtype"]),
                    "inputs": vector["inputs"]}},
        "this line is not JSON",
        {"jsonrpc": "2.0", "id": 2, "method": "no_such_method"},
        {"jsonrpc": "2.0", "method": "shutdown"},
    ]
    ok = True

    def short(text: str, limit: int = 300) -> str:
        return text if len(text) <= limit else text[:limit] + f"... ({len(text)} chars)"

    for request in requests:
        line = request if isinstance(request, str) else json.dumps(request)
        print(f"-> {short(line)}")
        child.stdin.write(line.encode() + b"\n")
        child.stdin.flush()
        if isinstance(request, dict) and "id" not in request:
            continue
        reply = child.stdout.readline().decode()
        print(f"<- {short(reply.strip())}")
        try:
            message = json.loads(reply)
        except ValueError:
            ok = False
            continue
        expected_id = request.get("id") if isinstance(request, dict) else None
        ok &= message.get("id") == expected_id
    child.stdin.close()
    deadline = time.time() + 2
    while child.poll() is None and time.time() < deadline:
        time.sleep(0.02)
    rc = child.poll()
    stray = child.stdout.read()
    print(f"child exit status: {rc}; extra stdout bytes: {len(stray)}")
    stderr = child.stderr.read().decode().strip()
    if stderr:
        print("child stderr:\n  " + stderr.replace("\n", "\n  "))
    if rc is None:
        child.kill()
    return ok and rc == 0 and not stray


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("vectors", nargs="?", default=os.path.join(REPO, "vectors", "core"))
    parser.add_argument("--results", default=os.path.join(REPO, "target", "python-results"))
    parser.add_argument("--no-pipe", action="store_true")
    args = parser.parse_args()
    failures = write_results(args.vectors, args.results)
    print(f"\n{failures} case(s) failed in the kernel; results in {args.results}")
    print(f"judge them with: cargo run --release -- verify --vectors {args.vectors} "
          f"--results {args.results}\n")
    if not args.no_pipe:
        print("pipe transcript:")
        if not pipe_transcript(args.vectors):
            print("pipe exchange FAILED")
            return 1
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
