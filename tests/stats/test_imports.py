"""numpy.f2py is deferred, not removed: the engine's import leaves it unloaded, and using it
loads it in full (the behaviour of importlib.util.LazyLoader, as the Python documentation of
importlib.util describes it). Each check runs in a fresh interpreter, as start-up is about the
first import."""

from __future__ import annotations

import json
import subprocess
import sys


def _run(code: str) -> dict[str, object]:
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          check=True, timeout=120)
    result: dict[str, object] = json.loads(done.stdout.strip().splitlines()[-1])
    return result


def test_importing_the_engine_and_scipy_special_leaves_f2py_unloaded() -> None:
    found = _run(
        "import json, sys\n"
        "import service.stats.distributions, service.stats.ratio\n"
        "import scipy.special\n"
        "print(json.dumps({'parser': 'numpy.f2py.crackfortran' in sys.modules,"
        " 'registered': 'numpy.f2py' in sys.modules}))\n"
    )
    assert found == {"parser": False, "registered": True}


def test_f2py_loads_in_full_when_used() -> None:
    found = _run(
        "import json, sys\n"
        "import service.stats\n"
        "import numpy\n"
        "from numpy import f2py\n"
        "runnable = callable(f2py.run_main)\n"  # the first attribute read loads the module
        "print(json.dumps({'runnable': runnable,"
        " 'parser': 'numpy.f2py.crackfortran' in sys.modules,"
        " 'same': numpy.f2py is sys.modules['numpy.f2py']}))\n"
    )
    assert found == {"runnable": True, "parser": True, "same": True}


def test_nothing_changes_when_f2py_was_imported_first() -> None:
    found = _run(
        "import json, sys\n"
        "import numpy.f2py\n"
        "before = sys.modules['numpy.f2py']\n"
        "from service.stats.imports import defer_numpy_f2py\n"
        "defer_numpy_f2py()\n"
        "print(json.dumps({'same': sys.modules['numpy.f2py'] is before,"
        " 'attribute': numpy.f2py is before}))\n"
    )
    assert found == {"same": True, "attribute": True}
