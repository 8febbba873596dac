"""Exact power of the two one-sided tests (service.stats.power)."""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate
from scipy import stats as sps

from service.stats.equivalence import average_bioequivalence
from service.stats.power import DESIGNS, _log_chi_density, design_power, sigma_from_cv, tost_power

LOG_LIMITS = (math.log(0.80), math.log(1.25))


def power_over_estimate(delta: float, sd: float, df: int, alpha: float) -> float:
    """Power as an integral over δ̂ instead of s: given δ̂, the interval lies within the limits iff
    s·sqrt(b/n) ≤ min(δ̂ − ln θ₁, ln θ₂ − δ̂)/t, a χ² probability (scipy.integrate.quad)."""
    t = float(sps.t.ppf(1.0 - alpha, df))
    lo, hi = LOG_LIMITS

    def conditional(d: float) -> float:
        x_max = min(d - lo, hi - d) / (t * sd)      # s/σ must not exceed this
        return float(sps.norm.pdf(d, delta, sd) * sps.chi2.cdf(df * x_max * x_max, df))

    mid = 0.5 * (lo + hi)
    total = 0.0
    for a, b in ((lo, mid), (mid, hi)):
        kink = [delta] if a < delta < b else None
        part, _ = integrate.quad(conditional, a, b, points=kink, epsabs=1e-14, epsrel=1e-12,
                                 limit=500)
        total += part
    return total


@pytest.mark.parametrize(("delta", "sd", "df", "alpha"), [
    (0.0, 0.1, 22, 0.05), (-0.05, 0.07, 10, 0.05), (0.15, 0.05, 200, 0.05), (0.2, 0.3, 2, 0.05),
    (-0.1, 0.02, 5000, 0.025), (0.05, 0.12, 1, 0.1), (0.01, 0.004, 30000, 0.05),
    (-0.2, 0.01, 68, 0.05), (0.0, 0.5, 40, 0.05),
])
def test_exact_power_matches_an_independent_integral(
    delta: float, sd: float, df: int, alpha: float,
) -> None:
    """Source: a second integral of the same probability, over the normal δ̂ with the χ² cdf of s²
    (scipy.integrate.quad, scipy.stats), written here; agreement to 1e-10 (the issue asks 1e-8)."""
    assert tost_power(delta, sd, df, LOG_LIMITS, alpha) == pytest.approx(
        power_over_estimate(delta, sd, df, alpha), abs=1e-10)


@pytest.mark.parametrize("df", [1, 3, 10, 45, 400])
def test_chi_density_matches_scipy(df: int) -> None:
    """Source: scipy.stats.chi — sqrt(χ²_ν/ν) has density sqrt(ν)·chi.pdf(x·sqrt(ν), ν)."""
    x = np.linspace(0.3, 2.5, 23)
    expected = math.sqrt(df) * sps.chi.pdf(x * math.sqrt(df), df)
    keep = expected > 1e-250
    np.testing.assert_allclose(np.exp(_log_chi_density(x, df))[keep], expected[keep], rtol=1e-11)


@pytest.mark.parametrize("df", [12, 25, 3000, 40000])
def test_chi_density_integrates_to_one(df: int) -> None:
    """Source: a density integrates to 1 (scipy.integrate.quad over ±40 standard deviations)."""
    sd = 1.0 / math.sqrt(2.0 * df)

    def density(x: float) -> float:
        return float(np.exp(_log_chi_density(np.array([x]), df))[0])

    value, _ = integrate.quad(density, max(1e-9, 1.0 - 40 * sd), 1.0 + 40 * sd, epsabs=1e-14,
                              epsrel=1e-13, limit=500, points=[1.0])
    assert value == pytest.approx(1.0, abs=1e-11)


@pytest.mark.parametrize(("delta", "sd", "df"), [(0.0, 0.1, 22), (-0.1, 0.08, 40), (0.05, 0.2, 8)])
def test_noncentral_t_shortcut_matches_scipy_nct(delta: float, sd: float, df: int) -> None:
    """Source: scipy.stats.nct — P(T₁ ≥ t) + P(T₂ ≤ −t) − 1 with noncentralities (δ − ln θᵢ)/σ_δ."""
    t = sps.t.ppf(0.95, df)
    expected = (sps.nct.sf(t, df, (delta - LOG_LIMITS[0]) / sd)
                + sps.nct.cdf(-t, df, (delta - LOG_LIMITS[1]) / sd) - 1.0)
    got = tost_power(delta, sd, df, LOG_LIMITS, 0.05, "noncentral_t")
    assert got == pytest.approx(max(0.0, expected), abs=1e-9)


@pytest.mark.parametrize(("delta", "sd", "df"), [(0.0, 0.1, 22), (-0.1, 0.08, 40)])
def test_shifted_t_and_normal_shortcuts(delta: float, sd: float, df: int) -> None:
    """Source: the textbook shortcuts written out with scipy.stats.t and scipy.stats.norm
    (common practice): F(−a₁ − t) + F(a₂ − t) − 1."""
    a1, a2 = (LOG_LIMITS[0] - delta) / sd, (LOG_LIMITS[1] - delta) / sd
    t, z = sps.t.ppf(0.95, df), sps.norm.ppf(0.95)
    assert tost_power(delta, sd, df, LOG_LIMITS, 0.05, "shifted_t") == pytest.approx(
        sps.t.cdf(-a1 - t, df) + sps.t.cdf(a2 - t, df) - 1.0, abs=1e-12)
    assert tost_power(delta, sd, df, LOG_LIMITS, 0.05, "normal") == pytest.approx(
        sps.norm.cdf(-a1 - z) + sps.norm.cdf(a2 - z) - 1.0, abs=1e-12)


def crossover_contrast(sequences: tuple[str, ...], m: int) -> tuple[float, int]:
    """n·Var(δ̂)/σ² and the residual df of the fixed-effects model subject + period + treatment,
    from its design matrix by least squares (numpy.linalg.pinv)."""
    p = len(sequences[0])
    n = len(sequences) * m
    rows = []
    for k, order in enumerate(sequences):
        for i in range(m):
            for period, treatment in enumerate(order):
                x = np.zeros(n + p)
                x[k * m + i] = 1.0
                if period:
                    x[n + period - 1] = 1.0
                x[n + p - 1] = 1.0 if treatment == "T" else 0.0
                rows.append(x)
    design = np.array(rows)
    rank = int(np.linalg.matrix_rank(design))
    covariance = np.linalg.pinv(design.T @ design)
    return float(covariance[-1, -1]) * n, design.shape[0] - rank


@pytest.mark.parametrize("name", ["two_by_two", "full_replicate_4", "full_replicate_3",
                                  "partial_replicate"])
@pytest.mark.parametrize("m", [4, 7])
def test_variance_factor_and_df_by_least_squares(name: str, m: int) -> None:
    """Source: least squares on the design matrix of the fixed-effects crossover model
    (numpy.linalg): the T − R contrast variance times n, and rows − rank."""
    d = DESIGNS[name]
    factor, df = crossover_contrast(d.sequences, m)
    n = len(d.sequences) * m
    assert factor == pytest.approx(d.variance_factor, rel=1e-10)
    assert df == d.df(n)


def test_parallel_variance_factor_and_df() -> None:
    """Source: least squares on a two-group design matrix (numpy.linalg): Var(δ̂)·n/σ² = 4, df n − 2."""
    n = 14
    design = np.column_stack([np.ones(n), np.r_[np.ones(n // 2), np.zeros(n // 2)]])
    factor = float(np.linalg.inv(design.T @ design)[1, 1]) * n
    d = DESIGNS["parallel"]
    assert factor == pytest.approx(d.variance_factor)
    assert n - np.linalg.matrix_rank(design) == d.df(n)


def simulate_two_by_two(rng: np.random.Generator, studies: int, m: int, sigma: float,
                        delta: float) -> np.ndarray:
    """Pass/fail of simulated TR/RT studies from raw log values, closed forms of the balanced 2×2:
    d = y₁ − y₂ per subject, δ̂ = (d̄_TR − d̄_RT)/2, s² = SS_within(d)/(2(n − 2)), se = sqrt(s²/m)."""
    effects = np.array([[delta, 0.0], [0.0, delta]])              # TR, RT by period
    period = np.array([0.0, 0.04])
    subject = rng.normal(0.0, 0.4, (studies, 2, m, 1))
    y = subject + period + effects[None, :, None, :] + rng.normal(0.0, sigma, (studies, 2, m, 2))
    d = y[..., 0] - y[..., 1]
    means = d.mean(axis=2)
    delta_hat = (means[:, 0] - means[:, 1]) / 2.0
    s2 = ((d - means[:, :, None]) ** 2).sum(axis=(1, 2)) / (2.0 * (2 * m - 2))
    se = np.sqrt(s2 / m)
    t = sps.t.ppf(0.95, 2 * m - 2)
    passed: np.ndarray = (delta_hat - t * se >= LOG_LIMITS[0]) & (delta_hat + t * se <= LOG_LIMITS[1])
    return passed


def simulate_full_replicate_4(rng: np.random.Generator, studies: int, m: int, sigma: float,
                              delta: float) -> np.ndarray:
    """Pass/fail of simulated TRTR/RTRT studies from raw log values. Closed form of the balanced
    fixed-effects model through orthonormal within-subject contrasts: I = (T₁ + T₂ − R₁ − R₂)/2
    (mean δ ± a period contrast, fitted by sequence), (y₁ − y₃)/√2 and (y₂ − y₄)/√2 (means free of
    the treatment, one each): RSS = SS_seq(I) + SS(y₁ − y₃)/2 + SS(y₂ − y₄)/2, df = 3n − 4, and
    δ̂ = mean of the sequence means of I with se = sqrt(s²/n)."""
    n = 2 * m
    effects = np.array([[delta, 0.0, delta, 0.0], [0.0, delta, 0.0, delta]])
    period = np.array([0.0, 0.03, -0.02, 0.05])
    subject = rng.normal(0.0, 0.4, (studies, 2, m, 1))
    y = subject + period + effects[None, :, None, :] + rng.normal(0.0, sigma, (studies, 2, m, 4))
    sign = np.array([1.0, -1.0])[None, :, None]
    i = sign * (y[..., 0] - y[..., 1] + y[..., 2] - y[..., 3]) / 2.0
    i_means = i.mean(axis=2)
    delta_hat = i_means.mean(axis=1)
    rss = ((i - i_means[:, :, None]) ** 2).sum(axis=(1, 2))
    for a, b in ((0, 2), (1, 3)):
        c = (y[..., a] - y[..., b]).reshape(studies, n) / math.sqrt(2.0)
        rss += ((c - c.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
    se = np.sqrt(rss / (3 * n - 4) / n)
    t = sps.t.ppf(0.95, 3 * n - 4)
    passed: np.ndarray = (delta_hat - t * se >= LOG_LIMITS[0]) & (delta_hat + t * se <= LOG_LIMITS[1])
    return passed


@pytest.mark.parametrize(("name", "simulate", "m", "cv", "ratio"), [
    ("two_by_two", simulate_two_by_two, 10, 0.25, 0.95),
    ("full_replicate_4", simulate_full_replicate_4, 6, 0.35, 0.93),
])
def test_exact_power_matches_simulated_raw_studies(
    name: str, simulate: Callable[..., np.ndarray], m: int, cv: float, ratio: float,
) -> None:
    """Source: Monte-Carlo simulation of 200 000 whole studies from raw log values (numpy),
    analysed by the closed forms of the balanced design; agreement within 4 Monte-Carlo SE."""
    rng = np.random.default_rng(20261211)
    studies, chunk = 200_000, 50_000
    passed = sum(int(np.count_nonzero(simulate(rng, chunk, m, sigma_from_cv(cv), math.log(ratio))))
                 for _ in range(studies // chunk))
    p_sim = passed / studies
    exact = design_power(DESIGNS[name], 2 * m, cv=cv, ratio=ratio, limits=(0.80, 1.25), alpha=0.05)
    assert 0.2 < exact < 0.95                      # a region where the check has teeth
    assert abs(p_sim - exact) <= 4.0 * math.sqrt(exact * (1.0 - exact) / studies)


@pytest.mark.parametrize(("name", "m", "cv", "ratio"), [
    ("full_replicate_4", 6, 0.35, 0.93), ("two_by_two", 10, 0.25, 0.95)])
def test_exact_power_matches_studies_analysed_by_the_project(
    name: str, m: int, cv: float, ratio: float,
) -> None:
    """Source: 3 000 simulated raw studies analysed by service.stats.equivalence.
    average_bioequivalence (the fixed-effects model fitted by least squares), unrounded bounds
    compared with 80–125 %; agreement within 4 Monte-Carlo SE."""
    d = DESIGNS[name]
    subjects, sequences, periods, treatments = [], [], [], []
    for k, order in enumerate(d.sequences):
        for i in range(m):
            for period, treatment in enumerate(order, start=1):
                subjects.append(f"S{k}{i:02d}")
                sequences.append(order)
                periods.append(period)
                treatments.append(treatment)
    is_test = np.array([t == "T" for t in treatments])
    subject_codes = np.repeat(np.arange(len(d.sequences) * m), d.periods)
    rng = np.random.default_rng(7)
    sigma, studies, passed = sigma_from_cv(cv), 3000, 0
    for _ in range(studies):
        log_y = (rng.normal(0.0, 0.4, len(d.sequences) * m)[subject_codes]
                 + 0.03 * np.array(periods) + math.log(ratio) * is_test
                 + rng.normal(0.0, sigma, is_test.size))
        a = average_bioequivalence(subjects=subjects, sequences=sequences, periods=periods,
                                   treatments=treatments, values=np.exp(log_y), test="T",
                                   reference="R")
        assert a.ratio_lower_percent is not None and a.ratio_upper_percent is not None
        passed += a.ratio_lower_percent >= 80.0 and a.ratio_upper_percent <= 125.0
    exact = design_power(d, len(d.sequences) * m, cv=cv, ratio=ratio, limits=(0.80, 1.25),
                         alpha=0.05)
    assert abs(passed / studies - exact) <= 4.0 * math.sqrt(exact * (1.0 - exact) / studies)


@given(name=st.sampled_from(sorted(DESIGNS)), cv=st.floats(0.03, 1.5),
       ratio=st.floats(0.82, 1.22), k=st.integers(6, 80), alpha=st.sampled_from([0.05, 0.025, 0.1]),
       grow=st.floats(1.001, 1.5))
@settings(max_examples=150, deadline=None)
def test_power_falls_with_cv_and_rises_with_n(
    name: str, cv: float, ratio: float, k: int, alpha: float, grow: float,
) -> None:
    """Source: a property of the interval test (Schuirmann 1987; common practice): with the true
    ratio inside the limits, power falls as the variability grows and rises with the sample size;
    and the noncentral-t shortcut (a Bonferroni lower bound) never exceeds the exact power.

    The rise with n holds where the power is not negligible: at power ~1e-6 it can dip (TRT/RTR,
    CV 100 %, n = 12 → 14: 7.6e-7 → 6.9e-7, confirmed by the independent integral above), since
    there only a lucky small s passes and larger studies make such an s rarer; a scan of all designs
    at n ≤ 60 found dips only below power 3.3e-4."""
    d = DESIGNS[name]
    n = k * len(d.sequences)

    def power(cv_: float, n_: int, method: str = "exact") -> float:
        return design_power(d, n_, cv=cv_, ratio=ratio, limits=(0.80, 1.25), alpha=alpha,
                            method=method)

    base = power(cv, n)
    assert 0.0 <= base <= 1.0
    assert power(cv * grow, n) <= base + 1e-12
    if base >= 1e-3:
        assert power(cv, n + len(d.sequences)) >= base - 1e-12
    assert power(cv, n, "noncentral_t") <= base + 1e-12
