"""The service's warm-up (run before it reports ready) leaves no compiled loop for the first
request to load: every compiled function the bootstrap calls from Python, those that let threads
share one included, has its machine code in the process afterwards."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]

PROBE = """
import json, sys
from service.records.warmup import warm_up
warm_up()
loaded = "service.stats.streams" in sys.modules
from service.stats import compiled, streams
# The entry points kernels.py and waves.py call from Python; the functions these call are
# compiled into them.
entries = {"compiled": ("draw_subjects", "omission_sums_bits", "omission_sums_bytes"),
           "streams": ("starts_at", "_fill_table")}
waiting = [f"{module}.{name}" for module, names in entries.items() for name in names
           if not getattr({"compiled": compiled, "streams": streams}[module], name).signatures]
print(json.dumps({"waiting": waiting, "streams": loaded}))
"""


def test_warm_up_loads_every_compiled_loop() -> None:
    """Common practice (numba compiles a function at its first call, or reads it from its
    cache): a dispatcher with no signature after the warm-up would be loaded by a request."""
    done = subprocess.run([sys.executable, "-c", PROBE], cwd=ROOT, capture_output=True,
                          text=True, timeout=300, check=True)
    found = json.loads(done.stdout.strip().splitlines()[-1])
    assert found["streams"]
    assert found["waiting"] == []
