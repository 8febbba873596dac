"""Positions in a xoshiro256** stream: the state after any number of 32-bit lanes, without
drawing them.

xoshiro256** (Blackman & Vigna 2021, ACM TOMS 47:36) moves its 256-bit state by a linear map J
over GF(2); the scrambler that makes the output does not feed back. The state m outputs on is
therefore J^m·state, and with the powers J^(2^i) tabulated once (each as its 256 columns, the
images of the unit states) any m costs one bit-matrix × bit-vector product per set bit of m.

A stream's state here is six words, as the draw loop in kernels.py keeps it: s0..s3, then a
spare 32-bit lane (the high half of the last output) and whether that spare is still unused.
"""

from __future__ import annotations

import functools
from typing import Any

import numba
import numpy as np
from numpy.typing import NDArray

LEVELS = 64  # J^(2^i) for i < 64: any jump of fewer than 2^64 outputs

U64Array = NDArray[np.uint64]


@numba.njit(inline="always")
def _step(
    s0: Any, s1: Any, s2: Any, s3: Any
) -> tuple[Any, Any, Any, Any]:  # pragma: no cover - compiled
    # the state transition of xoshiro256** (Blackman & Vigna 2021, reference code), output aside
    t = s1 << np.uint64(17)
    s2 ^= s0
    s3 ^= s1
    s1 ^= s2
    s0 ^= s3
    s2 ^= t
    s3 = (s3 << np.uint64(45)) | (s3 >> np.uint64(19))
    return s0, s1, s2, s3


@numba.njit(cache=True, nogil=True)
def _apply(matrix: Any, state: Any) -> None:  # pragma: no cover - compiled
    # state ← M·state over GF(2): the XOR of the columns of M at the set bits of state
    r0 = r1 = r2 = r3 = np.uint64(0)
    for w in range(4):
        word = state[w]
        bit = 0
        while word:
            if word & np.uint64(1):
                column = matrix[64 * w + bit]
                r0 ^= column[0]
                r1 ^= column[1]
                r2 ^= column[2]
                r3 ^= column[3]
            word >>= np.uint64(1)
            bit += 1
    state[0], state[1], state[2], state[3] = r0, r1, r2, r3


@numba.njit(cache=True, nogil=True)
def _fill_table(table: Any) -> None:  # pragma: no cover - compiled
    for j in range(256):  # J itself: one step of each unit state
        unit = np.zeros(4, dtype=np.uint64)
        unit[j // 64] = np.uint64(1) << np.uint64(j % 64)
        table[0, j, 0], table[0, j, 1], table[0, j, 2], table[0, j, 3] = _step(
            unit[0], unit[1], unit[2], unit[3])
    for i in range(1, table.shape[0]):  # J^(2^i) = J^(2^(i-1)) · J^(2^(i-1)), column by column
        for j in range(256):
            column = table[i - 1, j].copy()
            _apply(table[i - 1], column)
            table[i, j] = column


@functools.cache
def jump_table(levels: int = LEVELS) -> U64Array:
    """The columns of J^(2^i), i < levels, as a (levels × 256 × 4) array; made once per process
    for each number of levels (jumps of fewer than 2^levels outputs)."""
    table = np.zeros((levels, 256, 4), dtype=np.uint64)
    _fill_table(table)
    table.setflags(write=False)
    return table


def levels_for(lanes: int) -> int:
    """Levels enough for jumps of up to ``lanes`` lanes, in steps of 8 (few tables per process)."""
    outputs = lanes // 2 + 1
    return min(LEVELS, max(8, -(-outputs.bit_length() // 8) * 8))


@numba.njit(cache=True, nogil=True)
def _advance(table: Any, state: Any, outputs: int) -> None:  # pragma: no cover - compiled
    # state ← J^outputs · state, one tabulated power per set bit of outputs
    level = 0
    while outputs:
        if level == table.shape[0]:
            raise ValueError("jump beyond the tabulated powers")
        if outputs & 1:
            _apply(table[level], state)
        outputs >>= 1
        level += 1


@numba.njit(cache=True, nogil=True)
def at_lane(table: Any, start: Any, lanes: int, out: Any) -> None:  # pragma: no cover - compiled
    """out ← the six-word stream state ``lanes`` 32-bit lanes after ``start``: the state whose next
    lane is lane number ``lanes`` counted from ``start`` (a spare lane of ``start`` is lane 0)."""
    for w in range(6):
        out[w] = start[w]
    if lanes == 0:
        return
    if out[5] != 0:  # the spare half is the first lane
        lanes -= 1
        out[5] = np.uint64(0)
    outputs, odd = lanes // 2, lanes % 2
    _advance(table, out, outputs)
    if odd:  # the next lane is the high half of the next output: make it, keep that half spare
        s0, s1 = out[0], out[1]
        x = s1 * np.uint64(5)
        result = ((x << np.uint64(7)) | (x >> np.uint64(57))) * np.uint64(9)
        out[0], out[1], out[2], out[3] = _step(s0, s1, out[2], out[3])
        out[4] = result >> np.uint64(32)
        out[5] = np.uint64(1)


@numba.njit(cache=True, nogil=True)
def starts_at(
    table: Any, bases: Any, lanes: Any, out: Any
) -> None:  # pragma: no cover - compiled
    """out[s] ← at_lane(bases[s], lanes[s]) for every stream s (one per stratum)."""
    for s in range(bases.shape[0]):
        at_lane(table, bases[s], lanes[s], out[s])
