"""The posconform pytest plugin (registered under the ``pytest11`` entry point).

Mark a test with the kernel to check and take the ``posconform_case`` fixture::

    import pytest
    from my_kernels import rope_kernel        # a posconform.Kernel

    @pytest.mark.posconform(rope_kernel, suite="core", fuzz=200, seed=7)
    def test_rope(posconform_case):
        posconform_case.check()

The test is parametrised into one test per suite case, with the case id as its id
(``test_rope[rotary.encode.adjacent]``), plus ``test_rope[fuzz]`` for the random cases
when ``fuzz`` > 0. A case over budget, or one the kernel could not answer, fails with
posconform's text report for that case (the diagnosis, and the replay file it was saved
to); a case the kernel does not declare is skipped with the reason. pytest's own
``--junitxml`` then carries each case, with the verdict as a property.

Marker arguments: the kernel (first), then ``suite`` ("core"), ``only`` (case ids),
``fuzz`` (200; 0 for no fuzz test), ``fuzz_time``, ``seed``, ``factor``,
``budget_dtype``, as for :func:`posconform.check`. Command-line options:
``--posconform-failures DIR`` (where replay files go; default
``posconform-failures`` under the rootdir), ``--posconform-fuzz N`` and
``--posconform-seed S`` (override every marker's).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from typing import Any

import pytest

MARKER = "posconform"
FIXTURE = "posconform_case"
FUZZ_ID = "fuzz"
_OPTIONS = ("suite", "only", "fuzz", "fuzz_time", "seed", "factor", "budget_dtype")


def pytest_addoption(parser):
    group = parser.getgroup("posconform", "posconform conformance tests")
    group.addoption("--posconform-failures", metavar="DIR", default=None,
                    help="directory for the replay files of failing cases (default: "
                         "posconform-failures under the rootdir)")
    group.addoption("--posconform-fuzz", metavar="N", type=int, default=None,
                    help="random cases in each posconform fuzz test (overrides the marker)")
    group.addoption("--posconform-seed", metavar="S", type=int, default=None,
                    help="fuzzing seed of every posconform fuzz test (overrides the marker)")


def pytest_configure(config):
    config.addinivalue_line(
        "markers",
        f"{MARKER}(kernel, suite='core', fuzz=200, seed=..., only=None, factor=2.0): "
        f"check a posconform.Kernel, one test per suite case plus one for fuzzing; the "
        f"test takes the {FIXTURE} fixture and calls {FIXTURE}.check()")


@dataclass(frozen=True)
class _Planned:
    """One generated test: which kernel, which case (or the fuzz run), which options."""

    kernel: Any
    case_id: str | None  # None: the fuzz run
    options: dict = field(default_factory=dict)


def _refuse(message: str):
    """A collection error that shows just ``message`` (no traceback)."""
    pytest.fail(message, pytrace=False)


def _marker_options(marker) -> tuple[Any, dict]:
    if not marker.args:
        _refuse(f"@pytest.mark.{MARKER} needs the kernel as its first argument")
    unknown = sorted(set(marker.kwargs) - set(_OPTIONS))
    if unknown:
        _refuse(
            f"@pytest.mark.{MARKER}: unknown option(s) {', '.join(unknown)} "
            f"(known: {', '.join(_OPTIONS)})")
    options = {"suite": "core", "fuzz": 200}
    options.update(marker.kwargs)
    return marker.args[0], options


def pytest_generate_tests(metafunc):
    if FIXTURE not in metafunc.fixturenames:
        return
    marker = metafunc.definition.get_closest_marker(MARKER)
    if marker is None:
        _refuse(
            f"{metafunc.definition.nodeid} uses the {FIXTURE} fixture but has no "
            f"@pytest.mark.{MARKER}(kernel, ...) marker")
    from . import suite_cases
    kernel, options = _marker_options(marker)
    config = metafunc.config
    if config.getoption("posconform_fuzz") is not None:
        options["fuzz"] = config.getoption("posconform_fuzz")
    if config.getoption("posconform_seed") is not None:
        options["seed"] = config.getoption("posconform_seed")
    ids = []
    if options.get("suite") is not None:
        try:
            ids = [c["id"] for c in suite_cases(options["suite"])]
        except ValueError as e:
            _refuse(f"@pytest.mark.{MARKER}: {e}")
        only = options.get("only")
        if only is not None:
            only = [only] if isinstance(only, str) else list(only)
            missing = sorted(set(only) - set(ids))
            if missing:
                _refuse(
                    f"@pytest.mark.{MARKER}: suite {options['suite']} has no case "
                    f"{', '.join(missing)}")
            ids = [i for i in ids if i in only]
    planned = [_Planned(kernel, i, options) for i in ids]
    if options.get("fuzz"):
        planned.append(_Planned(kernel, None, options))
        ids.append(FUZZ_ID)
    metafunc.parametrize(FIXTURE, planned, ids=ids, indirect=True)


class PosconformCase:
    """The ``posconform_case`` fixture's value: one suite case, or the fuzz run."""

    def __init__(self, planned: _Planned, node, failures: str):
        self.kernel = planned.kernel
        self.case_id = planned.case_id
        self.options = dict(planned.options)
        self._node = node
        self._failures = failures
        self.report = None
        """The :class:`posconform.Report` once :meth:`check` has run."""

    @property
    def is_fuzz(self) -> bool:
        return self.case_id is None

    def run(self):
        """Runs the case (or the fuzz run) and returns the report, without judging it."""
        from . import check
        options = {k: v for k, v in self.options.items()
                   if k in ("fuzz_time", "seed", "factor", "budget_dtype")}
        if self.is_fuzz:
            self.report = check(self.kernel, suite=None, fuzz=self.options["fuzz"],
                                save_failures=self._failures, **options)
        else:
            options.pop("fuzz_time", None)
            self.report = check(self.kernel, suite=self.options["suite"],
                                only=[self.case_id], fuzz=0, save_failures=None, **options)
        return self.report

    def check(self):
        """Runs the case and fails the test with posconform's report unless it conforms;
        skips it when the kernel does not declare (or declines) the case."""
        report = self.run()
        properties = self._node.user_properties
        if self.is_fuzz:
            properties.append(("posconform_verdict", report.verdict))
            properties.append(
                ("posconform_random_cases", str((report.fuzz or {}).get("cases", 0))))
            if report.exit_code != 0:
                pytest.fail(report.text, pytrace=False)
            return report
        result = report.case(self.case_id)
        properties.append(("posconform_case", result.id))
        properties.append(("posconform_verdict", result.verdict))
        if result.verdict == "skipped":
            pytest.skip(f"posconform: {result.reason}")
        if result.verdict in ("fail", "error"):
            text = report.case_text(self.case_id)
            try:
                saved = report.save_case(self.case_id, self._failures)
                text += (f"\nreplay: posconform.check(kernel, cases=[{saved!r}])\n"
                         f"    or: posconform check --kernel ... --case {saved}\n")
            except Exception as e:  # the report matters more than the replay file
                text += f"\n(the replay file could not be written: {e})\n"
            pytest.fail(text, pytrace=False)
        return report


@pytest.fixture
def posconform_case(request) -> PosconformCase:
    """One posconform case of the kernel named by the test's ``posconform`` marker."""
    planned = getattr(request, "param", None)
    if not isinstance(planned, _Planned):
        _refuse(
            f"{FIXTURE} is parametrised by @pytest.mark.{MARKER}(kernel, ...) on the test")
    failures = request.config.getoption("posconform_failures") or os.path.join(
        str(request.config.rootpath), "posconform-failures")
    return PosconformCase(planned, request.node, failures)
