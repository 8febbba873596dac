"""Benchmark: the absorbed (within-subject) crossover fit of average_bioequivalence against the
former full-dummy pseudo-inverse fit, on 2×2 tables of growing size; time and peak traced memory.

Run: .venv/bin/python benchmarks/average_bioequivalence.py   (a script, not a test; times are the
best of REPEATS; the full-dummy fit runs only up to FULL_DUMMY_MAX_SUBJECTS, it is cubic)
"""

from __future__ import annotations

import sys
import time
import tracemalloc
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from service.stats.equivalence import average_bioequivalence  # noqa: E402

REPEATS = 3
SIZES = (250, 500, 1000, 2000, 20_000, 200_000)
FULL_DUMMY_MAX_SUBJECTS = 1000


def two_by_two(n_subjects: int, seed: int = 1) -> dict[str, Any]:
    """A seeded 2×2 table (constructed from a lognormal model, no published data)."""
    rng = np.random.default_rng(seed)
    subjects, sequences, periods, treatments = [], [], [], []
    for i in range(n_subjects):
        order = "TR" if i % 2 == 0 else "RT"
        for period, treatment in enumerate(order, start=1):
            subjects.append(f"S{i:06d}")
            sequences.append(order)
            periods.append(period)
            treatments.append(treatment)
    values = np.exp(4.0 + np.repeat(rng.normal(0, 0.3, n_subjects), 2)
                    + rng.normal(0, 0.2, 2 * n_subjects))
    return {"subjects": subjects, "sequences": sequences, "periods": periods,
            "treatments": treatments, "values": values}


def full_dummy_fit(table: dict[str, Any]) -> float:
    """The former fit: pseudo-inverse of the full dummy design (intercept, sequence, subject,
    period, treatment), rank from the design; returns the T − R estimate."""
    log_y: NDArray[np.float64] = np.log(table["values"])
    n = log_y.size
    blocks = [np.ones((n, 1))]
    for name in ("sequences", "subjects", "periods", "treatments"):
        levels = sorted(set(table[name]))
        index = {v: i for i, v in enumerate(levels)}
        blocks.append(np.eye(len(levels))[[index[v] for v in table[name]]])
    design = np.hstack(blocks)
    pinv = np.linalg.pinv(design, rcond=1e-10)
    beta = pinv @ log_y
    np.linalg.matrix_rank(design, tol=1e-10 * max(design.shape) * np.linalg.norm(design, 2))
    return float(beta[-1] - beta[-2])  # treatment levels sorted R, T: T − R


def absorbed_fit(table: dict[str, Any]) -> float:
    return average_bioequivalence(**table, test="T", reference="R").log_difference


def measure(run: Callable[[], object]) -> tuple[float, float]:
    """(best seconds of REPEATS, peak traced MB of one run)."""
    best = float("inf")
    for _ in range(REPEATS):
        start = time.perf_counter()
        run()
        best = min(best, time.perf_counter() - start)
    tracemalloc.start()
    run()
    peak = tracemalloc.get_traced_memory()[1] / 2**20
    tracemalloc.stop()
    return best, peak


def main() -> int:
    print(f"{'subjects':>9} {'rows':>7} {'absorbed s':>11} {'MB':>7} {'µs/row':>7} "
          f"{'full-dummy s':>13} {'MB':>7} {'time ratio':>10}")
    for n in SIZES:
        table = two_by_two(n)
        new_s, new_mb = measure(lambda table=table: absorbed_fit(table))
        line = f"{n:>9} {2 * n:>7} {new_s:>11.4f} {new_mb:>7.1f} {1e6 * new_s / (2 * n):>7.2f}"
        if n <= FULL_DUMMY_MAX_SUBJECTS:
            old_s, old_mb = measure(lambda table=table: full_dummy_fit(table))
            if abs(full_dummy_fit(table) - absorbed_fit(table)) > 1e-10:
                raise SystemExit(f"the two fits disagree at {n} subjects")
            line += f" {old_s:>13.4f} {old_mb:>7.1f} {old_s / new_s:>10.1f}"
        print(line, flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
