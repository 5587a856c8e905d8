"""``posconform.bench``: time a kernel in process, as ``posconform bench`` does over the
protocol (docs/bench.md)."""

from __future__ import annotations

import json as _json
import os
from typing import Iterable

from . import _native


class BenchResult:
    """The result of :func:`bench`.

    ``text`` is the report ``posconform bench`` prints, ``json`` the JSON document (a
    baseline for a later run, in process or over the protocol: docs/bench.md),
    ``document`` the same parsed, ``exit_code`` the status the command would give (0 no
    regression the noise supports, 1 a regression, 2 a workload could not be timed).
    """

    def __init__(self, outcome):
        self.text: str = outcome.text
        self.json: str = outcome.json
        self.exit_code: int = outcome.exit_code
        self.document: dict = _json.loads(self.json)

    @property
    def ok(self) -> bool:
        """Whether the exit code is 0."""
        return self.exit_code == 0

    def __repr__(self) -> str:
        workloads = len(self.document.get("workloads", []))
        return f"posconform.BenchResult({workloads} workloads, exit_code={self.exit_code})"


def _names(values: Iterable[str] | str | None) -> list | None:
    if values is None:
        return None
    if isinstance(values, str):
        return [values]
    return [str(v) for v in values]


def bench(kernel, *, shapes: Iterable[str] | str = ("medium",),
          schemes: Iterable[str] | str | None = None,
          operations: Iterable[str] | str | None = None,
          dtypes: Iterable[str] | str | None = None,
          workloads: Iterable[str] | str | None = None,
          warmup: int = 3, repeat: int = 15, blocks: int = 5,
          baseline: str | os.PathLike | None = None,
          threshold: float = 0.25) -> BenchResult:
    """Times ``kernel`` (a :class:`posconform.Kernel`) in process.

    The workloads are those ``posconform bench --kernel`` would time for the same
    declaration: every declared scheme × operation × dtype at each shape (``"small"``,
    ``"medium"``, ``"large"`` or ``"L128_M128_d64_h4"``), narrowed by ``schemes``,
    ``operations``, ``dtypes`` and ``workloads`` (name patterns with ``*`` and ``?``).
    Each is timed ``repeat`` times, shared out over ``blocks`` blocks in which every
    workload takes its turn (``warmup`` untimed runs before its first block, one
    before each later one), between runs of the calibration workloads; the figure is
    the handler's own time. With ``baseline`` (a
    JSON document of an earlier run), the gate compares ratios with ``threshold`` (a
    fraction: 0.25 is 25%). Bad arguments and baselines raise ``ValueError``.
    """
    outcome = _native.bench(
        kernel, shapes=_names(shapes), schemes=_names(schemes),
        operations=_names(operations), dtypes=_names(dtypes),
        workloads=_names(workloads), warmup=warmup, repeat=repeat,
        blocks=blocks, baseline=os.fspath(baseline) if baseline is not None else None,
        threshold=float(threshold))
    return BenchResult(outcome)
