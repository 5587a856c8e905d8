"""The protocol helper, for the examples in this directory and kernels written against it.

The helper itself is ``posconform.protocol`` in the posconform Python package
(python/posconform/protocol.py; docs/python.md). This module makes ``from
posconform_kernel import serve`` keep working without installing anything: it loads
that file from this checkout of the repository (it needs only numpy), or, when this file
was copied elsewhere, imports ``posconform.protocol`` from an installed package.
"""

import importlib.util
import os

_SOURCE = os.path.join(os.path.dirname(os.path.abspath(__file__)), os.pardir, os.pardir,
                       "python", "posconform", "protocol.py")

if os.path.isfile(_SOURCE):
    _spec = importlib.util.spec_from_file_location("posconform_protocol_from_checkout",
                                                   _SOURCE)
    _module = importlib.util.module_from_spec(_spec)
    _spec.loader.exec_module(_module)
else:
    try:
        import posconform.protocol as _module
    except ImportError as _error:
        raise ImportError(
            "posconform_kernel: python/posconform/protocol.py is not beside this file's "
            "repository and the posconform package is not installed; install it "
            "(pip install PATH_TO_REPOSITORY) or copy python/posconform/protocol.py") \
            from _error

__all__ = list(_module.__all__)
globals().update({name: value for name, value in vars(_module).items()
                  if not name.startswith("__")})
