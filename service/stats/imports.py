"""Start-up: numpy's Fortran-wrapper generator (numpy.f2py) is loaded only if something uses it.

scipy.special, on import, copies numpy's public namespace (`from numpy import *`, in scipy's
bundled array-API layer), and numpy's ``__all__`` names the subpackage f2py, which numpy then
imports: 83 ms of start-up where it was measured (its modules compile about ninety regular
expressions at import), for a tool that this service never calls. Registering numpy.f2py with
the standard library's importlib.util.LazyLoader first gives that copy the module object without
running it; the first attribute looked up on it, by anyone, loads it in full as a plain import
would (tests/stats/test_imports.py checks both).
"""

from __future__ import annotations

import importlib.util
import sys

_NAME = "numpy.f2py"


def defer_numpy_f2py() -> None:
    """Register numpy.f2py as a lazily loaded module, unless it is imported already (or numpy
    has none). Safe to call more than once."""
    if _NAME in sys.modules:
        return
    import numpy

    spec = importlib.util.find_spec(_NAME)
    if spec is None or spec.loader is None or not hasattr(spec.loader, "exec_module"):
        return
    spec.loader = importlib.util.LazyLoader(spec.loader)
    module = importlib.util.module_from_spec(spec)
    sys.modules[_NAME] = module
    spec.loader.exec_module(module)  # LazyLoader: runs nothing until an attribute is read
    # As the import system does for a submodule it loads, the parent names it: otherwise
    # `import numpy.f2py as f2py` asks numpy's own __getattr__, which imports it again, forever.
    numpy.f2py = module
