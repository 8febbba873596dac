"""Benchmark: the whole θ analysis (BCa) against scipy.stats.bootstrap(method="BCa") on the same
data, then the peak memory of a process running B = 1,000,000 replicates with n = 200.

Run: .venv/bin/python benchmarks/engine.py   (a script, not a test; times are best of REPEATS,
ours and scipy's runs alternating)
"""

from __future__ import annotations

import resource
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
from numpy.typing import NDArray
from scipy import stats

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from service.stats.ratio import analyse_ratio, theta_of_means  # noqa: E402

REPEATS = 9
TARGET_RATIO = 0.20
TARGET_RSS_MB = 300.0
CASES = [(24, 10_000), (24, 100_000), (200, 10_000), (200, 100_000)]

MEMORY_PROBE = f"""
import sys
sys.path.insert(0, {str(ROOT)!r})
import numpy as np
from service.stats.ratio import analyse_ratio
values = np.random.default_rng(7).normal([42.0, 40.0, 15.0], 4.0, size=(200, 3))
a = analyse_ratio(values, replicates=1_000_000, seed=11, confidence_level=0.9, interval="bca",
                  limits=(-0.2, 0.2))
print(a.bootstrap.intervals.bca)
"""


def _best_pair(first: Callable[[], object], second: Callable[[], object]) -> tuple[float, float]:
    """Best of REPEATS for each, the two runs alternating, so that a slow spell of the shared
    machine falls on both rather than on one of them."""
    best = [float("inf"), float("inf")]
    for _ in range(REPEATS):
        for slot, run in enumerate((first, second)):
            start = time.perf_counter()
            run()
            best[slot] = min(best[slot], time.perf_counter() - start)
    return best[0], best[1]


def _scipy_statistic(t: NDArray[np.float64], r: NDArray[np.float64], b: NDArray[np.float64],
                     axis: int = -1) -> NDArray[np.float64]:
    return theta_of_means(np.stack([t.mean(axis), r.mean(axis), b.mean(axis)], axis=-1))


def main() -> int:
    failures = 0
    # Measure memory first: a child's peak RSS includes the parent's pages at fork time, and
    # scipy's runs below leave this process large.
    subprocess.run([sys.executable, "-c", MEMORY_PROBE], check=True, capture_output=True)
    peak_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0  # KiB on Linux
    verdict = "PASS" if peak_mb < TARGET_RSS_MB else "FAIL"
    failures += verdict == "FAIL"
    print(f"peak RSS, B = 1,000,000, n = 200: {peak_mb:.1f} MB (target < {TARGET_RSS_MB:g})  "
          f"{verdict}")
    print(f"{'n':>5} {'B':>8} {'ours s':>9} {'scipy s':>9} {'ratio':>7}  target ≤ {TARGET_RATIO}")
    for n, replicates in CASES:
        values = np.random.default_rng(n).normal([42.0, 40.0, 15.0], 4.0, size=(n, 3))
        columns = (values[:, 0], values[:, 1], values[:, 2])

        def ours(v: NDArray[np.float64] = values, b: int = replicates) -> object:
            return analyse_ratio(v, replicates=b, seed=3, confidence_level=0.9, interval="bca",
                                 limits=(-0.2, 0.2))

        def reference(c: tuple[NDArray[np.float64], ...] = columns, b: int = replicates) -> object:
            return stats.bootstrap(c, _scipy_statistic, paired=True, vectorized=True,
                                   method="BCa", n_resamples=b, confidence_level=0.9,
                                   rng=np.random.default_rng(3))

        mine, theirs = _best_pair(ours, reference)
        ratio = mine / theirs
        verdict = "PASS" if ratio <= TARGET_RATIO else "FAIL"
        failures += verdict == "FAIL"
        print(f"{n:>5} {replicates:>8} {mine:>9.4f} {theirs:>9.4f} {ratio:>7.3f}  {verdict}")
    return 1 if failures else 0


if __name__ == "__main__":
    raise SystemExit(main())
