"""Compiled inner loops of the bootstrap (numba): subject draws, resampled means, presence, and the
jackknife-after-bootstrap sums.

Draws come from one xoshiro256** stream per stratum and each replicate consumes its draws in order,
so a result never depends on where a chunk ends. The draw loop can start from any stream states
(streams.py finds the states where a given replicate starts), so that threads can draw blocks of
replicates side by side (waves.py). The loops release the GIL. plain.py makes the same numbers in
plain numpy for runs too small to be worth loading these (kernels.py chooses).
"""

from __future__ import annotations

from typing import Any

import numba
import numpy as np


@numba.njit(inline="always")
def _xoshiro(s0: Any, s1: Any, s2: Any, s3: Any) -> tuple[Any, Any, Any, Any, Any]:  # pragma: no cover
    # xoshiro256** (Blackman & Vigna 2021, ACM TOMS 47:36, "Scrambled linear pseudorandom number
    # generators"): the next 64-bit output and the state after it.
    x = s1 * np.uint64(5)
    result = ((x << np.uint64(7)) | (x >> np.uint64(57))) * np.uint64(9)
    t = s1 << np.uint64(17)
    s2 ^= s0
    s3 ^= s1
    s1 ^= s2
    s0 ^= s3
    s2 ^= t
    s3 = (s3 << np.uint64(45)) | (s3 >> np.uint64(19))
    return s0, s1, s2, s3, result


@numba.njit(inline="always")
def _next_lane(
    s0: Any, s1: Any, s2: Any, s3: Any, spare: Any, have: bool
) -> tuple[Any, Any, Any, Any, Any, bool, Any]:  # pragma: no cover - compiled
    # Each 64-bit output is used as two 32-bit lanes, low lane first.
    if have:
        return s0, s1, s2, s3, spare, False, spare
    s0, s1, s2, s3, result = _xoshiro(s0, s1, s2, s3)
    return s0, s1, s2, s3, result >> np.uint64(32), True, result & np.uint64(0xFFFFFFFF)


@numba.njit(inline="always")
def _draw_one(
    s0: Any, s1: Any, s2: Any, s3: Any, spare: Any, have: bool, size: Any, threshold: Any,
    missed: int,
) -> tuple[Any, Any, Any, Any, Any, bool, Any, int]:  # pragma: no cover - compiled
    # Lemire 2019 (ACM TOMACS 29:3): with a lane x uniform on [0, 2³²), m = x·size, the high word
    # m >> 32 is exactly uniform on [0, size) once lanes whose low word is below 2³² mod size are
    # rejected (probability < size/2³²). ``missed`` counts the rejected lanes.
    while True:
        s0, s1, s2, s3, spare, have, lane = _next_lane(s0, s1, s2, s3, spare, have)
        m = lane * size
        if (m & np.uint64(0xFFFFFFFF)) >= threshold:
            return s0, s1, s2, s3, spare, have, m >> np.uint64(32), missed
        missed += 1


@numba.njit(inline="always")
def _mark(present: Any, b: int, bits: Any, i: Any, bitset: bool) -> Any:  # pragma: no cover
    if bitset:
        return bits | (np.uint64(1) << np.uint64(i))
    present[b, i] = 1
    return bits


@numba.njit(cache=True, nogil=True)
def draw_subjects(
    states: Any, members: Any, bounds: Any, thresholds: Any, columns: Any,
    out: Any, present: Any, index: Any, misses: Any,
) -> None:  # pragma: no cover - compiled
    # _draw_subjects with its three switches as constants in the usual cases (one stratum, no
    # draws kept: every bootstrap without strata), so LLVM compiles those loops without them;
    # a tenth to a fifth less per draw, same bytes, in side-by-side runs at n = 24, 65 and 200.
    bitset = columns.shape[1] <= 64
    if states.shape[0] == 1 and index.shape[0] == 0:
        if bitset:
            _draw_subjects(states, members, bounds, thresholds, columns, out, present, index,
                           misses, True, False, True)
        else:
            _draw_subjects(states, members, bounds, thresholds, columns, out, present, index,
                           misses, False, False, True)
    else:
        _draw_subjects(states, members, bounds, thresholds, columns, out, present, index, misses,
                       bitset, index.shape[0] > 0, states.shape[0] == 1)


@numba.njit(inline="always")
def _draw_subjects(
    states: Any, members: Any, bounds: Any, thresholds: Any, columns: Any,
    out: Any, present: Any, index: Any, misses: Any, bitset: bool, keep: bool, whole: bool,
) -> None:  # pragma: no cover - compiled
    # Stratum by stratum (its stream state stays in registers across the chunk), replicate b
    # draws the stratum's members two at a time into index[b, bounds[s]:bounds[s+1]] (when index
    # is c × n; it is 0 × 0 when nobody needs the draws). The first three column sums are formed
    # in the same pass in draw order, with two running sums per column (first and second draw of
    # each pair) to halve the add-latency chain, and added to out[b] stratum by stratum; further
    # columns are summed from index afterwards. Presence: a bitset when there are ≤ 64 subjects
    # (present is c × 1 uint64), else stores of 1 into the c × n byte array, zeroed first.
    # misses[s] is set to the number of lanes of stream s that Lemire's method rejected.
    # Indices stay unsigned (uint64), so the loads carry no negative-index check; a pair with no
    # spare lane pending takes both lanes of one output at once unless one is rejected (then, as
    # after an odd stratum, the lanes go one at a time through _draw_one: the same lanes in the
    # same order either way). The pair is most of the loop's cost: these two cut it by about a
    # quarter per draw in side-by-side runs of the old and new loop.
    # bitset: n ≤ 64; keep: index is c × n; whole: one stratum of everybody (members[u] is u).
    c = out.shape[0]
    k, n = columns.shape
    x0 = columns[0]
    x1 = columns[1 % k]
    x2 = columns[2 % k]
    out[:, :] = 0.0
    if bitset:
        present[:, 0] = 0
    else:
        present[:, :] = 0
    for s in range(states.shape[0]):
        s0, s1, s2, s3, spare = states[s, 0], states[s, 1], states[s, 2], states[s, 3], states[s, 4]
        have = states[s, 5] != 0
        start, stop = bounds[s], bounds[s + 1]
        size = np.uint64(stop - start)
        threshold = thresholds[s]
        missed = 0
        for b in range(c):
            a0 = a1 = a2 = 0.0
            e0 = e1 = e2 = 0.0
            bits = np.uint64(0)
            t = start
            while t + 1 < stop:
                paired = False
                if not have:  # both draws from the low and high lane of one output, if neither
                    n0, n1, n2, n3, result = _xoshiro(s0, s1, s2, s3)  # is rejected
                    mu = (result & np.uint64(0xFFFFFFFF)) * size
                    mv = (result >> np.uint64(32)) * size
                    if ((mu & np.uint64(0xFFFFFFFF)) >= threshold
                            and (mv & np.uint64(0xFFFFFFFF)) >= threshold):
                        s0, s1, s2, s3 = n0, n1, n2, n3
                        spare = result >> np.uint64(32)  # left in the state as _draw_one does
                        u = mu >> np.uint64(32)
                        v = mv >> np.uint64(32)
                        paired = True
                if not paired:  # a spare lane to use first, or a rejection: one lane at a time
                    s0, s1, s2, s3, spare, have, u, missed = _draw_one(
                        s0, s1, s2, s3, spare, have, size, threshold, missed)
                    s0, s1, s2, s3, spare, have, v, missed = _draw_one(
                        s0, s1, s2, s3, spare, have, size, threshold, missed)
                i = u if whole else np.uint64(members[start + u])
                j = v if whole else np.uint64(members[start + v])
                if keep:
                    index[b, t] = i
                    index[b, t + 1] = j
                a0 += x0[i]
                e0 += x0[j]
                a1 += x1[i]
                e1 += x1[j]
                a2 += x2[i]
                e2 += x2[j]
                bits = _mark(present, b, bits, i, bitset)
                bits = _mark(present, b, bits, j, bitset)
                t += 2
            if t < stop:
                s0, s1, s2, s3, spare, have, u, missed = _draw_one(
                    s0, s1, s2, s3, spare, have, size, threshold, missed)
                i = u if whole else np.uint64(members[start + u])
                if keep:
                    index[b, t] = i
                a0 += x0[i]
                a1 += x1[i]
                a2 += x2[i]
                bits = _mark(present, b, bits, i, bitset)
            out[b, 0] += a0 + e0
            if k > 1:
                out[b, 1] += a1 + e1
            if k > 2:
                out[b, 2] += a2 + e2
            if bitset:
                present[b, 0] |= bits
        states[s, 0], states[s, 1], states[s, 2], states[s, 3], states[s, 4] = s0, s1, s2, s3, spare
        states[s, 5] = np.uint64(1) if have else np.uint64(0)
        misses[s] = missed
    for b in range(c):
        for col in range(3, k):
            xc = columns[col]
            total = 0.0
            for t in range(n):
                total += xc[index[b, t]]
            out[b, col] = total
        for col in range(k):
            out[b, col] /= n


@numba.njit(cache=True, nogil=True)
def omission_sums_bits(
    present: Any, first: int, stop: int, finite: Any, centred: Any, omitted: Any
) -> None:  # pragma: no cover - compiled
    # Subject i's sums take the replicates in order, whichever subjects a call covers. They run
    # in a private copy (no cache line shared with another thread's subjects while adding),
    # in loops that count from 0, which numba compiles without negative-index checks.
    #
    # Every subject's sums get an addition in every finite replicate: the term where the subject
    # is absent, else -0.0, which leaves any double as it is: x + -0.0 is exact for x other than
    # zero, and in the default rounding +0.0 + -0.0 is +0.0 and -0.0 + -0.0 is -0.0 (IEEE
    # 754-2019 §6.3, from memory; tests/stats/test_plain.py checks ±0.0, infinities and NaN bit
    # for bit), so the sums are those of adding only where absent. Without the branch (absent
    # in about 37 % of the pairs, at random) LLVM runs the subjects four to a vector
    # instruction; each subject's additions keep their order. Side by side with the branching
    # loop, same bytes: n = 200, B = 10⁵ 8.5 against 76 ms; n = 24, B = 10⁴ 0.13 against 0.94 ms.
    if stop <= first:
        return
    one = np.uint64(1)
    sums = omitted[:, first:stop].copy()
    count, sum1, sum2 = sums[0], sums[1], sums[2]
    for b in range(present.shape[0]):
        if not finite[b]:
            continue
        d = centred[b]
        dd = d * d
        bits = ~(present[b, 0] >> np.uint64(first))
        for i in range(stop - first):
            absent = (bits >> np.uint64(i)) & one
            count[i] += 1.0 if absent else -0.0
            sum1[i] += d if absent else -0.0
            sum2[i] += dd if absent else -0.0
    omitted[:, first:stop] = sums


@numba.njit(cache=True, nogil=True)
def omission_sums_bytes(
    present: Any, first: int, stop: int, finite: Any, centred: Any, omitted: Any
) -> None:  # pragma: no cover - compiled
    sums = omitted[:, first:stop].copy()
    count, sum1, sum2 = sums[0], sums[1], sums[2]
    for b in range(present.shape[0]):
        if not finite[b]:
            continue
        d = centred[b]
        dd = d * d
        row = present[b, first:stop]
        for i in range(stop - first):  # without a branch, as omission_sums_bits says
            absent = row[i] == 0
            count[i] += 1.0 if absent else -0.0
            sum1[i] += d if absent else -0.0
            sum2[i] += dd if absent else -0.0
    omitted[:, first:stop] = sums
