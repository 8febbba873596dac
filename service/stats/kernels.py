"""The bootstrap's inner loops: subject draws, resampled means, presence, and the
jackknife-after-bootstrap sums, from compiled code (compiled.py, numba) or plain numpy (plain.py).

Both backends read the same xoshiro256** streams and add the same numbers in the same order, so
they give the same results to the last bit. Loading the compiled loops costs a process about half
a second (importing numba, initialising LLVM, reading the cached machine code), which a short
command-line analysis would mostly spend waiting; plain numpy draws about 40 times slower. So a
process draws in plain numpy until its draws add up to COMPILED_FROM_DRAWS (about a tenth of a
second of plain drawing), and compiled from then on (a rent-or-buy rule: a process never loses
much more than the loading time either way). Any single run of that size or more, and any run on
several threads, draws compiled; the service loads them at start-up (load_compiled).
"""

from __future__ import annotations

import sys
from types import ModuleType
from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.stats import plain

# Draws (replicates × subjects) in plain numpy after which a process loads the compiled loops
# (about 0.1 s of plain-numpy drawing). A single run this large is also where a second thread
# starts to pay (waves.MIN_BLOCK_DRAWS), and only compiled code draws on several threads.
COMPILED_FROM_DRAWS = 1 << 20

_plain_draws = 0  # drawn in plain numpy so far by this process (a race only miscounts a little)

_COMPILED = "service.stats.compiled"


def load_compiled() -> ModuleType:
    """The compiled loops, loaded (and from then on chosen by default in this process)."""
    from service.stats import compiled

    return compiled


def compiled_loaded() -> bool:
    return _COMPILED in sys.modules


def use_compiled(draws: int) -> bool:
    """Whether a run of ``draws`` draws should use the compiled loops (see above); counts the
    run's draws towards the plain-numpy total when it does not."""
    global _plain_draws
    if compiled_loaded():
        return True
    _plain_draws += draws
    return _plain_draws >= COMPILED_FROM_DRAWS


def add_omission_sums(
    present: NDArray[Any],
    n: int,
    finite: NDArray[np.bool_],
    centred: NDArray[np.float64],
    omitted: NDArray[np.float64],
    subjects: tuple[int, int] | None = None,
    compiled: bool | None = None,
) -> None:
    """For every subject i, add over the finite replicates that do not contain i the terms
    [1, θ*−θ̂, (θ*−θ̂)²] (the sums behind jackknife-after-bootstrap, Efron 1992 §3), replicate
    by replicate in order. ``present`` is what SubjectDraws.draw returns: bitsets (n ≤ 64) or one
    byte per subject. ``subjects`` = (first, stop) limits the work to those subjects, so that
    threads can share it without changing the order of any subject's additions. ``compiled``:
    which loops (None: compiled ones once this process has loaded them)."""
    first, stop = subjects if subjects is not None else (0, n)
    if not (compiled_loaded() if compiled is None else compiled):
        plain.omission_sums(present, first, stop, finite, centred, omitted)
    elif present.dtype == np.uint8:
        load_compiled().omission_sums_bytes(present, first, stop, finite, centred, omitted)
    else:
        load_compiled().omission_sums_bits(present, first, stop, finite, centred, omitted)


class SubjectDraws:
    """Whole-subject bootstrap samples of an (n × k) table, stratified or not: SeedSequence(seed)
    spawns one xoshiro256** stream per stratum (one stratum of everybody without strata), and each
    replicate draws, per stratum, as many of its members as it has. Replicate b always gets the
    same draws however the replicates are split into chunks or shared between threads, and
    whichever loops draw them (``compiled``; None: compiled ones once this process has loaded
    them)."""

    def __init__(
        self, seed: int, data: NDArray[np.float64], strata: NDArray[np.int64] | None = None,
        compiled: bool | None = None,
    ) -> None:
        n = data.shape[0]
        if strata is None:
            groups = [np.arange(n, dtype=np.int64)]
        else:
            groups = [np.flatnonzero(strata == code).astype(np.int64) for code in np.unique(strata)]
        children = np.random.SeedSequence(seed).spawn(len(groups))
        self._states = np.zeros((len(groups), 6), dtype=np.uint64)
        for s, child in enumerate(children):
            self._states[s, :4] = child.generate_state(4, dtype=np.uint64)
            if not self._states[s, :4].any():  # the one state xoshiro cannot leave
                self._states[s, 0] = 1
        self._members = np.concatenate(groups)
        self._bounds = np.cumsum([0] + [g.size for g in groups]).astype(np.int64)
        self._thresholds = np.array([(1 << 32) % g.size for g in groups], dtype=np.uint64)
        self._columns = np.ascontiguousarray(data.T)
        self.stratum_sizes = np.diff(self._bounds)
        self.subjects = n
        self.compiled = compiled_loaded() if compiled is None else bool(compiled)
        self._draw: Any = load_compiled().draw_subjects if self.compiled else plain.draw_subjects

    def buffers(
        self, replicates: int, keep_index: bool = False
    ) -> tuple[NDArray[np.float64], NDArray[Any], NDArray[np.int64]]:
        """Room for ``replicates`` replicates: (means, presence, draws), as ``draw`` returns them."""
        k, n = self._columns.shape
        means = np.empty((replicates, k), dtype=np.float64)
        present: NDArray[Any] = (
            np.empty((replicates, 1), dtype=np.uint64)
            if n <= 64
            else np.empty((replicates, n), dtype=np.uint8)
        )
        # the draws are kept when asked for, or when a fourth column must be summed from them
        shape = (replicates, n) if keep_index or k > 3 else (0, 0)
        return means, present, np.empty(shape, dtype=np.int64)

    def draw(
        self, replicates: int, keep_index: bool = False
    ) -> tuple[NDArray[np.float64], NDArray[Any], NDArray[np.int64]]:
        """The next ``replicates`` replicates: (means (replicates × k), presence (bitsets for
        n ≤ 64, else bytes), the draws or an empty array)."""
        means, present, index = self.buffers(replicates, keep_index)
        misses = np.empty(self._states.shape[0], dtype=np.int64)
        self.draw_from(self._states, means, present, index, misses)
        return means, present, index

    def draw_from(
        self, states: NDArray[np.uint64], means: NDArray[np.float64], present: NDArray[Any],
        index: NDArray[np.int64], misses: NDArray[np.int64],
    ) -> None:
        """Replicates drawn from the stream states ``states`` (strata × 6, see streams.py) into
        the given buffers, leaving the states where the draws end and the number of lanes each
        stream rejected in ``misses``. Touches no state of this object (threads share it)."""
        self._draw(states, self._members, self._bounds, self._thresholds, self._columns,
                       means, present, index, misses)

    def position(self) -> NDArray[np.uint64]:
        """A copy of the stream states where the next replicate starts."""
        return self._states.copy()

    def move_to(self, states: NDArray[np.uint64]) -> None:
        self._states[:] = states
