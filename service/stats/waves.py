"""The bootstrap's replicate loop, on one thread or several, with the same numbers either way.

Each stratum keeps its one xoshiro256** stream; threads share the replicates, not the streams.
Replicates go in waves of one block per thread (a block is at most a chunk). A block starts where
its first replicate's draws start in each stream: replicate b of a stratum of s members begins at
lane b·s plus the lanes rejected before it by Lemire's method, and streams.py jumps straight
there. Rejections are rare (probability below s/2³² per lane) and only drawing finds them, so
every block is first drawn as if the blocks before it in the wave rejected nothing; each then
reports the lanes it rejected, and any block that started in the wrong place is drawn again
from the right one (with the blocks after it). θ* lands in replicate order, whichever thread
drew it.

The jackknife-after-bootstrap sums are shared out by subject: along with its next block, each
thread adds the previous wave's replicates, in order, for its own subjects only, so that every
subject's sums are the same additions in the same order as on one thread. The statistic is
evaluated on the calling thread. The compute-time deadline is checked between waves, so all
threads stop within about one chunk of it.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from functools import partial
from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.stats import kernels
from service.stats.deadlines import ComputeTimeExceeded

FloatArray = NDArray[np.float64]
MeansStatistic = Callable[[FloatArray], FloatArray]

# A thread is worth starting for this many draws or more (about a millisecond of drawing): starting
# and feeding the threads costs about half a millisecond.
MIN_BLOCK_DRAWS = 1 << 19


def available_threads() -> int:
    """The cores this process may run on (its CPU affinity where the platform reports it)."""
    if hasattr(os, "sched_getaffinity"):
        return max(1, len(os.sched_getaffinity(0)))
    return max(1, os.cpu_count() or 1)


def _evaluate(
    statistic: MeansStatistic, means: FloatArray, theta_hat: float
) -> tuple[FloatArray, NDArray[np.bool_], FloatArray]:
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        theta = np.asarray(statistic(means), dtype=np.float64)
    finite = np.isfinite(theta)
    centred = np.where(finite, theta - theta_hat, 0.0)
    return theta, finite, centred


def _check(deadline: float | None, done: int, replicates: int) -> None:
    if deadline is not None and time.monotonic() > deadline:
        raise ComputeTimeExceeded(done, replicates)


def resample(
    draws: kernels.SubjectDraws,
    statistic: MeansStatistic,
    theta_hat: float,
    replicates: int,
    chunk: int,
    threads: int,
    deadline: float | None,
) -> tuple[FloatArray, FloatArray]:
    """(θ* in replicate order, the omission sums: per subject i, Σ over the finite replicates
    that omit i of [1, θ*−θ̂, (θ*−θ̂)²]), on up to ``threads`` threads. Raises
    ComputeTimeExceeded once ``deadline`` (time.monotonic()) has passed."""
    n = draws.subjects
    theta_star = np.empty(replicates, dtype=np.float64)
    omitted = np.zeros((3, n), dtype=np.float64)
    workers = max(1, min(threads, replicates * n // MIN_BLOCK_DRAWS))
    if not draws.compiled:  # only the compiled loops release the GIL (and streams.py is compiled)
        workers = 1
    if workers == 1:
        done = 0
        while done < replicates:
            _check(deadline, done, replicates)
            c = min(chunk, replicates - done)
            means, present, _ = draws.draw(c)
            theta, finite, centred = _evaluate(statistic, means, theta_hat)
            kernels.add_omission_sums(present, n, finite, centred, omitted,
                                      compiled=draws.compiled)
            theta_star[done : done + c] = theta
            done += c
        return theta_star, omitted
    with ThreadPoolExecutor(workers - 1, thread_name_prefix="bootstrap") as pool:
        _Waves(draws, pool, workers, chunk, omitted).run(statistic, theta_hat, theta_star,
                                                         deadline)
    return theta_star, omitted


class _Waves:
    def __init__(
        self, draws: kernels.SubjectDraws, pool: ThreadPoolExecutor, workers: int, chunk: int,
        omitted: FloatArray,
    ) -> None:
        from service.stats import streams  # compiled: loaded only when threads draw

        self.draws, self.pool, self.workers, self.omitted = draws, pool, workers, omitted
        self.streams = streams
        self.span = workers * chunk
        self.sizes = draws.stratum_sizes
        # a block starts fewer than span·s lanes into the wave, plus a few rejected lanes
        self.table = streams.jump_table(streams.levels_for(2 * self.span * int(self.sizes.max())))
        n = draws.subjects
        self.subjects = [(n * t // workers, n * (t + 1) // workers) for t in range(workers)]
        self.previous: tuple[NDArray[Any], NDArray[np.bool_], FloatArray] | None = None

    def _together(self, tasks: list[Callable[[], None]]) -> None:
        futures = [self.pool.submit(task) for task in tasks[1:]]
        try:
            tasks[0]()
        finally:
            for future in futures:
                future.result()

    def _add_previous(self, t: int) -> None:
        if self.previous is not None:
            present, finite, centred = self.previous
            kernels.add_omission_sums(present, self.draws.subjects, finite, centred, self.omitted,
                                      subjects=self.subjects[t], compiled=True)

    def run(
        self, statistic: MeansStatistic, theta_hat: float, theta_star: FloatArray,
        deadline: float | None,
    ) -> None:
        replicates = theta_star.size
        span = min(self.span, replicates)
        # two sets of buffers: a wave is drawn into one while the sums read the wave before
        buffers = [self.draws.buffers(span) for _ in range(2 if replicates > span else 1)]
        base = self.draws.position()
        done = wave = 0
        while done < replicates:
            _check(deadline, done, replicates)
            c = min(span, replicates - done)
            all_means, all_present, all_index = buffers[wave % len(buffers)]
            means, present, index = all_means[:c], all_present[:c], all_index[:c]
            base = self._draw_wave(base, means, present, index)
            theta, finite, centred = _evaluate(statistic, means, theta_hat)
            theta_star[done : done + c] = theta
            self.previous = (present, finite, centred)
            done += c
            wave += 1
        self._together([partial(self._add_previous, t) for t in range(self.workers)])
        self.previous = None
        self.draws.move_to(base)

    def _draw_wave(
        self, base: NDArray[np.uint64], means: FloatArray, present: NDArray[Any],
        index: NDArray[np.int64],
    ) -> NDArray[np.uint64]:
        """Draws the wave's replicates into the buffers; returns the stream states after them."""
        c = means.shape[0]
        blocks = min(self.workers, c)
        firsts = np.array([c * j // blocks for j in range(blocks + 1)], dtype=np.int64)
        lanes = firsts[:blocks, None] * self.sizes[None, :]  # as if no lane were rejected
        misses = np.zeros_like(lanes)
        ends = np.empty((blocks, self.sizes.size, 6), dtype=np.uint64)

        def draw_block(j: int) -> None:
            self.streams.starts_at(self.table, base, lanes[j], ends[j])
            rows = slice(firsts[j], firsts[j + 1])
            self.draws.draw_from(ends[j], means[rows], present[rows], index[rows], misses[j])

        def first_round(t: int) -> None:
            self._add_previous(t)
            if t < blocks:
                draw_block(t)

        self._together([partial(first_round, t) for t in range(self.workers)])
        while True:
            # where each block truly starts, given what the blocks before it rejected; right
            # for every block up to the first one that started elsewhere
            exact = firsts[:blocks, None] * self.sizes[None, :]
            exact[1:] += np.cumsum(misses[:-1], axis=0)
            wrong = np.flatnonzero((lanes != exact).any(axis=1))
            if wrong.size == 0:
                after: NDArray[np.uint64] = ends[blocks - 1].copy()
                return after
            again = [j for j in range(int(wrong[0]), blocks) if (lanes[j] != exact[j]).any()]
            lanes[again] = exact[again]
            self._together([partial(draw_block, j) for j in again])
