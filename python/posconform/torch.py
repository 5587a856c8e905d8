"""Check a function of torch tensors: ``posconform.torch.torch_kernel``.

Importing this module imports torch; ``import posconform`` alone never does.

    from posconform.torch import torch_kernel

    def rope(case, dtype, inputs):              # inputs: torch tensors on `device`
        x, pos = inputs["x"], inputs["positions"]
        ...
        return {"rotated": out}                 # torch tensors (any device) or arrays

    kernel = torch_kernel(rope, supports={"rotary": ["encode"]}, dtypes=["bf16", "f32"],
                          device="auto")
    report = posconform.check(kernel)

dtypes: the harness's ``f64``, ``f32``, ``f16``, ``bf16`` and ``i64`` become
``torch.float64``, ``float32``, ``float16``, ``bfloat16`` and ``int64``. Inputs are made
with ``torch.from_numpy`` (sharing the numpy buffer, no copy) and then moved to the
device; bf16 inputs arrive from the harness as float32 holding exact bf16 values and
are converted exactly. Outputs come back with ``.detach()``, to the CPU when they are
elsewhere, and ``.numpy()`` (no copy on the CPU); a bfloat16 output is widened to
float32 (exact) and answered as bf16, so its budget is bf16's.

``device``: ``"cpu"`` (default), ``"cuda"``, ``"cuda:1"``, ``"mps"``, any
``torch.device``, or ``"auto"`` (CUDA when ``torch.cuda.is_available()``, else MPS when
available, else the CPU). A device that is not available is an error when the kernel
is made, not a silent fallback.
"""

from __future__ import annotations

from typing import Any, Callable, Iterable, Mapping

import numpy as np
import torch

from ._kernel import Kernel

__all__ = ["TORCH_DTYPES", "resolve_device", "torch_dtype", "torch_kernel"]

TORCH_DTYPES = {
    "f64": torch.float64,
    "f32": torch.float32,
    "f16": torch.float16,
    "bf16": torch.bfloat16,
    "i64": torch.int64,
}
"""The torch dtype of each harness dtype name."""

_FLOAT_OUT = {torch.float64, torch.float32, torch.float16}
_INT_OUT = {torch.int64, torch.int32, torch.int16, torch.int8, torch.uint8, torch.bool}


def torch_dtype(name: str) -> torch.dtype:
    """The torch dtype for a harness dtype name (``"bf16"`` -> ``torch.bfloat16``)."""
    if name not in TORCH_DTYPES:
        raise ValueError(f"unknown dtype {name!r}; expected one of {sorted(TORCH_DTYPES)}")
    return TORCH_DTYPES[name]


def resolve_device(device: Any = "cpu") -> torch.device:
    """``device`` as a ``torch.device``; ``"auto"`` picks CUDA, then MPS, then the CPU.

    Raises ``ValueError`` for an accelerator torch cannot use here.
    """
    if device is None or device == "auto":
        if torch.cuda.is_available():
            return torch.device("cuda")
        mps = getattr(torch.backends, "mps", None)
        if mps is not None and mps.is_available():
            return torch.device("mps")
        return torch.device("cpu")
    resolved = torch.device(device)
    if resolved.type == "cuda" and not torch.cuda.is_available():
        raise ValueError(f"device {device!r}: torch.cuda.is_available() is False here")
    if resolved.type == "mps":
        mps = getattr(torch.backends, "mps", None)
        if mps is None or not mps.is_available():
            raise ValueError(f"device {device!r}: torch.backends.mps.is_available() is "
                             "False here")
    if resolved.type == "cuda" and resolved.index is not None and \
            resolved.index >= torch.cuda.device_count():
        raise ValueError(f"device {device!r}: only {torch.cuda.device_count()} CUDA "
                         "device(s) here")
    return resolved


def to_torch(array: np.ndarray, dtype: str, device: torch.device) -> torch.Tensor:
    """One input as a tensor: float arrays in ``dtype`` (bf16 converted exactly from the
    float32 the harness sends), integer arrays as int64."""
    tensor = torch.from_numpy(array)
    if tensor.is_floating_point():
        wanted = torch_dtype(dtype)
        if tensor.dtype != wanted:
            tensor = tensor.to(wanted)
    return tensor.to(device)


def from_torch(name: str, value: Any) -> Any:
    """One output for the harness: a numpy array, or ``(array, dtype name)``."""
    declared = None
    if isinstance(value, tuple) and len(value) == 2 and isinstance(value[1], str):
        value, declared = value
    if not isinstance(value, torch.Tensor):
        return value if declared is None else (value, declared)
    tensor = value.detach()
    if tensor.device.type != "cpu":
        tensor = tensor.cpu()
    if tensor.dtype == torch.bfloat16:
        # Widening bf16 to float32 is exact; the harness rounds back to bf16 (a no-op).
        return tensor.float().numpy(), declared or "bf16"
    if tensor.dtype in _FLOAT_OUT or tensor.dtype in _INT_OUT:
        array = tensor.numpy()
        return array if declared is None else (array, declared)
    raise TypeError(f"output `{name}`: torch dtype {tensor.dtype} has no posconform "
                    "dtype (use float64, float32, float16, bfloat16 or an integer dtype)")


def torch_kernel(fn: Callable | Mapping, *, supports: Any = None,
                 dtypes: Iterable[str] = ("f32",), parameters: Mapping | None = None,
                 device: Any = "cpu", name: str | None = None, version: str = "",
                 conventions: Iterable[str] = ()) -> Kernel:
    """A :class:`posconform.Kernel` for ``fn(case, dtype, inputs) -> {name: tensor}``
    whose inputs are torch tensors on ``device`` (see the module's documentation).

    ``fn`` may be a dict of functions as for :class:`posconform.Kernel`; the other
    arguments are the same.
    """
    target = resolve_device(device)

    def adapt(function: Callable) -> Callable:
        def handler(case: dict, dtype: str, inputs: dict) -> dict:
            tensors = {n: to_torch(a, dtype, target) for n, a in inputs.items()}
            outputs = function(case, dtype, tensors)
            if not isinstance(outputs, Mapping):
                raise TypeError(f"a handler must return a dict of tensors, not "
                                f"{type(outputs).__name__}")
            return {n: from_torch(n, v) for n, v in outputs.items()}
        handler.__name__ = getattr(function, "__name__", "handler")
        return handler

    if callable(fn):
        handler: Any = adapt(fn)
    else:
        handler = {}
        for key, value in fn.items():
            if isinstance(key, tuple):
                handler[key] = adapt(value)
            else:
                handler[key] = {op: adapt(f) for op, f in value.items()}
    kernel = Kernel(handler, supports=supports, dtypes=dtypes, parameters=parameters,
                    name=name or getattr(fn, "__name__", None) or "torch kernel",
                    version=version,
                    conventions=list(conventions) + [f"torch {torch.__version__} on {target}"])
    kernel.device = target
    return kernel
