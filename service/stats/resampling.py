"""Jackknife and bootstrap for smooth functions of per-subject means.

``data`` is an (n subjects × k columns) float array; ``statistic`` maps a (..., k) array of column
means to estimates (...). Subjects are resampled as whole rows. Replicates whose statistic is not
finite (e.g. a zero denominator) are excluded from every quantile, mean and standard error, and
counted in ``nonfinite_replicates``.

Random subject indices: ``numpy.random.SeedSequence(seed)`` spawns one xoshiro256** stream
(Blackman & Vigna 2021) per stratum, or one for all subjects without strata; 32-bit lanes of it are
mapped to members of the stratum by Lemire's multiply-and-reject method, which is exactly uniform
(kernels.py). Replicate b takes the next draws of each stream in order, so neither the chunk size,
nor the number of threads, nor the loops that draw (compiled or plain numpy) changes a number
(waves.py, kernels.py).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.stats import intervals as iv
from service.stats import kernels, waves
from service.stats.diagnostics import Diagnostic

__all__ = ["Bootstrap", "Diagnostic", "Histogram", "Intervals", "Jackknife", "MonteCarloError",
           "bootstrap", "jackknife", "leave_one_out_values", "summarise_jackknife"]

FloatArray = NDArray[np.float64]
MeansStatistic = Callable[[FloatArray], FloatArray]

# Draws per chunk: a chunk keeps only its means and presence flags (at most one byte per draw),
# so this bounds the per-chunk memory at about 1 MB whatever B is (each thread holds two chunks
# at a time). A chunk is also what one thread draws between two hand-overs.
CHUNK_INDICES = 1 << 20


@dataclass(frozen=True)
class Jackknife:
    """Quenouille 1956 / Tukey 1958 jackknife. ``values`` are θ(i) in row order (None where the
    leave-one-out statistic is undefined); the summaries are None unless every θ(i) is finite."""

    values: tuple[float | None, ...]
    mean: float | None
    bias: float | None
    standard_error: float | None
    bias_corrected: float | None


@dataclass(frozen=True)
class MonteCarloError:
    """Jackknife-after-bootstrap (Efron 1992, JRSS-B 54:83–127)."""

    standard_error_of_standard_error: float | None
    standard_error_of_bias: float | None
    min_replicates_omitting_subject: int


@dataclass(frozen=True)
class Histogram:
    edges: tuple[float, ...]
    counts: tuple[int, ...]


@dataclass(frozen=True)
class Intervals:
    percentile: iv.Interval | None
    basic: iv.Interval | None
    normal: iv.Interval | None
    bca: iv.Interval | None


@dataclass(frozen=True)
class Bootstrap:
    replicates: int
    seed: int
    finite_replicates: int
    nonfinite_replicates: int
    bias: float | None
    standard_error: float | None
    intervals: Intervals
    z0: float | None
    acceleration: float | None
    monte_carlo: MonteCarloError
    histogram: Histogram
    diagnostics: tuple[Diagnostic, ...]
    distribution: FloatArray  # the finite replicate values, in replicate order


def leave_one_out_values(data: FloatArray, statistic: MeansStatistic) -> FloatArray:
    """θ(i) = g((S − X_i)/(n − 1)), S = column sums: all n leave-one-out means at once."""
    n = data.shape[0]
    means = (data.sum(axis=0) - data) / (n - 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.asarray(statistic(means), dtype=np.float64)


def jackknife(data: FloatArray, statistic: MeansStatistic, theta_hat: float) -> Jackknife:
    return summarise_jackknife(leave_one_out_values(data, statistic), theta_hat)


def summarise_jackknife(values: FloatArray, theta_hat: float) -> Jackknife:
    listed = tuple(float(v) if math.isfinite(v) else None for v in values)
    if not np.all(np.isfinite(values)):
        return Jackknife(listed, None, None, None, None)
    n = values.size
    mean = float(values.mean())
    bias = (n - 1) * (mean - theta_hat)  # Efron & Tibshirani 1993 eq. 11.8
    se = math.sqrt((n - 1) / n * float(np.sum((values - mean) ** 2)))  # eq. 11.5
    return Jackknife(listed, mean, bias, se, theta_hat - bias)


def default_chunk_size(n: int) -> int:
    return max(1024, CHUNK_INDICES // n)


def bootstrap(
    data: FloatArray,
    statistic: MeansStatistic,
    *,
    theta_hat: float,
    jackknife_values: FloatArray,
    replicates: int,
    seed: int,
    confidence_level: float,
    strata: NDArray[np.int64] | None = None,
    chunk_size: int | None = None,
    histogram_bins: int = 40,
    deadline: float | None = None,
    threads: int | None = None,
) -> Bootstrap:
    """Nonparametric bootstrap of subjects (Efron & Tibshirani 1993 ch. 6) with all intervals
    and the jackknife-after-bootstrap Monte-Carlo errors. Inputs must already be validated,
    except ``threads``.

    ``deadline`` is a time.monotonic() value: once it has passed, the loop stops before the
    next chunk and raises ComputeTimeExceeded (no partial result is returned). ``threads`` caps
    the threads that draw replicates (None: as many as the cores this process may use); neither
    it nor ``chunk_size`` changes any number."""
    if threads is not None and (
        isinstance(threads, bool) or not isinstance(threads, int | np.integer) or threads < 1
    ):
        raise ValueError(f"threads: must be a positive integer, got {threads!r}")
    n, _ = data.shape
    draws = kernels.SubjectDraws(seed, data, strata,
                                 compiled=kernels.use_compiled(replicates * n))
    chunk = chunk_size if chunk_size is not None else default_chunk_size(n)
    # omitted[:, i] = Σ over the finite replicates omitting subject i of [1, θ*−θ̂, (θ*−θ̂)²]
    theta_star, omitted = waves.resample(
        draws, statistic, theta_hat, replicates, chunk,
        int(threads) if threads is not None else waves.available_threads(), deadline,
    )
    return _summarise(
        theta_star, omitted, theta_hat, jackknife_values, replicates, seed,
        confidence_level, histogram_bins,
    )


def sorted_histogram(
    ordered: FloatArray, bins: int
) -> tuple[NDArray[np.int64], FloatArray]:
    """np.histogram(x, bins) for sorted x: equal-width bins from min to max, each [left, right)
    except the last, [left, right] (numpy's documented convention)."""
    first, last = float(ordered[0]), float(ordered[-1])
    if first == last:
        first, last = first - 0.5, last + 0.5
    edges = np.linspace(first, last, bins + 1)
    positions = np.searchsorted(ordered, edges, side="left")
    positions[-1] = ordered.size
    return np.diff(positions).astype(np.int64), edges


def _monte_carlo(
    omitted: FloatArray, theta_hat: float, jackknife_values: FloatArray
) -> tuple[MonteCarloError, list[Diagnostic]]:
    n = omitted.shape[1]
    m, s1, s2 = omitted
    fewest = int(m.min())
    if fewest < 2 or not np.all(np.isfinite(jackknife_values)):
        message = (
            f"only {fewest} replicates omit some subject: the Monte-Carlo errors need at least 2"
            if fewest < 2
            else "a leave-one-out value is undefined: no Monte-Carlo errors"
        )
        return MonteCarloError(None, None, fewest), [Diagnostic("too_few_replicates", message)]
    # Bootstrap SE and bias recomputed from the replicates that omit subject i, Efron 1992 §3.
    variance = np.maximum(s2 - s1 * s1 / m, 0.0) / (m - 1)
    se_i = np.sqrt(variance)
    bias_i = (theta_hat + s1 / m) - jackknife_values
    factor = (n - 1) / n
    se_se = math.sqrt(factor * float(np.sum((se_i - se_i.mean()) ** 2)))
    se_bias = math.sqrt(factor * float(np.sum((bias_i - bias_i.mean()) ** 2)))
    return MonteCarloError(se_se, se_bias, fewest), []


def _summarise(
    theta_star: FloatArray,
    omitted: FloatArray,
    theta_hat: float,
    jackknife_values: FloatArray,
    replicates: int,
    seed: int,
    confidence_level: float,
    histogram_bins: int,
) -> Bootstrap:
    diagnostics: list[Diagnostic] = []
    finite = np.isfinite(theta_star)
    distribution = theta_star[finite] if not finite.all() else theta_star
    nonfinite = replicates - distribution.size
    if nonfinite:
        diagnostics.append(Diagnostic(
            "nonfinite_replicates",
            f"{nonfinite} of {replicates} replicates had a zero denominator and were left out",
        ))
    empty = Intervals(None, None, None, None)
    if distribution.size < 2:
        diagnostics.append(Diagnostic("too_few_replicates", "fewer than 2 finite replicates"))
        return Bootstrap(replicates, seed, distribution.size, nonfinite, None, None, empty, None,
                         None, MonteCarloError(None, None, 0), Histogram((), ()),
                         tuple(diagnostics), distribution)
    bias = float(distribution.mean()) - theta_hat
    se = float(distribution.std(ddof=1))
    # One sort serves every quantile, tail count and the histogram (cheaper than repeated
    # selection passes); the replicates themselves keep their draw order.
    ordered = np.sort(distribution)
    percentile, bca = iv.percentile_and_bca(ordered, theta_hat, jackknife_values,
                                            confidence_level)
    if not bca.acceleration_defined:
        diagnostics.append(Diagnostic(
            "acceleration_undefined",
            "the jackknife values are all equal or undefined: BCa uses acceleration 0",
        ))
    if bca.problem is not None:
        diagnostics.append(Diagnostic("bca_undefined", f"no BCa interval: {bca.problem}"))
    elif bca.interval is not None and bca.interval.levels is not None:
        low, high = bca.interval.levels
        if low < 1.0 / distribution.size or high > 1.0 - 1.0 / distribution.size:
            diagnostics.append(Diagnostic(
                "too_few_replicates",
                f"BCa levels {low:.3g}, {high:.3g} are beyond what {distribution.size} "
                "replicates resolve",
            ))
    intervals = Intervals(
        percentile=percentile,
        basic=iv.reflect(percentile, theta_hat),
        normal=iv.normal_interval(theta_hat, bias, se, confidence_level),
        bca=bca.interval,
    )
    monte_carlo, problems = _monte_carlo(omitted, theta_hat, jackknife_values)
    diagnostics.extend(problems)
    counts, edges = sorted_histogram(ordered, histogram_bins)
    histogram = Histogram(tuple(float(e) for e in edges), tuple(int(c) for c in counts))
    return Bootstrap(
        replicates, seed, int(distribution.size), nonfinite, bias, se, intervals, bca.z0,
        bca.acceleration, monte_carlo, histogram, tuple(diagnostics), distribution,
    )
