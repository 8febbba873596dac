"""The smallest balanced study that reaches a target power; enrolment after dropouts; curve points;
the upper confidence limit of a CV taken from an earlier study."""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from fractions import Fraction

from scipy import stats as sps

MINIMUM_TOTAL = 12   # evaluable subjects, EMA 2010 (CPMP/EWP/QWP/1401/98 Rev.1) §4.1.3
CV_FACTORS = (0.7, 0.8, 0.9, 1.0, 1.1, 1.2, 1.3)
RATIO_OFFSETS = (-0.075, -0.05, -0.025, 0.0, 0.025, 0.05, 0.075)


@dataclass(frozen=True)
class SearchResult:
    total: int | None                 # None: no balanced total up to the cap reaches the target
    power: float                      # at ``total``, or at the largest total tried (the cap)
    largest_tried: int
    minimum_applies: bool             # the floor itself already reaches the target
    evaluations: int


def smallest_total(
    power_at: Callable[[int], float], *, step: int, target: float, cap: int,
    floor: int = MINIMUM_TOTAL,
) -> SearchResult:
    """The smallest multiple of ``step``, at least ``floor`` and at most ``cap``, whose power is
    ≥ ``target``.

    Doubling from the floor brackets the answer, then bisection over the multiples of ``step``
    narrows it to a failing total and a passing one ``step`` apart. This assumes the power rises
    with the total, as the interval test's does wherever it is not negligible (the property tests
    check it for the exact power above 1e-3; far below any target it can dip); a simulated power
    is evaluated with the same seed at every total."""
    first = _round_up(floor, step)
    last = (cap // step) * step
    if last < first:
        raise ValueError(f"cap: {cap} is below the smallest balanced total {first}")
    seen: dict[int, float] = {}

    def power(n: int) -> float:
        if n not in seen:
            seen[n] = power_at(n)
        return seen[n]

    if power(first) >= target:
        return SearchResult(first, seen[first], first, True, len(seen))
    failing, passing = first, None
    candidate = first
    while passing is None:
        candidate = min(last, _round_up(2 * candidate, step))
        if power(candidate) >= target:
            passing = candidate
        elif candidate == last:
            return SearchResult(None, seen[last], last, False, len(seen))
        else:
            failing = candidate
    while passing - failing > step:
        middle = failing + step * ((passing - failing) // step // 2)
        if power(middle) >= target:
            passing = middle
        else:
            failing = middle
    return SearchResult(passing, seen[passing], max(seen), False, len(seen))


def enrolment(total: int, dropout_rate: float, step: int) -> int:
    """The smallest multiple of ``step`` that still leaves ``total`` subjects after the expected
    dropouts: E·(1 − d) ≥ total. The rate is read from its shortest decimal form, so 0.2 means 1/5
    and 20 subjects at 20 % need exactly 25 (then 26 to keep two sequences equal)."""
    keep = 1 - Fraction(repr(float(dropout_rate)))
    return _round_up(math.ceil(Fraction(total) / keep), step)


def curve_points(
    cv: float, ratio: float, limits: tuple[float, float],
) -> list[tuple[float, float]]:
    """(cv, ratio) points around the plan: the CV times 0.7 … 1.3 at the planned ratio, then the
    ratio ± 0.025, 0.05, 0.075 at the planned CV, kept strictly inside the limits. The planned point
    appears once, in the CV sweep."""
    points = [(round(cv * f, 10), ratio) for f in CV_FACTORS]
    for offset in RATIO_OFFSETS:
        r = round(ratio + offset, 10)
        if offset != 0.0 and limits[0] < r < limits[1]:
            points.append((cv, r))
    return points


@dataclass(frozen=True)
class CvUpperLimit:
    cv: float
    df: int
    level: float
    cv_upper: float | None            # None when exp(s²_upper) overflows
    s2: float
    s2_upper: float | None


def cv_upper_limit(cv: float, df: int, level: float = 0.80) -> CvUpperLimit:
    """One-sided upper ``level`` confidence limit of a within-subject CV estimated on ``df``.

    From ν·s²/σ² ~ χ²_ν: σ² ≤ ν·s²/χ²_{1−level,ν} with probability ``level``, the quantile taken in
    the lower tail (the χ² confidence bound of a normal variance; common practice when planning from
    an earlier study), and CV = sqrt(exp(s²) − 1). Inputs are assumed valid
    (service.stats.planning.plan_cv_upper_limit checks them)."""
    s2 = math.log1p(cv * cv)
    s2_upper = df * s2 / float(sps.chi2.ppf(1.0 - level, df))
    if not math.isfinite(s2_upper):
        return CvUpperLimit(cv, df, level, None, s2, None)
    cv_upper = math.sqrt(math.expm1(s2_upper)) if s2_upper < 700.0 else None
    return CvUpperLimit(cv, df, level, cv_upper, s2, s2_upper)


def _round_up(n: int, step: int) -> int:
    return -(-n // step) * step
