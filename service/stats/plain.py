"""The bootstrap's inner loops in plain numpy, with the compiled loops' numbers to the last bit.

A short command-line analysis would spend more time loading the compiled loops (compiled.py:
importing numba and initialising LLVM, about half a second) than drawing its replicates, so small
runs use these instead; kernels.py chooses. Both read the same xoshiro256** streams and add the
same numbers in the same order, so the results are identical (tests/stats/test_plain.py compares
them bit for bit).

- Lanes. A stream is cut into sub-streams of K outputs whose start states are found by jumping
  (J^K over GF(2), as streams.py, here as 0/1 matrices multiplied in floating point, exact for
  sums of at most 256 ones); all sub-streams then step side by side, one numpy operation per word
  and step. Lemire's rejection (2019, ACM TOMACS 29:3) is applied to the whole sequence at once.
- Sums. Floating-point addition is not associative, so every sum is an ``np.add.accumulate``
  (a left-to-right running sum by definition, unlike ``np.sum``'s pairwise reduction) over the
  same terms in the same order as the compiled loop, starting from the same 0.0. Adding an exact
  +0.0 for a skipped term leaves a running sum that began at +0.0 unchanged.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

U64 = np.uint64
LOW = U64(0xFFFFFFFF)
SUB_STREAM = 256  # outputs per sub-stream (a power of two: its jump is one tabulated power)

_powers: list[NDArray[np.float32]] = []  # image rows of J^(2^i), as 256 × 256 0/1 matrices


def _bits(words: NDArray[np.uint64]) -> NDArray[np.uint8]:
    """(m × 4) words → (m × 256) bits, bit b of word w at 64·w + b."""
    raw = np.ascontiguousarray(words, dtype="<u8").view(np.uint8)
    return np.unpackbits(raw, axis=1, bitorder="little")


def _words(bits: NDArray[Any]) -> NDArray[np.uint64]:
    packed = np.packbits(bits.astype(np.uint8), axis=1, bitorder="little")
    words: NDArray[np.uint64] = np.ascontiguousarray(packed).view("<u8").astype(np.uint64)
    return words


def _step(s0: Any, s1: Any, s2: Any, s3: Any) -> tuple[Any, Any, Any, Any]:
    # the state transition of xoshiro256** (Blackman & Vigna 2021, ACM TOMS 47:36), output aside
    t = s1 << U64(17)
    s2 = s2 ^ s0
    s3 = s3 ^ s1
    s1 = s1 ^ s2
    s0 = s0 ^ s3
    s2 = s2 ^ t
    s3 = (s3 << U64(45)) | (s3 >> U64(19))
    return s0, s1, s2, s3


def _power(level: int) -> NDArray[np.float32]:
    """Image rows of J^(2^level): row j holds the bits of J^(2^level) applied to unit state j."""
    if not _powers:
        units = np.zeros((256, 4), dtype=np.uint64)
        units[np.arange(256), np.arange(256) // 64] = U64(1) << (np.arange(256) % 64).astype(U64)
        moved = _step(units[:, 0], units[:, 1], units[:, 2], units[:, 3])
        _powers.append(_bits(np.stack(moved, axis=1)).astype(np.float32))
    while len(_powers) <= level:
        square = _powers[-1] @ _powers[-1]
        _powers.append((square.astype(np.int32) & 1).astype(np.float32))
    return _powers[level]


def _apply(level: int, states: NDArray[np.uint64]) -> NDArray[np.uint64]:
    """J^(2^level) applied to each row of ``states`` (m × 4 words)."""
    product = _bits(states).astype(np.float32) @ _power(level)
    return _words(product.astype(np.int32) & 1)


def jump(state: NDArray[np.uint64], outputs: int) -> NDArray[np.uint64]:
    """The four state words ``outputs`` outputs after ``state``."""
    moved = np.asarray(state[:4], dtype=np.uint64).reshape(1, 4)
    level = 0
    while outputs:
        if outputs & 1:
            moved = _apply(level, moved)
        outputs >>= 1
        level += 1
    after: NDArray[np.uint64] = moved[0].copy()
    return after


def outputs(state: NDArray[np.uint64], count: int) -> NDArray[np.uint64]:
    """The next ``count`` 64-bit outputs of xoshiro256** from the four state words ``state``."""
    if count <= 0:
        return np.empty(0, dtype=np.uint64)
    per = min(SUB_STREAM, count)
    subs = -(-count // per)
    starts = np.asarray(state[:4], dtype=np.uint64).reshape(1, 4)
    level = per.bit_length() - 1 if per == SUB_STREAM else 0
    if subs > 1:  # sub-stream j starts j·per outputs in: double the known starts each round
        base = level
        while starts.shape[0] < subs:
            starts = np.concatenate([starts, _apply(base, starts)])
            base += 1
        starts = starts[:subs]
    s0, s1, s2, s3 = (np.ascontiguousarray(starts[:, w]) for w in range(4))
    out = np.empty((per, subs), dtype=np.uint64)
    with np.errstate(over="ignore"):
        for k in range(per):
            x = s1 * U64(5)
            out[k] = ((x << U64(7)) | (x >> U64(57))) * U64(9)
            s0, s1, s2, s3 = _step(s0, s1, s2, s3)
    return out.T.ravel()[:count]


def _draw_stratum(
    state: NDArray[np.uint64], need: int, size: int, threshold: int
) -> tuple[NDArray[np.int64], int]:
    """``need`` draws uniform on [0, size) from the six-word stream ``state`` (see streams.py),
    as the compiled loop makes them; ``state`` is moved past them. Returns (draws, lanes
    rejected)."""
    have = int(state[5]) != 0
    start = state[:4].copy()
    pending = [state[4:5].copy()] if have else []  # an unused spare half is the first lane
    here = start
    positions: list[NDArray[np.int64]] = []
    values: list[NDArray[np.uint64]] = []
    taken = found = 0  # lanes examined, lanes accepted
    while found < need:
        more = -(-(need - found) // 2) + 2  # rejections are rare: a couple of outputs spare
        fresh = outputs(here, more)
        here = jump(here, more)
        lanes = np.empty(2 * more, dtype=np.uint64)
        lanes[0::2] = fresh & LOW  # each output is two lanes, low half first
        lanes[1::2] = fresh >> U64(32)
        examined = np.concatenate([*pending, lanes])
        pending = []
        with np.errstate(over="ignore"):
            m = examined * U64(size)
        ok = np.flatnonzero((m & LOW) >= U64(threshold))
        positions.append(ok + taken)
        values.append(m[ok] >> U64(32))
        taken += examined.size
        found += ok.size
    consumed = int(np.concatenate(positions)[need - 1]) + 1
    draws = np.concatenate(values)[:need].astype(np.int64)
    from_outputs = consumed - (1 if have else 0)  # lanes taken from new outputs
    if from_outputs == 0:  # only the spare half: the state words stay, the spare is used
        state[5] = U64(0)
    else:
        used = -(-from_outputs // 2)
        state[:4] = jump(start, used)
        state[4] = outputs(jump(start, used - 1), 1)[0] >> U64(32)
        state[5] = U64(from_outputs % 2)  # the high half of the last output is still unused
    return draws, consumed - need


def _running_sum(terms: NDArray[np.float64]) -> NDArray[np.float64]:
    """Row by row, 0.0 + t₀ + t₁ + … left to right, as a loop that starts from 0.0 adds them."""
    rows = terms.shape[0]
    padded = np.zeros((rows, terms.shape[1] + 1))
    padded[:, 1:] = terms
    return np.add.accumulate(padded, axis=1)[:, -1]


def draw_subjects(
    states: NDArray[np.uint64], members: NDArray[np.int64], bounds: NDArray[np.int64],
    thresholds: NDArray[np.uint64], columns: NDArray[np.float64], out: NDArray[np.float64],
    present: NDArray[Any], index: NDArray[np.int64], misses: NDArray[np.int64],
) -> None:
    """compiled.draw_subjects, same arguments and results (see there)."""
    c = out.shape[0]
    k, n = columns.shape
    bitset = n <= 64
    keep = index.shape[0] > 0
    out[:, :] = 0.0
    if bitset:
        present[:, 0] = 0
    else:
        present[:, :] = 0
    rows = np.arange(c)[:, None]
    for s in range(states.shape[0]):
        start, stop = int(bounds[s]), int(bounds[s + 1])
        size = stop - start
        draws, missed = _draw_stratum(states[s], c * size, size, int(thresholds[s]))
        chosen = members[start + draws].reshape(c, size)
        if keep:
            index[:, start:stop] = chosen
        for col in range(min(k, 3)):
            x = columns[col][chosen]
            # two running sums per replicate (first and second draw of each pair), then added
            out[:, col] += _running_sum(x[:, 0::2]) + _running_sum(x[:, 1::2])
        if bitset:
            flags = U64(1) << chosen.astype(np.uint64)
            present[:, 0] |= np.bitwise_or.reduce(flags, axis=1)
        else:
            present[rows, chosen] = 1
        misses[s] = missed
    for col in range(3, k):
        out[:, col] = _running_sum(columns[col][index])
    out /= n


def omission_sums(
    present: NDArray[Any], first: int, stop: int, finite: NDArray[np.bool_],
    centred: NDArray[np.float64], omitted: NDArray[np.float64],
) -> None:
    """compiled.omission_sums_bits / _bytes, same arguments and results: for subjects
    first ≤ i < stop, add over the finite replicates without i, in order, [1, d, d²]."""
    if stop <= first:
        return
    if present.dtype == np.uint8:
        absent = present[:, first:stop] == 0
    else:
        shifts = np.arange(first, stop, dtype=np.uint64)
        absent = ((present[:, 0:1] >> shifts[None, :]) & U64(1)) == 0
    mask = absent & np.asarray(finite, dtype=bool)[:, None]
    d = centred[:, None]
    terms = (np.where(mask, 1.0, 0.0), np.where(mask, d, 0.0), np.where(mask, d * d, 0.0))
    for row, term in enumerate(terms):
        stacked = np.empty((term.shape[0] + 1, term.shape[1]))
        stacked[0] = omitted[row, first:stop]
        stacked[1:] = term
        omitted[row, first:stop] = np.add.accumulate(stacked, axis=0)[-1]
