"""``posconform.Kernel``: a Python function under test and what it declares."""

from __future__ import annotations

import os
import traceback
from typing import Any, Callable, Iterable, Mapping

import numpy as np

from . import _native, protocol
from .protocol import Unsupported


class Kernel:
    """A kernel under test: your handler(s) and the capabilities they declare.

    ``handler(case, dtype, inputs) -> {name: array}`` is the same handler the protocol
    helper serves (``posconform.protocol``): ``case`` is the case object as a dict,
    ``dtype`` the dtype to compute in (``"f64"``, ``"f32"``, ``"f16"``, ``"bf16"``),
    ``inputs`` the named input arrays as numpy arrays (float ones in ``dtype``; bf16
    arrives as float32 holding the exact bf16 values; positions as int64). It returns
    the outputs by name: numpy arrays (answered in their own dtype), anything
    ``numpy.asarray`` takes, or ``(array, "bf16")`` to answer in another dtype. Raise
    :class:`posconform.Unsupported` to decline a case (reported as skipped).

    ``handler`` may also be a dict ``{(scheme, operation): fn}`` or ``{scheme:
    {operation: fn}}``; then ``supports`` may be omitted and is derived from its keys.

    Capabilities (docs/protocol.md, "Capabilities"), read by the same parser as a
    protocol handshake:

    - ``supports``: ``{scheme: [operations]}``, or the protocol's list of entries
      ``[{"scheme", "operations", "parameters", "dtypes"}]``.
    - ``dtypes``: the dtypes the kernel computes in, preferred first.
    - ``parameters``: ``{scheme: {parameter: [accepted forms]}}``, e.g.
      ``{"rotary": {"pairing": ["half_split"]}}``.
    - ``conventions``: free-text notes shown in the report.
    """

    def __init__(self, handler: Callable | Mapping, *, supports: Any = None,
                 dtypes: Iterable[str] = ("f64",), parameters: Mapping | None = None,
                 name: str | None = None, version: str = "",
                 conventions: Iterable[str] = ()):
        table = protocol._flatten_handlers(handler)
        if table is None and not callable(handler):
            raise TypeError("handler must be a function or a dict of functions")
        if supports is None:
            if table is None:
                raise ValueError("supports is required when handler is a single function, "
                                 "e.g. supports={\"rotary\": [\"encode\"]}")
            supports = {}
            for scheme, operation in table:
                supports.setdefault(scheme, []).append(operation)
        if isinstance(dtypes, str):
            dtypes = [dtypes]
        self.handler = handler
        self.entries = protocol._entries(supports, parameters)
        self.dtypes = list(dtypes)
        self.name = name or getattr(handler, "__name__", None) or "python kernel"
        self.version = str(version)
        self.conventions = [str(c) for c in conventions]
        self._supported = {(e["scheme"], op) for e in self.entries for op in e["operations"]}
        self._all_dtypes = self.dtypes + [d for e in self.entries for d in e.get("dtypes", [])
                                          if d not in self.dtypes]
        # Read now by the harness's own handshake parser, so a wrong declaration fails
        # here, naming the field, rather than at the start of a run.
        self.capabilities: dict = _native.read_handshake(self.describe())
        """What the harness reads from the declaration (schemes, parameters, dtypes)."""

    def __repr__(self) -> str:
        schemes = sorted({e["scheme"] for e in self.entries})
        return (f"posconform.Kernel({self.name!r}, schemes={schemes}, "
                f"dtypes={self.dtypes})")

    def describe(self) -> dict:
        """The handshake this kernel makes: the protocol's ``handshake`` result."""
        return {
            "protocol": protocol.PROTOCOL,
            "name": self.name,
            "version": self.version,
            "supports": [dict(e) for e in self.entries],
            "dtypes": list(self.dtypes),
            "conventions": list(self.conventions),
        }

    def __call__(self, case: dict, dtype: str, inputs: dict) -> dict:
        """Runs the handler on one case, as the harness would (for your own tests)."""
        return protocol.call_handler(self.handler, case, dtype, inputs)

    def serve(self, **streams) -> None:
        """Serves this kernel over the stdio protocol (``posconform check --kernel``)."""
        protocol.serve(self.name, self.version, self.entries, self.dtypes, self.handler,
                       **streams)

    # -- what the native checker calls (python/src/kernel.rs) ---------------------------

    def _posconform_handshake(self) -> dict:
        return self.describe()

    def _posconform_run(self, case: dict, dtype: str, inputs: dict):
        key = (case["scheme"]["name"], case["operation"]["kind"])
        if key not in self._supported:
            return "unsupported", f"{key[0]} {key[1]} is not in this kernel's supports"
        if dtype not in self._all_dtypes:
            return "unsupported", f"dtype {dtype!r} is not one this kernel declared"
        try:
            outputs = protocol.call_handler(self.handler, case, dtype, inputs)
            return "outputs", _normalise(outputs)
        except Unsupported as e:
            return "unsupported", str(e) or "unsupported"
        except Exception as e:  # the case's error; KeyboardInterrupt goes through
            return "error", _described(e)


_PACKAGE = os.path.dirname(os.path.abspath(__file__))


def _described(error: BaseException) -> tuple:
    """(one-line summary, traceback) of a kernel's exception, without the frames of this
    package's own plumbing at the top of the stack."""
    tb = error.__traceback__
    while tb is not None and os.path.dirname(
            os.path.abspath(tb.tb_frame.f_code.co_filename)) == _PACKAGE:
        tb = tb.tb_next
    summary = traceback.format_exception_only(type(error), error)[-1].strip()
    text = "".join(traceback.format_exception(type(error), error, tb)).rstrip()
    return summary.splitlines()[0] if summary else type(error).__name__, text


def _normalise(outputs: Any) -> dict:
    """``{name: (numpy array, dtype name or None)}`` from what a handler returned."""
    if not isinstance(outputs, Mapping):
        raise TypeError(f"a handler must return a dict of arrays, not "
                        f"{type(outputs).__name__}")
    normalised = {}
    for name, value in outputs.items():
        if not isinstance(name, str):
            raise TypeError(f"output names must be strings, not {name!r}")
        declared = None
        if isinstance(value, tuple):
            if len(value) != 2 or not isinstance(value[1], str):
                raise TypeError(f"output `{name}`: a tuple must be (array, dtype name)")
            value, declared = value
        try:
            array = value if isinstance(value, np.ndarray) else np.asarray(value)
        except Exception as e:  # e.g. a tensor on an accelerator
            raise TypeError(f"output `{name}`: numpy cannot read a "
                            f"{type(value).__name__}: {e}") from e
        normalised[name] = (array, declared)
    return normalised


def as_kernel(kernel: Any) -> Any:
    """``kernel`` if the checker can drive it, else a TypeError saying what to pass."""
    if hasattr(kernel, "_posconform_run") and hasattr(kernel, "_posconform_handshake"):
        return kernel
    raise TypeError(
        f"posconform.check needs a posconform.Kernel, not {type(kernel).__name__}: wrap "
        "your function as posconform.Kernel(fn, supports={...}, dtypes=[...])")
