"""Power of the two one-sided tests of average bioequivalence, exact and by shortcuts.

Model (normal theory on the log scale). A study of ``n`` subjects gives an estimate δ̂ of the
true log ratio δ = ln(μT/μR) with δ̂ ~ N(δ, σ²_δ), σ²_δ = b·σ²/n, and an independent residual
variance s² with ν·s²/σ² ~ χ²_ν. The design fixes the variance factor b and the df ν (see
:data:`DESIGNS` and the proofs there); σ² = ln(1 + CV²) for a log-normal CV.

The interval test (Schuirmann 1987) passes when the (1 − 2α) interval δ̂ ± t·ŝe, t = t_{1−α,ν},
ŝe = s·sqrt(b/n), lies within [ln θ₁, ln θ₂]. With x = s/σ (so that ŝe = x·σ_δ) and, given x,
δ̂ normal and independent of x:

    power = ∫₀^{x*} [Φ(a₂ − t·x) − Φ(a₁ + t·x)] f_ν(x) dx,                                 (1)

    a₁ = (ln θ₁ − δ)/σ_δ,  a₂ = (ln θ₂ − δ)/σ_δ,  x* = (a₂ − a₁)/(2t),
    f_ν(x) = 2·(ν/2)^{ν/2}/Γ(ν/2) · x^{ν−1} · exp(−ν·x²/2)   (the density of sqrt(χ²_ν/ν)).

The bracket is the conditional probability that both one-sided tests reject; it is positive exactly
for x < x*, where the interval is narrower than the limits. (1) is the difference of two of Owen's
Q functions (Owen 1965, Biometrika 52:437–446, the bivariate noncentral t), the form Phillips 1990
(J Pharmacokinet Biopharm 18:137–144) used for the power of the two one-sided tests. It is
computed here by Gauss–Legendre quadrature over the range where f_ν has mass (see
:func:`_chi_range`), with the density evaluated through Stirling's series so that large ν loses no
digits; the tests check it against scipy's quad on a second, independent integral to 1e-8.

Shortcuts (offered as method alternatives, never the default):
- ``noncentral_t``: P(T₁ ≥ t) + P(T₂ ≤ −t) − 1 with T₁, T₂ noncentral t (Bonferroni lower bound of
  the joint probability); equal to (1) integrated over all x > 0 instead of x < x*;
- ``shifted_t``: the noncentralities moved into central t distributions: F_ν(−a₁ − t) + F_ν(a₂ − t) − 1;
- ``normal``: the same with the normal distribution and z_{1−α}: Φ(−a₁ − z) + Φ(a₂ − z) − 1.
Each is clipped at 0.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cache

import numpy as np
from numpy.typing import NDArray
from scipy import special as spc
from scipy import stats as sps

METHODS = ("exact", "noncentral_t", "shifted_t", "normal")


@dataclass(frozen=True)
class Design:
    """A balanced design: its sequences (treatment letters by period; T test, R reference), the
    variance factor b with Var(δ̂) = b·σ²/n and the residual df ν = df_per_subject·n − df_lost."""

    name: str
    sequences: tuple[str, ...]
    variance_factor: float
    df_per_subject: int
    df_lost: int
    crossover: bool = True

    @property
    def periods(self) -> int:
        return len(self.sequences[0]) if self.crossover else 1

    def df(self, total: int) -> int:
        return self.df_per_subject * total - self.df_lost


# Fixed-effects model of a crossover, log y = subject + period + treatment + error, n subjects in
# equal sequences of m = n/s, within-subject variance σ² (no subject-by-treatment interaction).
# Residual df = n·p observations − n subject effects − (p − 1) periods − 1 treatment
#             = (p − 1)·n − p, when period and treatment are estimable within subjects.
# Variance factors, from contrasts c of one subject's values with c·1 = 0 (free of the subject):
#  two_by_two TR/RT: d = y₁ − y₂ has mean ±δ + (π₁ − π₂), variance 2σ²; δ̂ = (d̄_TR − d̄_RT)/2,
#    Var = (1/4)·2·2σ²/m = σ²/m = 2σ²/n: b = 2, ν = n − 2 (common practice).
#  full_replicate_4 TRTR/RTRT: I = (T₁ + T₂ − R₁ − R₂)/2, variance σ², mean δ ± (period contrast);
#    δ̂ = (Ī₁ + Ī₂)/2, Var = σ²/(2m) = σ²/n: b = 1, ν = 3n − 4.
#  full_replicate_3 TRT/RTR: I = (y₁ + y₃)/2 − y₂ (TRT) or y₂ − (y₁ + y₃)/2 (RTR), variance 1.5σ²,
#    mean δ ± ((π₁ + π₃)/2 − π₂); the other contrast y₁ − y₃ is uncorrelated with I and free of δ.
#    δ̂ = (Ī₁ + Ī₂)/2, Var = 1.5σ²/n: b = 1.5, ν = 2n − 3.
#  partial_replicate TRR/RTR/RRT: I = T − (R₁ + R₂)/2, variance 1.5σ², mean δ + a_k with
#    a_k = π_k − (sum of the other two periods)/2, Σ a_k = 0; δ̂ = mean of the three Ī_k,
#    Var = 1.5σ²/(3m) = 1.5σ²/n: b = 1.5, ν = 2n − 3. It is the least-squares estimate: the
#    R₁ − R₂ contrasts are uncorrelated with the Ī_k, and every zero-mean combination of the Ī_k
#    is a difference of them, uncorrelated with their mean (Gauss–Markov).
#  parallel, two groups of n/2: Var = σ²·(2/(n/2)) = 4σ²/n: b = 4, ν = n − 2 (pooled df; see
#    PARALLEL_DF_NOTE).
# The tests rebuild each design matrix and check b and ν by least squares.
DESIGNS: dict[str, Design] = {
    "two_by_two": Design("two_by_two", ("TR", "RT"), 2.0, 1, 2),
    "full_replicate_4": Design("full_replicate_4", ("TRTR", "RTRT"), 1.0, 3, 4),
    "full_replicate_3": Design("full_replicate_3", ("TRT", "RTR"), 1.5, 2, 3),
    "partial_replicate": Design("partial_replicate", ("TRR", "RTR", "RRT"), 1.5, 2, 3),
    "parallel": Design("parallel", ("T", "R"), 4.0, 1, 2, crossover=False),
}

PARALLEL_DF_NOTE = (
    "Parallel design: planned with the pooled-variance df n − 2. With equal groups the Welch "
    "standard error equals the pooled one, so the two analyses differ only in the df, which "
    "Welch's formula lowers at random; the pooled df is exact for a pooled analysis under the "
    "one CV assumed here, and slightly overstates the power of a Welch analysis in small studies."
)


def sigma_from_cv(cv: float) -> float:
    """σ = sqrt(ln(1 + CV²)), the log-scale SD of a log-normal variable with this CV."""
    return math.sqrt(math.log1p(cv * cv))


def design_power(
    design: Design, total: int, *, cv: float, ratio: float, limits: tuple[float, float],
    alpha: float, method: str = "exact",
) -> float:
    """Power of the interval test for ``total`` subjects in equal sequences (or groups).

    ``cv`` is the within-subject CV (crossover) or the total CV (parallel), as a fraction;
    ``ratio`` the true geometric mean ratio; ``limits`` the acceptance limits as ratios. Inputs
    are assumed valid (service.stats.planning checks them); the df must be ≥ 1."""
    sigma_delta = sigma_from_cv(cv) * math.sqrt(design.variance_factor / total)
    return tost_power(math.log(ratio), sigma_delta, design.df(total),
                      (math.log(limits[0]), math.log(limits[1])), alpha, method)


def tost_power(
    delta: float, sigma_delta: float, df: int, log_limits: tuple[float, float], alpha: float,
    method: str = "exact",
) -> float:
    """Power of the two one-sided tests at level ``alpha`` for δ̂ ~ N(delta, sigma_delta²) with an
    independent standard error on ``df`` degrees of freedom; eq. (1) of the module docstring."""
    if df < 1 or not sigma_delta > 0.0:
        raise ValueError(f"df: {df} must be ≥ 1 and sigma_delta: {sigma_delta!r} > 0")
    a1 = (log_limits[0] - delta) / sigma_delta
    a2 = (log_limits[1] - delta) / sigma_delta
    if method == "normal":
        z = float(spc.ndtri(1.0 - alpha))
        return _clip(float(spc.ndtr(-a1 - z) + spc.ndtr(a2 - z)) - 1.0)
    t = float(sps.t.ppf(1.0 - alpha, df))
    if method == "shifted_t":
        return _clip(float(spc.stdtr(df, -a1 - t) + spc.stdtr(df, a2 - t)) - 1.0)
    if method == "noncentral_t":
        # nct.sf(t, ν, −a₁) + nct.cdf(−t, ν, −a₂) − 1, integrated over x like (1) but without the
        # upper limit x*; scipy's nct returns nan at large noncentralities (e.g. ν = 3000, 30).
        return _clip(_integrate(a1, a2, t, df, math.inf))
    if method != "exact":
        raise ValueError(f"method: {method!r} is not one of {', '.join(METHODS)}")
    return _clip(_integrate(a1, a2, t, df, (a2 - a1) / (2.0 * t)))


def _integrate(a1: float, a2: float, t: float, df: int, x_star: float) -> float:
    """∫ [Φ(a₂ − t·x) − Φ(a₁ + t·x)] f_ν(x) dx over (0, x_star) ∩ the mass of f_ν."""
    lo, hi = _chi_range(df)
    hi = min(hi, x_star)
    if hi <= lo:
        return 0.0
    x, w = _nodes(lo, hi)
    integrand = (spc.ndtr(a2 - t * x) - spc.ndtr(a1 + t * x)) * np.exp(_log_chi_density(x, df))
    return float(np.dot(w, integrand))


# Tail mass left out on each side of f_ν: far below the 1e-10 the power is computed to.
_TAIL = 1e-18
_PANELS = 6
_NODES_PER_PANEL = 32


@cache
def _chi_range(df: int) -> tuple[float, float]:
    """x = sqrt(χ²_ν/ν) quantiles at _TAIL and 1 − _TAIL (regularised gamma inverses)."""
    half = df / 2.0
    lo = math.sqrt(float(spc.gammaincinv(half, _TAIL)) / half)
    hi = math.sqrt(float(spc.gammainccinv(half, _TAIL)) / half)
    return lo, hi


@cache
def _legendre() -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    nodes, weights = np.polynomial.legendre.leggauss(_NODES_PER_PANEL)
    return nodes, weights


def _nodes(lo: float, hi: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Composite Gauss–Legendre nodes and weights on [lo, hi] (_PANELS equal panels)."""
    u, v = _legendre()
    edges = np.linspace(lo, hi, _PANELS + 1)
    half = 0.5 * np.diff(edges)
    mid = 0.5 * (edges[:-1] + edges[1:])
    x = (mid[:, None] + half[:, None] * u[None, :]).ravel()
    w = (half[:, None] * v[None, :]).ravel()
    return x, w


_STIRLING_FROM = 10.0


def _log_chi_density(x: NDArray[np.float64], df: int) -> NDArray[np.float64]:
    """log f_ν(x) for x > 0, the density of sqrt(χ²_ν/ν).

    With z = ν/2: log f = log 2 + z·log z − lnΓ(z) + (2z − 1)·log x − z·x². For z ≥ 10, lnΓ by
    Stirling's series, lnΓ(z) = (z − ½)·log z − z + ½·log 2π + c(z), turns this into
    log 2 + ½·log(z/2π) − c(z) − log x − z·(y − log1p(y)), y = x² − 1, which keeps its digits
    when ν is in the thousands (the direct form cancels terms of size ν·log ν)."""
    z = df / 2.0
    if z < _STIRLING_FROM:
        return (math.log(2.0) + z * math.log(z) - float(spc.gammaln(z)) + (2.0 * z - 1.0) * np.log(x)
                - z * x * x)
    # Stirling's series for lnΓ (Abramowitz & Stegun 6.1.41); next term 1/(1188 z⁹) < 1e-12.
    c = 1.0 / (12 * z) - 1.0 / (360 * z**3) + 1.0 / (1260 * z**5) - 1.0 / (1680 * z**7)
    y = x * x - 1.0
    return math.log(2.0) + 0.5 * math.log(z / (2.0 * math.pi)) - c - np.log(x) - z * (y - np.log1p(y))


def _clip(p: float) -> float:
    return min(1.0, max(0.0, p))
