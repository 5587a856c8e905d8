"""The package as installed: one version everywhere, the `posconform` command, the
protocol helper (in the package and through the examples' shim), serving a
posconform.Kernel over the protocol, and the README's "From Python" example."""

from __future__ import annotations

import importlib.metadata
import importlib.util
import json
import os
import re
import subprocess
import sys

import posconform
import posconform.protocol
from kernels import EXAMPLES, REPO
from test_check import posconform_command


def crate_version() -> str:
    """The [package] version of Cargo.toml, read here with a regular expression (not
    with the build's own reader)."""
    text = open(os.path.join(REPO, "Cargo.toml"), encoding="utf-8").read()
    package = text.split("[package]", 1)[1].split("\n[", 1)[0]
    return re.search(r'^version\s*=\s*"([^"]+)"', package, re.M).group(1)


def test_one_version_everywhere():
    version = crate_version()
    assert posconform.__version__ == version  # the linked library's CARGO_PKG_VERSION
    assert importlib.metadata.version("posconform") == version  # the wheel's metadata
    out = subprocess.run([posconform_command(), "--version"], capture_output=True,
                         text=True, timeout=60)
    assert out.stdout.strip() == f"posconform {version}"


def test_the_command_is_the_crate_binary():
    out = subprocess.run([posconform_command(), "list"], capture_output=True, text=True,
                         timeout=60)
    assert out.returncode == 0, out.stderr
    assert "suites:" in out.stdout and "core" in out.stdout
    listed = subprocess.run([posconform_command(), "list", "--suite", "core"],
                            capture_output=True, text=True, timeout=60).stdout
    # One line per case (indented lines below it name the faults it exposes).
    assert [line.split()[0] for line in listed.splitlines()
            if line and not line[0].isspace()] == [
        c["id"] for c in posconform.suite_cases("core")]


def test_the_examples_shim_is_the_package_protocol_helper():
    spec = importlib.util.spec_from_file_location(
        "shim_under_test", os.path.join(EXAMPLES, "posconform_kernel.py"))
    shim = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(shim)
    assert shim.__all__ == posconform.protocol.__all__
    for name in shim.__all__:
        ours = getattr(posconform.protocol, name)
        theirs = getattr(shim, name)
        # Loaded from the checkout's file, which is the file the package installed.
        assert getattr(theirs, "__qualname__", None) == getattr(ours, "__qualname__", None)
    with open(os.path.join(REPO, "python", "posconform", "protocol.py"), "rb") as f:
        source = f.read()
    with open(posconform.protocol.__file__, "rb") as f:
        assert f.read() == source


SERVED = """
import sys
sys.path.insert(0, {tests!r})
from kernels import {name}
{name}.serve()
"""


def test_a_kernel_declared_for_python_is_served_over_the_protocol(tmp_path):
    for name, code in (("CORRECT_ALIBI", 0), ("BUGGY_ALIBI", 1)):
        script = tmp_path / f"serve_{name}.py"
        script.write_text(SERVED.format(tests=os.path.dirname(__file__), name=name))
        report = tmp_path / f"{name}.json"
        run = subprocess.run(
            [posconform_command(), "check", "--quiet", "--kernel",
             f"{sys.executable} {script}", "--fuzz", "30", "--seed", "1",
             "--json", str(report), "--save-failures", str(tmp_path / "failures")],
            capture_output=True, text=True, timeout=300)
        assert run.returncode == code, run.stdout + run.stderr
        document = json.loads(report.read_text())
        verdicts = {c["id"]: c["verdict"]["kind"] for c in document["cases"]
                    if c["id"].startswith("alibi.encode.")}
        expected = {"alibi.encode.h8": "pass", "alibi.encode.h12": "pass",
                    "alibi.encode.h6": "pass"}
        if code:
            expected.update({"alibi.encode.h12": "fail", "alibi.encode.h6": "fail"})
        assert verdicts == expected


def readme_python_example() -> str:
    text = open(os.path.join(REPO, "README.md"), encoding="utf-8").read()
    section = text.split("## From Python", 1)[1]
    return section.split("```python\n", 1)[1].split("```", 1)[0]


def test_the_readme_example_is_ten_lines_and_says_what_it_promises(tmp_path):
    code = readme_python_example()
    lines = [line for line in code.splitlines() if line.strip()]
    assert len(lines) <= 10, lines
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         cwd=tmp_path, timeout=300)
    assert run.returncode == 0, run.stderr
    out = run.stdout
    # The power-of-two slope rule: 8 heads pass, 12 and 6 fail, fuzzing shrinks a
    # failure to a head count that is not a power of two.
    assert re.search(r"^  pass +alibi\.encode\.h8 ", out, re.M), out
    assert re.search(r"^  FAIL +alibi\.encode\.h12 ", out, re.M), out
    assert re.search(r"^  FAIL +alibi\.encode\.h6 ", out, re.M), out
    heads = int(re.search(r"alibi encode, H = (\d+),", out).group(1))
    assert heads == 5  # as the README says; not a power of two, and 4 < 5 < 8
    assert "-> NONCONFORMING (exit 1)" in out
    saved = re.search(r"saved: (\S+\.json)", out).group(1)
    assert os.path.isfile(os.path.join(tmp_path, saved))
