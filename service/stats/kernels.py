"""Compiled inner loops of the bootstrap (numba): per-replicate sums and omission tallies.

Both loops run replicate by replicate and add in draw order, so a result never depends on where a
chunk ends. They release the GIL, so analyses in the service's thread pool run side by side.
"""

from __future__ import annotations

from typing import Any

import numba
import numpy as np
from numpy.typing import NDArray


@numba.njit(cache=True, nogil=True)
def _row_means(index: Any, columns: Any, out: Any) -> None:  # pragma: no cover - compiled
    # Scalar running sums per column (kept in registers), two per column (even and odd draws) to
    # halve the add-latency chain. The order of additions is fixed per replicate, so results do
    # not depend on the chunking. Columns beyond the third are summed the same way, one at a time.
    c, n = index.shape
    k = columns.shape[0]
    half = n // 2
    tail = n % 2
    x0 = columns[0]
    x1 = columns[1 % k]
    x2 = columns[2 % k]
    for b in range(c):
        row = index[b]
        a0 = a1 = a2 = 0.0
        b0 = b1 = b2 = 0.0
        for t in range(half):
            i = row[2 * t]
            j = row[2 * t + 1]
            a0 += x0[i]
            b0 += x0[j]
            a1 += x1[i]
            b1 += x1[j]
            a2 += x2[i]
            b2 += x2[j]
        if tail:
            i = row[n - 1]
            a0 += x0[i]
            a1 += x1[i]
            a2 += x2[i]
        out[b, 0] = (a0 + b0) / n
        if k > 1:
            out[b, 1] = (a1 + b1) / n
        if k > 2:
            out[b, 2] = (a2 + b2) / n
        for col in range(3, k):
            xc = columns[col]
            a = 0.0
            z = 0.0
            for t in range(half):
                a += xc[row[2 * t]]
                z += xc[row[2 * t + 1]]
            if tail:
                a += xc[row[n - 1]]
            out[b, col] = (a + z) / n


@numba.njit(cache=True, nogil=True)
def _omission_sums(
    index: Any, finite: Any, centred: Any, omitted: Any, seen: Any
) -> None:  # pragma: no cover - compiled
    c, n = index.shape
    size = omitted.shape[1]
    for b in range(c):
        if not finite[b]:
            continue
        for i in range(size):
            seen[i] = False
        for t in range(n):
            seen[index[b, t]] = True
        d = centred[b]
        dd = d * d
        for i in range(size):
            if not seen[i]:
                omitted[0, i] += 1.0
                omitted[1, i] += d
                omitted[2, i] += dd


def resampled_means(
    index: NDArray[np.uint32], data: NDArray[np.float64]
) -> NDArray[np.float64]:
    """Column means of data[index[b]] for each replicate b (Efron & Tibshirani 1993 ch. 6)."""
    out = np.empty((index.shape[0], data.shape[1]), dtype=np.float64)
    _row_means(index, np.ascontiguousarray(data.T), out)
    return out


def add_omission_sums(
    index: NDArray[np.uint32],
    finite: NDArray[np.bool_],
    centred: NDArray[np.float64],
    omitted: NDArray[np.float64],
) -> None:
    """For every subject i, add over the finite replicates that do not contain i the terms
    [1, θ*−θ̂, (θ*−θ̂)²] (the sums behind jackknife-after-bootstrap, Efron 1992 §3)."""
    seen = np.empty(omitted.shape[1], dtype=np.bool_)
    _omission_sums(index, finite, centred, omitted, seen)


