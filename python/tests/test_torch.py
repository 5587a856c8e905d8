"""The torch adapter: a rotary kernel written in torch (from docs/conventions.md,
"rotary" and "Visibility and masking"), checked in f32, f16 and bf16 on the CPU, and on
CUDA when this machine has it. Skipped, with the reason shown, when torch is not
installed (.ci/run installs it)."""

from __future__ import annotations

import math
import subprocess
import sys

import numpy as np
import pytest

torch = pytest.importorskip(
    "torch", reason="torch is not installed here (pip install torch); the torch adapter "
                    "tests need it")

import posconform  # noqa: E402
from posconform.torch import (from_torch, resolve_device, to_torch, torch_dtype,  # noqa: E402
                              torch_kernel)

ROTARY = ["encode", "scores", "attention"]


def rotate(x, positions, scheme):
    """R(p) x on the first rotary_dim dims of x [H, N, d]; angles and sin/cos formed in
    float64 (a narrow dtype loses phase with position), then cast to x's dtype."""
    r, base = scheme["rotary_dim"], float(scheme["base"])
    p = positions.to(torch.float64)
    scaling = scheme.get("scaling", "none")
    if isinstance(scaling, dict) and "linear_interpolation" in scaling:
        p = p / scaling["linear_interpolation"]["factor"]
    elif isinstance(scaling, dict) and "ntk_aware" in scaling:
        base = base * scaling["ntk_aware"]["factor"] ** (r / (r - 2.0))
    theta = torch.tensor([math.pow(base, -2.0 * n / r) for n in range(r // 2)],
                         dtype=torch.float64, device=x.device)
    angles = p[:, None] * theta[None, :]
    cos, sin = angles.cos().to(x.dtype), angles.sin().to(x.dtype)
    if scheme["pairing"] == "adjacent":
        a, b = torch.arange(0, r, 2), torch.arange(1, r, 2)
    else:
        a, b = torch.arange(r // 2), torch.arange(r // 2, r)
    a, b = a.to(x.device), b.to(x.device)
    out = x.clone()
    out[..., a] = x[..., a] * cos - x[..., b] * sin
    out[..., b] = x[..., a] * sin + x[..., b] * cos
    return out


def scale_of(case):
    scale = case["scheme"].get("scale", "inverse_sqrt_dim")
    return scale["fixed"] if isinstance(scale, dict) else 1.0 / math.sqrt(case["head_dim"])


def window(case, inputs):
    """Rotated queries and keys, scaled scores with -inf where a key is not visible."""
    q, k = inputs["q"], inputs["k"]
    p0, m, n = case["query_start"], case["memory_len"], case["query_len"]
    device = q.device
    pos_q = torch.arange(n, device=device) + p0
    pos_k = torch.arange(m + n, device=device) + (p0 - m)
    scores = (rotate(q, pos_q, case["scheme"]) @ rotate(k, pos_k, case["scheme"])
              .transpose(1, 2)) * scale_of(case)
    visible = pos_k[None, :] <= pos_q[:, None]
    for j in case.get("hidden_keys") or []:
        visible[:, j] = False
    return scores.masked_fill(~visible, float("-inf")), visible


def rope_kernel(case, dtype, inputs):
    kind = case["operation"]["kind"]
    if kind == "encode":
        return {"rotated": rotate(inputs["x"], inputs["positions"], case["scheme"])}
    scores, visible = window(case, inputs)
    if kind == "scores":
        return {"scores": scores}
    # Softmax over visible keys in float32 (as fused kernels accumulate), fully masked
    # rows all zero.
    wide = scores.float()
    probs = torch.softmax(wide.masked_fill(~visible, -1e30), dim=-1) * visible
    probs = probs.to(scores.dtype)
    return {"probs": probs, "output": probs @ inputs["v"]}


def test_dtype_names_map_to_torch_dtypes():
    assert [torch_dtype(n) for n in ("f64", "f32", "f16", "bf16", "i64")] == [
        torch.float64, torch.float32, torch.float16, torch.bfloat16, torch.int64]
    with pytest.raises(ValueError):
        torch_dtype("f8")


def test_inputs_and_outputs_share_memory_on_the_cpu():
    cpu = torch.device("cpu")
    for name, numpy_type in (("f64", np.float64), ("f32", np.float32), ("f16", np.float16)):
        array = np.arange(6, dtype=numpy_type).reshape(2, 3)
        tensor = to_torch(array, name, cpu)
        assert tensor.dtype == torch_dtype(name)
        assert tensor.data_ptr() == array.ctypes.data
        back = from_torch("out", tensor)
        assert isinstance(back, np.ndarray) and np.shares_memory(back, array)
    positions = np.arange(4, dtype=np.int64)
    assert to_torch(positions, "bf16", cpu).dtype == torch.int64
    # bf16: the harness's float32 (exact bf16 values) becomes bfloat16 exactly, and a
    # bfloat16 output comes back as float32 tagged bf16.
    exact = np.array([1.0, -0.5, 3.0e-3], dtype=np.float32)
    exact = (exact.view(np.uint32) & 0xFFFF0000).view(np.float32)
    tensor = to_torch(exact, "bf16", cpu)
    assert tensor.dtype == torch.bfloat16
    array, tag = from_torch("out", tensor)
    assert tag == "bf16" and array.dtype == np.float32 and np.array_equal(array, exact)
    with pytest.raises(TypeError, match="complex"):
        from_torch("out", torch.zeros(2, dtype=torch.complex64))


def test_devices():
    assert resolve_device("cpu") == torch.device("cpu")
    expected = "cuda" if torch.cuda.is_available() else None
    if expected is None and getattr(torch.backends, "mps", None) is not None \
            and torch.backends.mps.is_available():
        expected = "mps"
    assert resolve_device("auto").type == (expected or "cpu")
    if not torch.cuda.is_available():
        with pytest.raises(ValueError, match="cuda"):
            torch_kernel(rope_kernel, supports={"rotary": ROTARY}, device="cuda")


@pytest.mark.parametrize("dtypes", [["f32"], ["f16"], ["bf16"], ["f32", "bf16"]])
def test_a_torch_rope_conforms_on_the_cpu(dtypes, tmp_path):
    seen = set()

    def recording(case, dtype, inputs):
        seen.update((dtype, t.dtype, t.device.type) for t in inputs.values()
                    if t.is_floating_point())
        return rope_kernel(case, dtype, inputs)

    kernel = torch_kernel(recording, supports={"rotary": ROTARY}, dtypes=dtypes,
                          name="torch-rope", device="cpu")
    report = posconform.check(kernel, fuzz=60, seed=4, save_failures=tmp_path)
    assert report.ok, report.text
    run = [c for c in report.cases if c.verdict == "pass" and not c.random]
    assert {c.id for c in run} >= {"rotary.encode.adjacent", "rotary.scores.scaled",
                                   "rotary.attention.bf16", "rotary.attention.f32"}
    assert seen == {(d, torch_dtype(d), "cpu") for d in dtypes}
    # Outputs are judged in the dtype the kernel computed in.
    for case in run:
        assert all(o["dtype"] in dtypes for o in case.outputs), case
    if "bf16" in dtypes:
        [probs, output] = report.case("rotary.attention.bf16").outputs
        assert (probs["array_dtype"], output["array_dtype"]) == ("bf16", "bf16")
    assert any("torch" in note for note in report.notes)


def test_a_planted_rope_bug_is_found_in_bf16(tmp_path):
    def wrong_direction(case, dtype, inputs):
        # Planted bug: rotates by -φ (the inverse rotation), a sign slip in sin.
        if case["operation"]["kind"] == "encode":
            flipped = dict(case["scheme"])
            out = rotate(inputs["x"], -inputs["positions"], flipped)
            return {"rotated": out}
        return rope_kernel(case, dtype, inputs)

    kernel = torch_kernel(wrong_direction, supports={"rotary": ["encode"]},
                          dtypes=["bf16"], device="cpu")
    report = posconform.check(kernel, fuzz=30, seed=2, save_failures=tmp_path)
    assert report.case("rotary.encode.adjacent").verdict == "fail"
    assert report.minimal and report.minimal[0].case["dtype"] == "bf16"
    assert report.exit_code == 1


def test_a_tensor_left_on_the_wrong_type_is_an_error_naming_the_output():
    def complex_scores(case, dtype, inputs):
        return {"rotated": torch.zeros(inputs["x"].shape, dtype=torch.complex64)}

    kernel = torch_kernel(complex_scores, supports={"rotary": ["encode"]}, dtypes=["f32"])
    report = posconform.check(kernel, only=["rotary.encode.adjacent"], fuzz=0)
    reason = report.case("rotary.encode.adjacent").reason
    assert "output `rotated`: torch dtype torch.complex64 has no posconform dtype" in reason


@pytest.mark.skipif(not torch.cuda.is_available(), reason="no CUDA device on this machine")
def test_a_torch_rope_conforms_on_cuda(tmp_path):
    kernel = torch_kernel(rope_kernel, supports={"rotary": ROTARY}, dtypes=["f32", "bf16"],
                          device="cuda")
    report = posconform.check(kernel, fuzz=60, seed=4, save_failures=tmp_path)
    assert report.ok, report.text


def test_the_adapter_imports_torch_only_when_imported():
    code = ("import sys, posconform; before = 'torch' in sys.modules; "
            "import posconform.torch; print(before, 'torch' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=300)
    assert out.returncode == 0, out.stderr
    assert out.stdout.split() == ["False", "True"]
