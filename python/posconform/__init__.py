"""posconform from Python: check an attention kernel's positional encoding in-process.

    import posconform
    kernel = posconform.Kernel(my_fn, supports={"rotary": ["encode"]}, dtypes=["f32"])
    report = posconform.check(kernel, suite="core", fuzz=200, seed=7)
    print(report.text)

``check`` runs the library's own suite, fuzzing, shrinking and error budgets, calling
your function directly with numpy arrays (no subprocess, no JSON), and returns a
:class:`Report`. ``posconform.torch`` adapts functions of torch tensors (imported only
when you import it); the pytest plugin (``@pytest.mark.posconform``) turns a kernel
into one test per case; ``posconform.protocol`` serves a kernel over the stdio protocol
for the ``posconform`` command; ``bench`` times a kernel in process (docs/bench.md). See
docs/python.md in the repository.
"""

from . import _native
from ._bench import BenchResult, bench
from ._kernel import Kernel
from ._report import CaseResult, MinimalCase, Report, check, suite_cases
from .protocol import Unsupported, numpy_dtype, serve

__version__: str = _native.library_version()
"""The version of the posconform library this package was built from (the crate's)."""

SUITES: list = list(_native.suites())

__all__ = [
    "BenchResult",
    "CaseResult",
    "Kernel",
    "MinimalCase",
    "Report",
    "SUITES",
    "Unsupported",
    "bench",
    "check",
    "numpy_dtype",
    "serve",
    "suite_cases",
]
