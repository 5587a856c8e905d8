"""The pytest plugin, run inside pytest by pytester: one test per suite case (ids = case
ids) plus one for fuzzing, failure messages that are posconform's report, replay files,
and pytest's own JUnit XML carrying it all (numpy only; these always run)."""

from __future__ import annotations

import os
import xml.etree.ElementTree as ET

import pytest

import posconform
from kernels import BUGGY_ALIBI

TESTS = os.path.dirname(os.path.abspath(__file__))

TEST_FILE = """
import pytest
from kernels import BUGGY_ALIBI, CORRECT_ALIBI

@pytest.mark.posconform(BUGGY_ALIBI, suite="core", fuzz=40, seed=1)
def test_buggy(posconform_case):
    posconform_case.check()

@pytest.mark.posconform(CORRECT_ALIBI, fuzz=40, seed=1)
def test_correct(posconform_case):
    posconform_case.check()
"""


@pytest.fixture
def project(pytester):
    """A pytest project whose tests import the kernels of kernels.py."""
    pytester.syspathinsert(TESTS)
    pytester.makepyfile(test_alibi=TEST_FILE)
    return pytester


def suite_ids():
    return [c["id"] for c in posconform.suite_cases("core")]


def test_one_test_per_case_plus_fuzz_with_case_ids(project):
    result = project.runpytest("--collect-only", "-q")
    collected = [line.strip() for line in result.outlines if "::" in line]
    expected = [f"test_alibi.py::test_{name}[{i}]"
                for name in ("buggy", "correct") for i in suite_ids() + ["fuzz"]]
    assert collected == expected


def test_verdicts_become_test_outcomes_with_the_report_as_message(project, tmp_path):
    junit = tmp_path / "junit.xml"
    failures = tmp_path / "replays"
    result = project.runpytest(f"--junitxml={junit}", f"--posconform-failures={failures}")
    # Each kernel declares alibi encode only: 3 suite cases run, the rest are skipped.
    # The power-of-two rule passes 8 heads and fails 12 and 6 heads, and fuzzing finds it.
    others = len(suite_ids()) - 3
    result.assert_outcomes(passed=1 + 3 + 1, failed=2 + 1, skipped=2 * others)
    outcome_of = {}
    root = ET.parse(junit).getroot()
    cases = list(root.iter("testcase"))
    assert len(cases) == 2 * (len(suite_ids()) + 1)
    for case in cases:
        kind = next((c.tag for c in case if c.tag in ("failure", "skipped", "error")), "pass")
        outcome_of[case.get("name")] = (kind, case)
    assert outcome_of["test_buggy[alibi.encode.h8]"][0] == "pass"
    assert outcome_of["test_buggy[rotary.encode.adjacent]"][0] == "skipped"
    kind, h12 = outcome_of["test_buggy[alibi.encode.h12]"]
    assert kind == "failure"
    message = h12.find("failure").get("message") + (h12.find("failure").text or "")
    # posconform's text report of that case: the row, the diagnosis, the replay file.
    assert "FAIL    alibi.encode.h12" in message
    assert "Findings" in message and "worst at head" in message
    replay = failures / "alibi.encode.h12.json"
    assert f"replay: posconform.check(kernel, cases=['{replay}'])" in message
    assert replay.is_file()
    kind, fuzz = outcome_of["test_buggy[fuzz]"]
    assert kind == "failure"
    fuzz_message = fuzz.find("failure").text or ""
    assert "Minimal failing cases" in fuzz_message and "saved: " in fuzz_message
    assert outcome_of["test_correct[fuzz]"][0] == "pass"
    assert outcome_of["test_correct[alibi.encode.h12]"][0] == "pass"
    properties = {p.get("name"): p.get("value") for p in h12.iter("property")}
    assert properties == {"posconform_verdict": "fail", "posconform_case": "alibi.encode.h12"}
    fuzz_properties = {p.get("name"): p.get("value") for p in fuzz.iter("property")}
    assert fuzz_properties == {"posconform_verdict": "nonconforming",
                               "posconform_random_cases": "40"}
    # The replay file reproduces the failure in-process.
    again = posconform.check(BUGGY_ALIBI, cases=[replay])
    assert [(c.id, c.verdict) for c in again.cases] == [("alibi.encode.h12", "fail")]


def test_skips_say_why(project):
    result = project.runpytest("-rs", "-k", "test_correct and rotary.encode.adjacent")
    result.assert_outcomes(skipped=1)
    result.stdout.fnmatch_lines(["*posconform: the kernel does not implement rotary*"])


def test_only_and_no_fuzz_select_the_tests(pytester):
    pytester.syspathinsert(TESTS)
    pytester.makepyfile(test_some="""
import pytest
from kernels import CORRECT_ALIBI

@pytest.mark.posconform(CORRECT_ALIBI, only=["alibi.encode.h6", "alibi.encode.h8"], fuzz=0)
def test_two(posconform_case):
    report = posconform_case.check()
    assert report.ok
""")
    result = pytester.runpytest("-v")
    result.assert_outcomes(passed=2)
    # Suite order, not the order given.
    result.stdout.fnmatch_lines(["*test_two?alibi.encode.h8? PASSED*",
                                 "*test_two?alibi.encode.h6? PASSED*"])


def test_command_line_options_override_the_marker(project):
    result = project.runpytest("-k", "test_buggy and fuzz", "--posconform-fuzz", "0")
    # With fuzzing off there is no fuzz test to select.
    result.assert_outcomes()
    result = project.runpytest("-k", "test_correct and fuzz", "--posconform-fuzz", "7",
                               "--posconform-seed", "5", "-v")
    result.assert_outcomes(passed=1)


def test_a_kernel_error_fails_the_case_with_the_traceback(pytester):
    pytester.makepyfile(test_raises="""
import pytest, posconform

def slopes(case, dtype, inputs):
    raise RuntimeError("the fused kernel is not compiled for this GPU")

KERNEL = posconform.Kernel(slopes, supports={"alibi": ["encode"]})

@pytest.mark.posconform(KERNEL, only=["alibi.encode.h8"], fuzz=0)
def test_it(posconform_case):
    posconform_case.check()
""")
    result = pytester.runpytest()
    result.assert_outcomes(failed=1)
    result.stdout.fnmatch_lines([
        "*ERROR   alibi.encode.h8  kernel slopes: case alibi.encode.h8 raised RuntimeError*",
        "*RuntimeError: the fused kernel is not compiled for this GPU*"])


def test_misuse_is_a_usage_error(pytester):
    pytester.makepyfile(test_misuse="""
import pytest

def test_no_marker(posconform_case):
    posconform_case.check()
""")
    result = pytester.runpytest()
    assert result.ret != 0
    result.stdout.fnmatch_lines(["*uses the posconform_case fixture but has no*"])
    pytester.makepyfile(test_misuse="""
import pytest

@pytest.mark.posconform(None, fuzzz=3)
def test_typo(posconform_case):
    posconform_case.check()
""")
    result = pytester.runpytest()
    assert result.ret != 0
    result.stdout.fnmatch_lines(["*unknown option(s) fuzzz*"])
    pytester.makepyfile(test_misuse="""
import pytest

@pytest.mark.posconform(None, suite="nightly")
def test_suite(posconform_case):
    posconform_case.check()
""")
    result = pytester.runpytest()
    assert result.ret != 0
    result.stdout.fnmatch_lines(["*@pytest.mark.posconform: invalid parameter `suite`*"])
