"""``posconform.check`` and the report it returns."""

from __future__ import annotations

import json as _json
import os
from dataclasses import dataclass, field
from typing import Any, Iterable, Sequence

from . import _native
from ._kernel import as_kernel

VERDICTS = {0: "conforming", 1: "nonconforming", 2: "could not run"}


@dataclass(frozen=True)
class CaseResult:
    """One case of a run, as in the JSON report (``cases[i]``)."""

    id: str
    scheme: str
    operation: str
    verdict: str
    """``"pass"``, ``"fail"``, ``"skipped"`` or ``"error"``."""
    reason: str | None
    """Why a case was skipped or could not be compared (with the kernel's traceback)."""
    random: bool
    """Drawn by the fuzzer (or a shrinking step the kernel could not answer)."""
    faults: list = field(default_factory=list)
    """Ids of the catalogued faults the case is built to expose (``posconform explain ID``)."""
    outputs: list = field(default_factory=list)
    """Per output: name, shape, dtype, passed, decided_by, worst, patterns, ..."""
    warnings: list = field(default_factory=list)
    diagnosis: dict | None = None
    """For a failing case that was diagnosed: which catalogued faults reproduce the
    kernel's outputs (``finding``, ``candidates``; the JSON report's ``diagnosis``)."""


@dataclass(frozen=True)
class MinimalCase:
    """A failure found by fuzzing, shrunk to the smallest case that still fails."""

    id: str
    found: str
    """The random case that failed first."""
    tried: int
    """Smaller cases the shrinker ran."""
    saved: str | None
    """The vector file it was saved as (replay it with ``check(kernel, cases=[saved])``)."""
    case: dict
    text: str


class Report:
    """The outcome of :func:`check`: the verdict, every case, the minimal failing cases,
    and the reports the command line writes (``text``, ``json``, ``junit``)."""

    def __init__(self, outcome: Any):
        self._outcome = outcome
        self.text: str = outcome.text()
        """The text report, as ``posconform check`` prints it."""
        self.json: str = outcome.json()
        """The JSON report, as ``posconform check --json`` writes it."""
        document = _json.loads(self.json)
        self.exit_code: int = document["exit_code"]
        self.counts: dict = document["counts"]
        self.notes: list = document["notes"]
        self.never_exercised: list = document["never_exercised"]
        self.diagnosis: dict | None = document.get("diagnosis")
        """The run's diagnosis (``conclusive``, ``tied``, ``ranked``), or None when no
        failing case was diagnosed."""
        self.cases: list[CaseResult] = [
            CaseResult(id=c["id"], scheme=c["scheme"], operation=c["operation"],
                       verdict=c["verdict"]["kind"], reason=c["verdict"].get("reason"),
                       random=c["random"], faults=c["faults"], outputs=c["outputs"],
                       warnings=c["warnings"], diagnosis=c.get("diagnosis"))
            for c in document["cases"]]
        self.minimal: list[MinimalCase] = [MinimalCase(**m) for m in outcome.minimal()]
        self.fuzz: dict | None = outcome.fuzz()
        self.kernel: dict = outcome.info()
        """What the kernel declared, as the harness read it."""

    @property
    def verdict(self) -> str:
        """``"conforming"``, ``"nonconforming"`` or ``"could not run"`` (exit code 0, 1, 2)."""
        return VERDICTS.get(self.exit_code, "could not run")

    @property
    def ok(self) -> bool:
        """Every case that ran conforms, none errored, and at least one passed."""
        return self.exit_code == 0

    @property
    def junit(self) -> str:
        """The JUnit XML report, as ``posconform check --junit`` writes it."""
        return self._outcome.junit()

    def failures(self) -> list[CaseResult]:
        """The cases over budget and the cases that could not be compared."""
        return [c for c in self.cases if c.verdict in ("fail", "error")]

    def case(self, case_id: str) -> CaseResult:
        for c in self.cases:
            if c.id == case_id:
                return c
        raise KeyError(case_id)

    def case_text(self, case_id: str) -> str:
        """The text report of one case alone (for a minimal case, with its shrinking)."""
        return self._outcome.case_text(case_id)

    def save_case(self, case_id: str, directory: str | os.PathLike) -> str:
        """Writes a case of this run (suite, file or minimal) as a vector file into
        ``directory`` and returns its path, for ``check(kernel, cases=[path])`` or
        ``posconform check --kernel ... --case path``."""
        return self._outcome.save_case(case_id, os.fspath(directory))[-1]

    def svg(self, case_id: str, output: str) -> str | None:
        """An SVG heatmap of one output's error (scores and probabilities), or None."""
        return self._outcome.svg(case_id, output)

    def __str__(self) -> str:
        return self.text

    def __repr__(self) -> str:
        c = self.counts
        return (f"<posconform report on {self.kernel.get('name', '?')!r}: {self.verdict}; "
                f"{len(self.cases)} cases: {c['passed']} within budget, {c['failed']} over "
                f"budget, {c['skipped']} skipped, {c['errors']} could not run>")


def check(kernel: Any, suite: str | None = "core", *,
          cases: Sequence[str | os.PathLike] | None = None,
          only: Iterable[str] | None = None,
          fuzz: int | None = None, fuzz_time: float | None = None, seed: int = 0x5EED,
          factor: float = 2.0, budget_dtype: str | None = None,
          save_failures: str | os.PathLike | None = "posconform-failures",
          max_consecutive_errors: int = 3, shrink_budget: int = 300) -> Report:
    """Checks ``kernel`` in this process, as ``posconform check`` checks a kernel
    process: the suite, then ``fuzz`` random declared cases, each failure shrunk to a
    minimal case, every output judged against its error budget.

    - ``suite``: ``"core"`` (default), ``"long"``, or None for no suite.
    - ``cases``: vector files (e.g. saved minimal cases) to run instead of the suite.
    - ``only``: run just these case ids of the suite.
    - ``fuzz``: random cases after the suite (default 200, or 0 with ``cases``);
      ``fuzz_time`` stops fuzzing after that many seconds; ``seed`` fixes the cases.
    - ``factor``: budget factor against the same-precision baseline (>= 1);
      ``budget_dtype``: derive budgets for this dtype instead of the declared one.
    - ``save_failures``: directory for the minimal failing cases (None: not saved).

    Returns a :class:`Report`. A kernel's exception costs its case only (the report
    shows it with the traceback); ``KeyboardInterrupt`` stops the run and is raised.
    """
    kernel = as_kernel(kernel)
    case_files = [os.fspath(p) for p in (cases or [])]
    if isinstance(only, str):
        only = [only]
    if only is not None and (suite is None or case_files):
        raise ValueError("only selects cases of the suite: give a suite and no cases")
    if fuzz is None:
        fuzz = 0 if case_files else 200
    if fuzz < 0:
        raise ValueError(f"fuzz must be >= 0, given {fuzz}")
    outcome = _native.check(
        kernel, suite=suite, only=list(only) if only is not None else None,
        case_files=case_files, fuzz=fuzz, fuzz_time=fuzz_time, seed=seed, factor=factor,
        budget_dtype=budget_dtype,
        save_failures=os.fspath(save_failures) if save_failures is not None else None,
        max_consecutive_errors=max_consecutive_errors, shrink_budget=shrink_budget)
    return Report(outcome)


def suite_cases(name: str = "core") -> list[dict]:
    """The cases of a built-in suite: dicts with ``id``, ``scheme``, ``operation``,
    ``dtype``, ``faults``, ``purpose`` and the whole ``case`` object."""
    return _native.suite_cases(name)
