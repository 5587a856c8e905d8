"""posconform.bench: a kernel timed in process. No test asserts on time: the tests
read what was timed and how, and what the gate refuses."""

from __future__ import annotations

import json

import pytest

import posconform

from kernels import alibi_slopes


def alibi_kernel():
    return posconform.Kernel(alibi_slopes, supports={"alibi": ["encode"]},
                             dtypes=["f64", "f32"], name="slopes", version="1.0")


def test_bench_times_every_declared_workload_in_process():
    result = posconform.bench(alibi_kernel(), shapes=["small"], repeat=5, warmup=1)
    doc = result.document
    assert result.exit_code == 0, result.text
    assert (doc["format"], doc["version"], doc["target"]) == ("posconform.bench", 2, "kernel")
    assert doc["subject"] == "slopes 1.0"
    names = [w["name"] for w in doc["workloads"]]
    assert names == ["alibi/encode/L32_M32_d32_h2/f64", "alibi/encode/L32_M32_d32_h2/f32"]
    assert doc["settings"]["blocks"] == 5
    for w in doc["workloads"]:
        assert w["status"] == "timed"
        assert len(w["block_floors"]) == 5   # one floor per block, five runs of one each
        assert w["measured"] == "kernel"   # the handler's own time, no protocol
        assert w["overhead_ms"] is None and w["ratio"] > 0
    assert doc["dry_run"] is None   # no protocol, nothing to subtract
    assert "alibi/encode/L32_M32_d32_h2/f64" in result.text


def test_bench_filters_and_refuses_bad_arguments(tmp_path):
    result = posconform.bench(alibi_kernel(), shapes="small", dtypes="f32", repeat=5)
    assert [w["dtype"] for w in result.document["workloads"]] == ["f32"]
    with pytest.raises(ValueError, match="these filters select none"):
        posconform.bench(alibi_kernel(), shapes="small", schemes="rotary", repeat=5)
    with pytest.raises(ValueError, match="shape"):
        posconform.bench(alibi_kernel(), shapes="L0_M0_d2_h1")
    with pytest.raises(ValueError, match="repeat"):
        posconform.bench(alibi_kernel(), repeat=1)
    with pytest.raises(ValueError, match="blocks must be from 2 to repeat"):
        posconform.bench(alibi_kernel(), repeat=5, blocks=6)
    with pytest.raises(ValueError, match="threshold"):
        posconform.bench(alibi_kernel(), threshold=0)
    bad = tmp_path / "baseline.json"
    bad.write_text(json.dumps({"format": "posconform.bench", "version": 7}))
    with pytest.raises(ValueError, match=r"field `version`"):
        posconform.bench(alibi_kernel(), shapes="small", repeat=5, baseline=bad)


def test_a_run_is_a_baseline_for_the_next(tmp_path):
    first = posconform.bench(alibi_kernel(), shapes="small", dtypes="f64", repeat=5)
    baseline = tmp_path / "baseline.json"
    baseline.write_text(first.json)
    second = posconform.bench(alibi_kernel(), shapes="small", dtypes="f64", repeat=5,
                              baseline=baseline, threshold=10.0)
    gate = second.document["gate"]
    assert gate["baseline"] == str(baseline)
    assert [c["name"] for c in gate["changes"]] == ["alibi/encode/L32_M32_d32_h2/f64"]
    # At a threshold of 1000% only a noise band wider than that leaves the question open.
    assert gate["counts"]["regressed"] == 0
