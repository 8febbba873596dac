"""The few distribution functions the engine needs, straight from scipy.special.

scipy.stats computes these same functions by calling scipy.special (its t, F, χ² and normal
classes delegate to stdtrit, stdtr, fdtrc, gammaincinv, ndtri and ndtr), but importing
scipy.stats costs about half a second of start-up; the numbers are the same to the last bit
(tests/stats/test_distributions.py compares them with scipy.stats).
"""

from __future__ import annotations

from scipy import special


def t_ppf(q: float, df: float) -> float:
    return float(special.stdtrit(df, q))


def t_cdf(x: float, df: float) -> float:
    return float(special.stdtr(df, x))


def t_sf(x: float, df: float) -> float:
    return float(special.stdtr(df, -x))


def f_sf(x: float, df_numerator: float, df_denominator: float) -> float:
    return float(special.fdtrc(df_numerator, df_denominator, x))


def chi2_ppf(q: float, df: float) -> float:
    return float(2.0 * special.gammaincinv(df / 2.0, q))


def norm_ppf(q: float) -> float:
    return float(special.ndtri(q))


def norm_cdf(x: float) -> float:
    return float(special.ndtr(x))
