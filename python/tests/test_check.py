"""posconform.check on numpy kernels, in-process: verdicts, shrinking, replay, and what
happens when a kernel misbehaves (numpy only; these always run)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import xml.etree.ElementTree as ET

import numpy as np
import pytest

import posconform
from kernels import (BUGGY_ALIBI, CORRECT_ALIBI, REPO, alibi_slopes, numpy_example,
                     rotary_encode)

ALIBI_ENCODE = ["alibi.encode.h8", "alibi.encode.h12", "alibi.encode.h6"]


def verdicts(report, ids):
    return {i: report.case(i).verdict for i in ids}


def alibi_kernel(handler, **kwargs):
    return posconform.Kernel(handler, supports={"alibi": ["encode"]},
                             dtypes=kwargs.pop("dtypes", ["f64"]), **kwargs)


def test_the_numpy_example_kernel_conforms_in_process(tmp_path):
    _, kernel = numpy_example()
    report = posconform.check(kernel, fuzz=100, seed=11, save_failures=tmp_path)
    assert report.verdict == "conforming", report.text
    assert report.ok and report.exit_code == 0
    suite_ids = [c["id"] for c in posconform.suite_cases("core")]
    assert [c.id for c in report.cases if not c.random] == suite_ids
    assert all(c.verdict == "pass" for c in report.cases)
    assert report.fuzz["cases"] == 100 and report.fuzz["passed"] == 100
    assert sum(c.random for c in report.cases) == 100
    assert report.minimal == [] and os.listdir(tmp_path) == []
    assert report.kernel["name"] == "posconform-numpy-example"


def test_in_process_and_protocol_paths_agree_case_by_case(tmp_path):
    """The same kernel function, checked in-process and as a child process over the
    protocol by the `posconform` command: the same cases, verdicts and worst errors."""
    _, kernel = numpy_example()
    seed, fuzz = 3, 60
    inside = json.loads(posconform.check(kernel, fuzz=fuzz, seed=seed,
                                         save_failures=None).json)
    out = tmp_path / "protocol.json"
    command = f"{sys.executable} {os.path.join(REPO, 'examples', 'python', 'numpy_kernel.py')}"
    run = subprocess.run(
        [posconform_command(), "check", "--quiet", "--kernel", command, "--fuzz", str(fuzz),
         "--seed", str(seed), "--json", str(out), "--save-failures", str(tmp_path / "f")],
        capture_output=True, text=True, timeout=600)
    assert run.returncode == 0, run.stdout + run.stderr
    over_protocol = json.loads(out.read_text())

    def summary(document):
        return [(c["id"], c["verdict"]["kind"], c["random"],
                 [(o["name"], o["array_dtype"], o["worst"]) for o in c["outputs"]])
                for c in document["cases"]]

    assert len(inside["cases"]) == len(suite_cases_ids()) + fuzz
    assert summary(inside) == summary(over_protocol)
    assert inside["never_exercised"] == over_protocol["never_exercised"]


def suite_cases_ids():
    return [c["id"] for c in posconform.suite_cases("core")]


def posconform_command() -> str:
    """The `posconform` command this package installed beside the interpreter."""
    directory = os.path.dirname(sys.executable)
    for name in ("posconform", "posconform.exe"):
        path = os.path.join(directory, name)
        if os.path.isfile(path):
            return path
    pytest.fail(f"no posconform command beside {sys.executable}: the package installs it")


def test_a_planted_bug_is_found_shrunk_saved_and_replayed(tmp_path):
    report = posconform.check(BUGGY_ALIBI, fuzz=60, seed=1, save_failures=tmp_path)
    # Press et al.'s power-of-two rule is right for 8 heads only among 8, 12 and 6.
    assert verdicts(report, ALIBI_ENCODE) == {
        "alibi.encode.h8": "pass", "alibi.encode.h12": "fail", "alibi.encode.h6": "fail"}
    assert report.verdict == "nonconforming" and report.exit_code == 1
    # The diagnosis names the mistake on the failing case, and only there.
    h12 = report.case("alibi.encode.h12")
    assert h12.diagnosis is not None, report.text
    assert "alibi-power-of-two-rule-for-all-heads" in h12.diagnosis["finding"].get("faults", [])
    assert report.case("alibi.encode.h8").diagnosis is None
    assert report.diagnosis is not None and report.diagnosis["ranked"], report.text
    assert len(report.minimal) == 1
    minimal = report.minimal[0]
    heads = minimal.case["heads"]
    assert heads & (heads - 1) != 0, f"shrunk to {heads} heads, a power of two"
    assert report.case(minimal.id).verdict == "fail"
    assert minimal.saved and os.path.dirname(minimal.saved) == str(tmp_path)
    assert "Minimal failing cases" in report.text and minimal.saved in report.text
    # The saved case replays to the same failure, and the fixed kernel passes it.
    replay = posconform.check(BUGGY_ALIBI, cases=[minimal.saved])
    assert [(c.id, c.verdict) for c in replay.cases] == [(minimal.id, "fail")]
    assert replay.fuzz is None
    fixed = posconform.check(CORRECT_ALIBI, cases=[minimal.saved])
    assert [(c.id, c.verdict) for c in fixed.cases] == [(minimal.id, "pass")]


def test_the_correct_kernel_passes_every_case_it_declares():
    report = posconform.check(CORRECT_ALIBI, fuzz=60, seed=1, save_failures=None)
    assert verdicts(report, ALIBI_ENCODE) == dict.fromkeys(ALIBI_ENCODE, "pass")
    assert report.ok, report.text
    declared = [c for c in report.cases if c.verdict != "skipped"]
    assert all(c.scheme == "alibi" and c.operation == "encode" for c in declared)
    # Everything else in the suite is skipped as not declared, and said so.
    skipped = [c for c in report.cases if c.verdict == "skipped"]
    assert len(skipped) == len(suite_cases_ids()) - 3
    assert {"what": "rotary", "declared": False} in report.never_exercised
    assert {"what": "alibi scores", "declared": False} in report.never_exercised


def test_an_exception_costs_its_case_only_and_shows_the_traceback():
    def slopes_failing_on_twelve_heads(case, dtype, inputs):
        if case["heads"] == 12:
            raise ValueError("twelve heads are not wired up yet")
        return alibi_slopes(case, dtype, inputs)

    report = posconform.check(alibi_kernel(slopes_failing_on_twelve_heads), fuzz=0)
    assert verdicts(report, ALIBI_ENCODE) == {
        "alibi.encode.h8": "pass", "alibi.encode.h12": "error", "alibi.encode.h6": "pass"}
    reason = report.case("alibi.encode.h12").reason
    assert "ValueError: twelve heads are not wired up yet" in reason
    assert "slopes_failing_on_twelve_heads" in reason and "Traceback" in reason
    assert "alibi.encode.h12" in reason
    assert report.exit_code == 2 and report.verdict == "could not run"


@pytest.mark.parametrize("bad, words", [
    (lambda h: {"slopes": np.ones(h + 1)}, ["output `slopes` has shape [13], expected [12]"]),
    (lambda h: {"slopes": np.ones(h, dtype=complex)}, ["output `slopes`", "complex128"]),
    (lambda h: {"slopes": np.array(["a"] * h)}, ["output `slopes`", "<U1"]),
    (lambda h: {"slopes": (np.ones(h), "f8")}, ["output `slopes`", '"f8"']),
    (lambda h: {"slopes": object()}, ["output `slopes`"]),
    (lambda h: [np.ones(h)], ["a handler must return a dict of arrays, not list"]),
    (lambda h: {}, ["missing output `slopes`"]),
])
def test_malformed_outputs_are_errors_naming_case_and_output(bad, words):
    def kernel(case, dtype, inputs):
        if case["heads"] == 12:
            return bad(case["heads"])
        return alibi_slopes(case, dtype, inputs)

    report = posconform.check(alibi_kernel(kernel), fuzz=0)
    assert verdicts(report, ALIBI_ENCODE) == {
        "alibi.encode.h8": "pass", "alibi.encode.h12": "error", "alibi.encode.h6": "pass"}
    reason = report.case("alibi.encode.h12").reason
    for word in words:
        assert word in reason, reason


def test_unsupported_is_reported_as_skipped_with_the_reason():
    def eight_heads_only(case, dtype, inputs):
        if case["heads"] != 8:
            raise posconform.Unsupported("this build has eight heads only")
        return alibi_slopes(case, dtype, inputs)

    report = posconform.check(alibi_kernel(eight_heads_only), fuzz=0)
    assert verdicts(report, ALIBI_ENCODE) == {
        "alibi.encode.h8": "pass", "alibi.encode.h12": "skipped",
        "alibi.encode.h6": "skipped"}
    assert "this build has eight heads only" in report.case("alibi.encode.h6").reason


def test_keyboard_interrupt_in_the_kernel_stops_the_run_and_is_raised():
    calls = []

    def interrupted(case, dtype, inputs):
        calls.append(case["id"])
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        posconform.check(alibi_kernel(interrupted), fuzz=50)
    assert calls == ["alibi.encode.h8"]


@pytest.mark.parametrize("dtype, float_type", [
    ("f64", np.float64), ("f32", np.float32), ("f16", np.float16), ("bf16", np.float32)])
def test_inputs_arrive_as_numpy_arrays_in_the_dtype_asked_for(dtype, float_type):
    seen = []

    def record(case, dtype_asked, inputs):
        seen.append((dtype_asked, {n: a for n, a in inputs.items()}))
        return rotary_encode(case, dtype_asked, inputs)

    kernel = posconform.Kernel(record, supports={"rotary": ["encode"]}, dtypes=[dtype])
    report = posconform.check(kernel, only=["rotary.encode.adjacent"], fuzz=0)
    assert report.case("rotary.encode.adjacent").verdict == "pass", report.text
    [(asked, inputs)] = seen
    assert asked == dtype
    x, positions = inputs["x"], inputs["positions"]
    assert isinstance(x, np.ndarray) and x.dtype == float_type and x.shape == (2, 5, 64)
    assert x.flags.c_contiguous and x.flags.writeable
    assert positions.dtype == np.int64
    # query_start 1000, five queries (docs/conventions.md: query i at p0 + i).
    assert positions.tolist() == [1000, 1001, 1002, 1003, 1004]
    if dtype == "bf16":
        # float32 holding exact bf16 values: the low 16 bits of every element are zero.
        assert not np.any(x.view(np.uint32) & 0xFFFF)


def test_output_arrays_are_read_whatever_their_layout_and_dtype():
    def layouts(case, dtype, inputs):
        out = rotary_encode(case, dtype, inputs)["rotated"]
        variant = case["scheme"]["pairing"], case["head_dim"]
        if variant == ("adjacent", 64):
            return {"rotated": np.asfortranarray(out)}           # not C-contiguous
        if variant == ("half_split", 96):
            return {"rotated": out.astype(">f8")}                # byte-swapped
        if variant == ("half_split", 80):
            return {"rotated": out[:, ::-1, :][:, ::-1, :]}      # negative strides
        return {"rotated": out.tolist()}                         # nested lists

    kernel = posconform.Kernel(layouts, supports={"rotary": ["encode"]}, dtypes=["f64"])
    report = posconform.check(kernel, fuzz=0)
    encode = [c for c in report.cases if c.scheme == "rotary" and c.operation == "encode"]
    assert len(encode) == 6
    assert all(c.verdict == "pass" for c in encode), report.text


@pytest.mark.parametrize("returned, array_dtype", [
    (lambda s: s.astype(np.float32), "f32"),
    (lambda s: s.astype(np.float16), "f16"),
    (lambda s: (s.astype(np.float32), "bf16"), "bf16"),
    (lambda s: s, "f64"),
])
def test_outputs_are_answered_in_their_own_dtype_or_the_tagged_one(returned, array_dtype):
    def kernel(case, dtype, inputs):
        return {"slopes": returned(alibi_slopes(case, "f64", inputs)["slopes"])}

    report = posconform.check(alibi_kernel(kernel), fuzz=0)
    [output] = report.case("alibi.encode.h12").outputs
    assert output["array_dtype"] == array_dtype
    assert output["dtype"] == "f64"  # the budget follows the declared dtype
    # f64 slopes rounded to a narrower dtype are over an f64 budget.
    assert report.case("alibi.encode.h12").verdict == ("pass" if array_dtype == "f64"
                                                        else "fail")


def test_ml_dtypes_bfloat16_outputs_are_read_through_their_bits():
    ml_dtypes = pytest.importorskip(
        "ml_dtypes", reason="ml_dtypes is not installed here (pip install ml_dtypes)")

    def kernel(case, dtype, inputs):
        slopes = alibi_slopes(case, "f64", inputs)["slopes"].astype(ml_dtypes.bfloat16)
        # For 6 heads, a strided view (not contiguous) of the same values.
        return {"slopes": np.stack([slopes, slopes], axis=1)[:, 0] if case["heads"] == 6
                else slopes}

    report = posconform.check(alibi_kernel(kernel, dtypes=["bf16"]), fuzz=0)
    for case_id in ALIBI_ENCODE:
        [output] = report.case(case_id).outputs
        assert output["array_dtype"] == "bf16", case_id
        # Rounded to bf16 by ml_dtypes, within a bf16 budget.
        assert report.case(case_id).verdict == "pass", report.text


def test_integer_outputs_of_any_width_are_read_as_i64():
    def buckets(case, dtype, inputs):
        # Clip indices (Shaw et al.): clip(rel, -k, k) + k, returned as int16.
        k = case["scheme"]["clip_distance"]
        rel = inputs["relative_positions"]
        return {"indices": (np.clip(rel, -k, k) + k).astype(np.int16)}

    kernel = posconform.Kernel(buckets, supports={"clipped": ["encode"]}, dtypes=["f64"])
    report = posconform.check(kernel, fuzz=20, seed=2, save_failures=None)
    assert report.ok, report.text
    assert report.case("clipped.encode.k16").outputs[0]["array_dtype"] == "i64"


def test_a_wrong_declaration_fails_when_the_kernel_is_made():
    with pytest.raises(ValueError, match=r"supports\[0\]\.scheme: \"rope\" is not one of"):
        posconform.Kernel(alibi_slopes, supports={"rope": ["encode"]})
    with pytest.raises(ValueError, match=r"pairing\[0\]: \"diagonal\" is not one of"):
        posconform.Kernel(alibi_slopes, supports={"rotary": ["encode"]},
                          parameters={"rotary": {"pairing": ["diagonal"]}})
    with pytest.raises(ValueError, match="dtypes"):
        posconform.Kernel(alibi_slopes, supports={"alibi": ["encode"]}, dtypes=["f8"])
    with pytest.raises(ValueError, match="supports is required"):
        posconform.Kernel(alibi_slopes)
    with pytest.raises(TypeError, match="posconform.Kernel"):
        posconform.check(alibi_slopes)


def test_declared_parameter_values_narrow_what_is_sent():
    sent = []

    def record(case, dtype, inputs):
        sent.append(case["scheme"]["pairing"])
        return rotary_encode(case, dtype, inputs)

    kernel = posconform.Kernel(record, supports={"rotary": ["encode"]}, dtypes=["f64"],
                               parameters={"rotary": {"pairing": ["half_split"]}})
    report = posconform.check(kernel, fuzz=40, seed=5, save_failures=None)
    assert report.ok, report.text
    assert sent and set(sent) == {"half_split"}
    assert report.case("rotary.encode.adjacent").verdict == "skipped"
    assert {"what": 'rotary pairing "adjacent"', "declared": False} in report.never_exercised


@pytest.mark.parametrize("options, message", [
    ({"factor": 0.5}, "factor must be a finite number >= 1"),
    ({"fuzz_time": -1.0}, "fuzz_time must be a number of seconds"),
    ({"suite": "nightly"}, "suite"),
    ({"only": ["alibi.encode.h7"]}, "suite core has no case alibi.encode.h7"),
    ({"budget_dtype": "f8"}, "budget_dtype must be one of"),
    ({"fuzz": -1}, "fuzz must be >= 0"),
    ({"suite": None, "only": ["alibi.encode.h8"]}, "only selects cases of the suite"),
])
def test_bad_options_are_value_errors(options, message):
    with pytest.raises(ValueError, match=message):
        posconform.check(CORRECT_ALIBI, **options)


def test_save_failures_must_be_a_usable_directory(tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("")
    with pytest.raises(ValueError, match="save_failures"):
        posconform.check(CORRECT_ALIBI, save_failures=blocker / "below")


def test_the_report_carries_text_json_junit_and_heatmaps(tmp_path):
    def wrong_sign(case, dtype, inputs):
        # Planted bug: ALiBi bias added with the wrong sign (+m·Δ instead of -m·Δ).
        _, kernel = numpy_example()
        scores = kernel(case, dtype, inputs)["scores"]
        p0, m, n = case["query_start"], case["memory_len"], case["query_len"]
        distance = (p0 + np.arange(n))[:, None] - (p0 - m + np.arange(m + n))[None, :]
        slopes = alibi_slopes(case, dtype, inputs)["slopes"]
        return {"scores": scores + 2 * slopes[:, None, None] * distance[None]}

    kernel = posconform.Kernel(wrong_sign, supports={"alibi": ["scores"]}, dtypes=["f64"])
    report = posconform.check(kernel, fuzz=0)
    assert report.case("alibi.scores.h12").verdict == "fail"
    document = json.loads(report.json)
    assert document["format"] == "posconform.report" and document["exit_code"] == 1
    suite = ET.fromstring(report.junit)
    names = [t.get("name") for t in suite.iter("testcase")]
    assert "alibi.scores.h12" in names and len(names) == len(report.cases)
    failed = [t for t in suite.iter("testcase") if t.find("failure") is not None]
    assert [t.get("name") for t in failed] == ["alibi.scores.h12"]
    svg = report.svg("alibi.scores.h12", "scores")
    assert svg is not None and svg.lstrip().startswith("<svg")
    assert report.svg("alibi.scores.h12", "nothing") is None
    alone = report.case_text("alibi.scores.h12")
    assert "Findings" in alone and "alibi.scores.h12" in alone
    assert "alibi.encode.h8" not in alone
    saved = report.save_case("alibi.scores.h12", tmp_path)
    assert os.path.basename(saved) == "alibi.scores.h12.json"
    with pytest.raises(KeyError):
        report.case_text("no.such.case")
    assert "nonconforming" in repr(report)


def test_importing_posconform_does_not_import_torch():
    code = "import sys, posconform; print('torch' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "False"
