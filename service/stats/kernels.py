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
def _means_and_presence(index: Any, columns: Any, out: Any, present: Any) -> None:  # pragma: no cover
    # Column means in draw order (two running sums per column: even and odd draws) and a bitset
    # of the subjects present in each replicate (64 per word), in one pass over the draws.
    c, n = index.shape
    k = columns.shape[0]
    words = present.shape[1]
    half = n // 2
    x0 = columns[0]
    x1 = columns[1 % k]
    x2 = columns[2 % k]
    one = np.uint64(1)
    for b in range(c):
        row = index[b]
        for w in range(words):
            present[b, w] = 0
        a0 = a1 = a2 = 0.0
        b0 = b1 = b2 = 0.0
        if words == 1:
            bits = np.uint64(0)
            for t in range(half):
                i = row[2 * t]
                j = row[2 * t + 1]
                a0 += x0[i]
                b0 += x0[j]
                a1 += x1[i]
                b1 += x1[j]
                a2 += x2[i]
                b2 += x2[j]
                bits |= (one << np.uint64(i)) | (one << np.uint64(j))
            if n % 2:
                i = row[n - 1]
                a0 += x0[i]
                a1 += x1[i]
                a2 += x2[i]
                bits |= one << np.uint64(i)
            present[b, 0] = bits
        else:
            for t in range(half):
                i = row[2 * t]
                j = row[2 * t + 1]
                a0 += x0[i]
                b0 += x0[j]
                a1 += x1[i]
                b1 += x1[j]
                a2 += x2[i]
                b2 += x2[j]
                present[b, i >> 6] |= one << np.uint64(i & 63)
                present[b, j >> 6] |= one << np.uint64(j & 63)
            if n % 2:
                i = row[n - 1]
                a0 += x0[i]
                a1 += x1[i]
                a2 += x2[i]
                present[b, i >> 6] |= one << np.uint64(i & 63)
        out[b, 0] = (a0 + b0) / n
        if k > 1:
            out[b, 1] = (a1 + b1) / n
        if k > 2:
            out[b, 2] = (a2 + b2) / n
        for col in range(3, k):  # further columns, one at a time, in the same order
            xc = columns[col]
            s0 = 0.0
            s1 = 0.0
            for t in range(half):
                s0 += xc[row[2 * t]]
                s1 += xc[row[2 * t + 1]]
            if n % 2:
                s0 += xc[row[n - 1]]
            out[b, col] = (s0 + s1) / n


@numba.njit(cache=True, nogil=True)
def _omission_sums(present: Any, n: int, finite: Any, centred: Any, omitted: Any) -> None:  # pragma: no cover
    c, words = present.shape
    one = np.uint64(1)
    for b in range(c):
        if not finite[b]:
            continue
        d = centred[b]
        dd = d * d
        for w in range(words):
            bits = present[b, w]
            base = w * 64
            top = min(64, n - base)
            for j in range(top):
                if not (bits >> np.uint64(j)) & one:
                    omitted[0, base + j] += 1.0
                    omitted[1, base + j] += d
                    omitted[2, base + j] += dd


def means_and_presence(
    index: NDArray[np.uint32], data: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.uint64]]:
    """Column means of data[index[b]] for each replicate b (Efron & Tibshirani 1993 ch. 6), and
    which subjects each replicate contains (bit i % 64 of word i // 64)."""
    c, n = index.shape
    out = np.empty((c, data.shape[1]), dtype=np.float64)
    present = np.empty((c, (n + 63) // 64), dtype=np.uint64)
    _means_and_presence(index, np.ascontiguousarray(data.T), out, present)
    return out, present


@numba.njit(cache=True, nogil=True)
def _omission_sums_bytes(
    present: Any, finite: Any, centred: Any, omitted: Any
) -> None:  # pragma: no cover - compiled
    c, n = present.shape
    for b in range(c):
        if not finite[b]:
            continue
        d = centred[b]
        dd = d * d
        row = present[b]
        for i in range(n):
            if row[i] == 0:
                omitted[0, i] += 1.0
                omitted[1, i] += d
                omitted[2, i] += dd


def add_omission_sums(
    present: NDArray[Any],
    n: int,
    finite: NDArray[np.bool_],
    centred: NDArray[np.float64],
    omitted: NDArray[np.float64],
) -> None:
    """For every subject i, add over the finite replicates that do not contain i the terms
    [1, θ*−θ̂, (θ*−θ̂)²] (the sums behind jackknife-after-bootstrap, Efron 1992 §3).
    ``present`` holds 64-bit bitsets (uint64, one bit per subject) or one byte per subject."""
    if present.dtype == np.uint8:
        _omission_sums_bytes(present, finite, centred, omitted)
    else:
        _omission_sums(present, n, finite, centred, omitted)


@numba.njit(inline="always")
def _next_lane(
    s0: Any, s1: Any, s2: Any, s3: Any, spare: Any, have: bool
) -> tuple[Any, Any, Any, Any, Any, bool, Any]:  # pragma: no cover - compiled
    # xoshiro256** (Blackman & Vigna 2021, ACM TOMS 47:36, "Scrambled linear pseudorandom number
    # generators"); each 64-bit output is used as two 32-bit lanes, low lane first.
    if have:
        return s0, s1, s2, s3, spare, False, spare
    x = s1 * np.uint64(5)
    result = ((x << np.uint64(7)) | (x >> np.uint64(57))) * np.uint64(9)
    t = s1 << np.uint64(17)
    s2 ^= s0
    s3 ^= s1
    s1 ^= s2
    s0 ^= s3
    s2 ^= t
    s3 = (s3 << np.uint64(45)) | (s3 >> np.uint64(19))
    return s0, s1, s2, s3, result >> np.uint64(32), True, result & np.uint64(0xFFFFFFFF)


@numba.njit(inline="always")
def _draw_one(
    s0: Any, s1: Any, s2: Any, s3: Any, spare: Any, have: bool, size: Any, threshold: Any
) -> tuple[Any, Any, Any, Any, Any, bool, Any]:  # pragma: no cover - compiled
    # Lemire 2019 (ACM TOMACS 29:3): with a lane x uniform on [0, 2³²), m = x·size, the high word
    # m >> 32 is exactly uniform on [0, size) once lanes whose low word is below 2³² mod size are
    # rejected (probability < size/2³²).
    while True:
        s0, s1, s2, s3, spare, have, lane = _next_lane(s0, s1, s2, s3, spare, have)
        m = lane * size
        if (m & np.uint64(0xFFFFFFFF)) >= threshold:
            return s0, s1, s2, s3, spare, have, np.int64(m >> np.uint64(32))


@numba.njit(cache=True, nogil=True)
def _draw_subjects(
    state: Any, size: int, threshold: int, columns: Any, out: Any, present: Any, index: Any
) -> None:  # pragma: no cover - compiled
    # Means are summed in draw order with two running sums per column (even and odd draws), which
    # halves the add-latency chain. Presence: a register bitset when size ≤ 64 (present is c × 1
    # uint64), else plain stores of 1 into a zeroed c × size byte array (no read-modify-write
    # chains).
    # `index` (c × size, or 0 × 0) receives the draws when a caller wants to see them.
    c = out.shape[0]
    k = columns.shape[0]
    bitset = size <= 64
    keep = index.shape[0] > 0
    s0, s1, s2, s3, spare = state[0], state[1], state[2], state[3], state[4]
    have = state[5] != 0
    usize = np.uint64(size)
    uthreshold = np.uint64(threshold)
    one = np.uint64(1)
    x0 = columns[0]
    x1 = columns[1 % k]
    x2 = columns[2 % k]
    half = size // 2
    for b in range(c):
        a0 = a1 = a2 = 0.0
        e0 = e1 = e2 = 0.0
        bits = np.uint64(0)
        for t in range(half):
            s0, s1, s2, s3, spare, have, i = _draw_one(
                s0, s1, s2, s3, spare, have, usize, uthreshold)
            s0, s1, s2, s3, spare, have, j = _draw_one(
                s0, s1, s2, s3, spare, have, usize, uthreshold)
            a0 += x0[i]
            e0 += x0[j]
            a1 += x1[i]
            e1 += x1[j]
            a2 += x2[i]
            e2 += x2[j]
            if bitset:
                bits |= (one << np.uint64(i)) | (one << np.uint64(j))
            else:
                present[b, i] = 1
                present[b, j] = 1
            if keep:
                index[b, 2 * t] = i
                index[b, 2 * t + 1] = j
        if size % 2:
            s0, s1, s2, s3, spare, have, i = _draw_one(
                s0, s1, s2, s3, spare, have, usize, uthreshold)
            a0 += x0[i]
            a1 += x1[i]
            a2 += x2[i]
            if bitset:
                bits |= one << np.uint64(i)
            else:
                present[b, i] = 1
            if keep:
                index[b, size - 1] = i
        out[b, 0] = (a0 + e0) / size
        if k > 1:
            out[b, 1] = (a1 + e1) / size
        if k > 2:
            out[b, 2] = (a2 + e2) / size
        if bitset:
            present[b, 0] = bits
    state[0], state[1], state[2], state[3], state[4] = s0, s1, s2, s3, spare
    state[5] = one if have else np.uint64(0)


class SubjectDraws:
    """Whole-subject bootstrap samples of an (n × k ≤ 3) table, drawn in order from one
    xoshiro256** stream seeded by a SeedSequence: replicate b always gets the same draws however
    the replicates are split into chunks."""

    def __init__(self, seed: np.random.SeedSequence, data: NDArray[np.float64]) -> None:
        if data.shape[1] > 3:
            raise ValueError("SubjectDraws averages at most 3 columns")
        self._state = np.zeros(6, dtype=np.uint64)
        self._state[:4] = seed.generate_state(4, dtype=np.uint64)
        if not self._state[:4].any():  # the one state xoshiro cannot leave
            self._state[0] = 1
        self._columns = np.ascontiguousarray(data.T)
        self._size = data.shape[0]
        self._threshold = (1 << 32) % self._size

    def draw(
        self, replicates: int, keep_index: bool = False
    ) -> tuple[NDArray[np.float64], NDArray[Any], NDArray[np.int64]]:
        """(means (replicates × k), presence (bitsets for n ≤ 64, else bytes), the draws or an
        empty array)."""
        n = self._size
        means = np.empty((replicates, self._columns.shape[0]), dtype=np.float64)
        present: NDArray[Any] = (
            np.empty((replicates, 1), dtype=np.uint64)
            if n <= 64
            else np.zeros((replicates, n), dtype=np.uint8)
        )
        index = np.empty((replicates, n) if keep_index else (0, 0), dtype=np.int64)
        _draw_subjects(self._state, n, self._threshold, self._columns, means, present, index)
        return means, present, index
