"""Distribution-free comparison of a paired time metric (Tmax) after a crossover.

The Hodges–Lehmann shift of test minus reference is the median of the Walsh averages
(d_i + d_j)/2, i ≤ j, of the within-subject differences d (Hodges & Lehmann 1963); its interval
is the set of shifts the two-sided Wilcoxon signed-rank test does not reject, read off the
ordered Walsh averages (Tukey 1949; Hollander & Wolfe, Nonparametric Statistical Methods, §3.3).

Zeros and ties: every difference, zero or not, enters the Walsh averages; for a shift μ off the
Walsh averages, d − μ has no zeros and its absolute values tie only where differences are equal.
So the interval's null distribution is the exact signed-rank distribution when all differences
differ and n ≤ 50, and otherwise the normal approximation with the tie correction
Σ(t³ − t)/48 over groups of equal differences and a continuity correction of ½.
Period effects are not modelled: the differences are taken as they come.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from service.stats import distributions as dist
from service.stats.diagnostics import Diagnostic

METHOD = (
    "Hodges–Lehmann shift: the median of the Walsh averages (d_i + d_j)/2, i ≤ j, of the "
    "within-subject differences test − reference, zeros included; interval: the ordered Walsh "
    "averages at the ranks given by the two-sided Wilcoxon signed-rank test (exact distribution "
    "when no two differences are equal and n ≤ 50; otherwise the normal approximation with tie "
    "and continuity corrections). Period effects are not adjusted for."
)

EXACT_MAX_PAIRS = 50                  # as scipy.stats.wilcoxon's method="auto"
MATERIALISE_LIMIT = 2_000_000         # Walsh averages held in memory at once (16 MB)


@dataclass(frozen=True)
class ShiftComparison:
    shift: float | None
    lower: float | None
    upper: float | None
    confidence_level: float
    achieved_confidence_level: float | None   # of the order-statistic interval, exact or approximate
    pairs: int
    interval_method: str | None               # exact_signed_rank | normal_signed_rank_tie_corrected
    tied_differences: bool
    zero_differences: int
    limit_lower: float | None
    limit_upper: float | None
    verdict: str | None                       # within_limits | not_within_limits | undetermined
    reason: str | None
    diagnostics: tuple[Diagnostic, ...]
    method: str = METHOD


def hodges_lehmann_shift(
    test: ArrayLike, reference: ArrayLike, *, confidence_level: float = 0.90,
    limits: tuple[float, float] | None = None,
) -> ShiftComparison:
    """Shift of ``test`` minus ``reference`` (one value of each per subject, paired by position).

    ``limits`` (lower, upper), in the units of the values, give a verdict: within_limits when the
    interval lies inside them inclusively. Without limits the verdict is None.
    """
    d, limit_lower, limit_upper = _validate(test, reference, confidence_level, limits)
    n = d.size
    diagnostics: list[Diagnostic] = []
    tied = bool(np.unique(d).size < n)
    zeros = int(np.count_nonzero(d == 0.0))
    if n == 0:
        diagnostics.append(Diagnostic("no_pairs", "no subject has both a test and a reference "
                                      "value: no shift can be computed"))
        return _result(None, None, None, confidence_level, None, 0, None, tied, zeros,
                       limit_lower, limit_upper, diagnostics, "no pairs")
    m = n * (n + 1) // 2
    alpha = 1.0 - confidence_level
    if n <= EXACT_MAX_PAIRS and not tied:
        cdf = np.cumsum(_signed_rank_pmf(n))
        # k = the largest rank with P(T+ ≤ k − 1) ≤ α/2; Hollander & Wolfe §3.3
        k = min(int(np.searchsorted(cdf, alpha / 2.0 * (1.0 + 1e-12), side="right")), (m + 1) // 2)
        achieved = 1.0 - 2.0 * float(cdf[k - 1]) if k >= 1 else None
        interval_method = "exact_signed_rank"
    else:
        ties = np.unique(d, return_counts=True)[1].astype(np.float64)
        var = n * (n + 1) * (2 * n + 1) / 24.0 - float(np.sum(ties**3 - ties)) / 48.0
        sd = math.sqrt(var)
        z = float(dist.norm_ppf(1.0 - alpha / 2.0))
        # P(T+ ≤ k − 1) ≈ Φ((k − 1 + ½ − M/2)/sd) ≤ α/2, continuity-corrected normal approximation
        k = min(math.floor(m / 2.0 + 0.5 - z * sd), (m + 1) // 2)
        achieved = (1.0 - 2.0 * float(dist.norm_cdf((k - 0.5 - m / 2.0) / sd))) if k >= 1 else None
        interval_method = "normal_signed_rank_tie_corrected"
    median_ranks = [(m + 1) // 2, m // 2 + 1]
    lower: float | None = None
    upper: float | None = None
    if k >= 1:
        order_stats = walsh_order_statistics(d, median_ranks + [k, m + 1 - k])
        lower, upper = float(order_stats[2]), float(order_stats[3])
    else:
        order_stats = walsh_order_statistics(d, median_ranks)
        diagnostics.append(Diagnostic("too_few_pairs_for_interval", f"{n} pairs are too few for a "
                                      f"{100 * confidence_level:g} % signed-rank interval"))
    shift = float(order_stats[0] + order_stats[1]) / 2.0
    if lower is None or upper is None:
        verdict_reason = "no interval could be computed"
    else:
        verdict_reason = f"the interval [{lower:.6g}, {upper:.6g}]"
    return _result(shift, lower, upper, confidence_level, achieved, n, interval_method, tied, zeros,
                   limit_lower, limit_upper, diagnostics, verdict_reason)


def walsh_order_statistics(
    values: ArrayLike, ranks: ArrayLike, *, materialise_limit: int = MATERIALISE_LIMIT,
) -> NDArray[np.float64]:
    """The Walsh averages (x_i + x_j)/2, i ≤ j, at the given 1-based ranks in ascending order.

    Up to ``materialise_limit`` averages are formed and partitioned; beyond, each order statistic
    is selected without forming them, by pivoting on the weighted median of the row medians of
    the sorted pair matrix (Johnson & Mizoguchi 1978; as in Monahan 1984, ACM TOMS 10:265).
    """
    x = np.sort(np.asarray(values, dtype=np.float64))
    r = np.asarray(ranks, dtype=np.int64)
    n = x.size
    m = n * (n + 1) // 2
    if x.ndim != 1 or r.ndim != 1 or (r.size and (r.min() < 1 or r.max() > m)):
        raise ValueError(f"ranks: must lie in 1..{m} for {n} values")
    if r.size == 0:
        return np.empty(0)
    if m <= materialise_limit:
        i, j = np.triu_indices(n)
        walsh = (x[i] + x[j]) / 2.0
        return np.partition(walsh, r - 1)[r - 1]
    return np.array([_select_pair_sum(x, int(k)) / 2.0 for k in r])


def shift_comparison_to_json(c: ShiftComparison) -> dict[str, Any]:
    """The Tmax nonparametric block of a metric result."""
    return {
        "method": "hodges_lehmann",
        "shift": c.shift,
        "lower": c.lower,
        "upper": c.upper,
        "confidence_level": c.confidence_level,
        "achieved_confidence_level": c.achieved_confidence_level,
        "pairs": c.pairs,
        "interval_method": c.interval_method,
        "tied_differences": c.tied_differences,
        "zero_differences": c.zero_differences,
        "limits": (None if c.limit_lower is None else
                   {"lower": c.limit_lower, "upper": c.limit_upper}),
        "verdict": c.verdict,
        "reason": c.reason,
        "description": c.method,
        "warnings": [{"code": d.code, "message": d.message} for d in c.diagnostics],
    }


def _result(
    shift: float | None, lower: float | None, upper: float | None, confidence_level: float,
    achieved: float | None, n: int, interval_method: str | None, tied: bool, zeros: int,
    limit_lower: float | None, limit_upper: float | None, diagnostics: list[Diagnostic],
    interval_text: str,
) -> ShiftComparison:
    verdict: str | None = None
    reason: str | None = None
    if limit_lower is not None and limit_upper is not None:
        limits_text = f"[{limit_lower:.6g}, {limit_upper:.6g}]"
        if lower is None or upper is None:
            verdict, reason = "undetermined", interval_text
        elif limit_lower <= lower and upper <= limit_upper:
            verdict, reason = "within_limits", f"{interval_text} lies within {limits_text}"
        else:
            verdict, reason = "not_within_limits", f"{interval_text} is not contained in {limits_text}"
    return ShiftComparison(shift, lower, upper, confidence_level, achieved, n, interval_method, tied,
                           zeros, limit_lower, limit_upper, verdict, reason, tuple(diagnostics))


def _validate(
    test: ArrayLike, reference: ArrayLike, confidence_level: float,
    limits: tuple[float, float] | None,
) -> tuple[NDArray[np.float64], float | None, float | None]:
    t = np.asarray(test, dtype=np.float64)
    r = np.asarray(reference, dtype=np.float64)
    problems: list[str] = []
    for name, a in (("test", t), ("reference", r)):
        if a.ndim != 1:
            problems.append(f"{name}: expected a one-dimensional array, got shape {a.shape}")
        else:
            bad = np.flatnonzero(~np.isfinite(a))
            if bad.size:
                problems.append(f"{name}: entries {bad[:10].tolist()} are not finite numbers")
    if t.ndim == 1 and r.ndim == 1 and t.size != r.size:
        problems.append(f"reference: has {r.size} entries, test has {t.size}")
    if not (isinstance(confidence_level, float | int) and 0.0 < confidence_level < 1.0):
        problems.append(f"confidence_level: {confidence_level!r} is not between 0 and 1")
    limit_lower = limit_upper = None
    if limits is not None:
        limit_lower, limit_upper = (float(v) for v in limits)
        if not (math.isfinite(limit_lower) and math.isfinite(limit_upper)
                and limit_lower < limit_upper):
            problems.append(f"limits: {limits!r} must be finite with lower < upper")
    if problems:
        raise ValueError("; ".join(problems))
    return t - r, limit_lower, limit_upper


def _signed_rank_pmf(n: int) -> NDArray[np.float64]:
    """Exact null distribution of the signed-rank sum T+ on 0..n(n+1)/2 (Wilcoxon 1945)."""
    pmf = np.zeros(n * (n + 1) // 2 + 1)
    pmf[0] = 1.0
    for i in range(1, n + 1):
        # T+ gains rank i with probability ½: the subset-sum recursion, halved at each step
        shifted = np.zeros_like(pmf)
        shifted[i:] = pmf[:-i]
        pmf = 0.5 * (pmf + shifted)
    return pmf


def _select_pair_sum(x: NDArray[np.float64], k: int) -> float:
    """The k-th smallest x_i + x_j, i ≤ j, of sorted x without forming all sums.

    Row i holds x_i + x_j for j = i..n−1, ascending. Candidates for row i are columns
    [lo_i, hi_i); each round the pivot is the weighted median of the row medians, which removes
    at least a quarter of the candidates (Johnson & Mizoguchi 1978).
    """
    n = x.size
    rows = np.arange(n)
    lo = rows.copy()
    hi = np.full(n, n)
    while True:
        width = hi - lo
        total = int(width.sum())
        below = int(np.sum(lo - rows))               # sums known to lie below the answer
        if total <= 4 * n:
            cand_rows = np.repeat(rows, width)
            starts = np.repeat(np.cumsum(width) - width, width)
            cand_cols = np.repeat(lo, width) + (np.arange(total) - starts)
            sums = x[cand_rows] + x[cand_cols]
            return float(np.partition(sums, k - below - 1)[k - below - 1])
        live = np.flatnonzero(width > 0)
        medians = x[live] + x[lo[live] + (width[live] - 1) // 2]
        order = np.argsort(medians, kind="stable")
        cumulative = np.cumsum(width[live][order])
        pivot = float(medians[order][np.searchsorted(cumulative, total / 2.0)])
        lt = _first_reaching(x, lo, hi, pivot, strict=True)    # first column with sum ≥ pivot
        le = _first_reaching(x, lo, hi, pivot, strict=False)   # first column with sum > pivot
        n_lt = below + int(np.sum(lt - lo))
        n_le = below + int(np.sum(le - lo))
        if n_lt < k <= n_le:
            return pivot
        if k <= n_lt:
            hi = lt
        else:
            lo = le


def _first_reaching(
    x: NDArray[np.float64], lo: NDArray[np.intp], hi: NDArray[np.intp], pivot: float,
    *, strict: bool,
) -> NDArray[np.intp]:
    """Per row i, the first column j in [lo_i, hi_i) with x_i + x_j ≥ pivot (> if not strict).

    A vectorised bisection on the computed sums themselves, so the counts agree exactly with the
    sums that the final partition compares.
    """
    rows = np.arange(x.size)
    a, b = lo.copy(), hi.copy()
    while True:
        active = a < b
        if not active.any():
            return a
        mid = (a + b) // 2
        s = x[rows] + x[np.where(active, mid, 0)]
        below = (s < pivot) if strict else (s <= pivot)
        a = np.where(active & below, mid + 1, a)
        b = np.where(active & ~below, mid, b)
