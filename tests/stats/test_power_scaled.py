"""Power under scaled limits by simulation of sufficient statistics (service.stats.power_scaled)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as sps

from service.stats.power import DESIGNS, design_power, sigma_from_cv
from service.stats.power_scaled import (
    _layout,
    _standard_draws,
    full_model_df,
    reference_df,
    simulated_power,
)

LN125 = math.log(1.25)
THETA = (math.log(1.25) / 0.25) ** 2          # FDA progesterone draft guidance 2011


def raw_design(sequences: tuple[str, ...], m: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rows in (sequence, subject, period) order: subject index, period index, is-test flag."""
    p = len(sequences[0])
    subject = np.repeat(np.arange(len(sequences) * m), p)
    period = np.tile(np.arange(p), len(sequences) * m)
    is_test = np.array([order[j] == "T" for order in sequences for _ in range(m) for j in range(p)])
    return subject, period, is_test


def least_squares(subject: np.ndarray, period: np.ndarray, extra: list[np.ndarray]
                  ) -> tuple[np.ndarray, np.ndarray, int]:
    """Subject dummies + period dummies (+ extra columns): pseudo-inverse, residual maker, df."""
    n_subj, p = int(subject.max()) + 1, int(period.max()) + 1
    columns = [(subject == i).astype(float) for i in range(n_subj)]
    columns += [(period == j).astype(float) for j in range(1, p)] + extra
    x = np.column_stack(columns)
    pinv = np.linalg.pinv(x)
    residual = np.eye(x.shape[0]) - x @ pinv
    return pinv, residual, x.shape[0] - int(np.linalg.matrix_rank(x))


@pytest.mark.parametrize("name", ["full_replicate_4", "full_replicate_3", "partial_replicate"])
@pytest.mark.parametrize("m", [6, 9])
def test_degrees_of_freedom_by_least_squares(name: str, m: int) -> None:
    """Source: least squares on the raw design matrices (numpy.linalg): rows − rank of the
    fixed-effects model and of the reference-only model (subject + period on R values); for D on
    sequence, subjects with two R values − sequences holding them (FDA progesterone draft 2011)."""
    d = DESIGNS[name]
    subject, period, is_test = raw_design(d.sequences, m)
    n = len(d.sequences) * m
    assert least_squares(subject, period, [is_test.astype(float)])[2] == full_model_df(d, n) == d.df(n)
    r = ~is_test
    _, _, df_r = least_squares(np.unique(subject[r], return_inverse=True)[1], period[r], [])
    assert reference_df(d, n, "widened_limits") == df_r
    with_two = [k for k, order in enumerate(d.sequences) if order.count("R") == 2]
    assert reference_df(d, n, "reference_scaled") == len(with_two) * m - len(with_two)


def test_reference_df_formulas() -> None:
    """Source: the df stated for s²_wR in the planning issue (FDA progesterone draft guidance 2011,
    D regressed on sequence): full replicate 4-period n − 2; 3-period designs: subjects with two R
    values minus sequences."""
    assert reference_df(DESIGNS["full_replicate_4"], 24, "reference_scaled") == 22
    assert reference_df(DESIGNS["full_replicate_3"], 24, "reference_scaled") == 11
    assert reference_df(DESIGNS["partial_replicate"], 24, "reference_scaled") == 21
    assert reference_df(DESIGNS["partial_replicate"], 24, "widened_limits") == 22


def test_bartlett_draws_have_wishart_moments() -> None:
    """Source: scipy.stats.wishart mean and variance of Wishart_p(df, I) (E S = df·I,
    Var S_ii = 2·df, Var S_ij = df); 4 standard errors of the sample moments."""
    lay = _layout(DESIGNS["full_replicate_4"].sequences)
    m, size = 8, 200_000
    z, w = _standard_draws(np.random.default_rng(3), size, lay, m)
    sample = w[:, 0]
    reference = sps.wishart(df=m - 1, scale=np.eye(4))
    se_mean = np.sqrt(reference.var() / size)
    assert np.all(np.abs(sample.mean(axis=0) - reference.mean()) <= 4 * se_mean)
    assert np.allclose(sample.var(axis=0), reference.var(), rtol=0.03)
    assert abs(float(z.mean())) < 4 / math.sqrt(z.size) and abs(float(z.var()) - 1.0) < 0.01


@pytest.mark.parametrize(("name", "n", "cv", "ratio"), [
    ("full_replicate_4", 12, 0.35, 0.93), ("full_replicate_3", 18, 0.3, 0.95),
    ("partial_replicate", 18, 0.3, 0.95), ("two_by_two", 20, 0.25, 0.95)])
def test_unscaled_simulation_matches_exact_power(name: str, n: int, cv: float, ratio: float) -> None:
    """Source: the exact power integral (Owen 1965 form, service.stats.power, itself checked
    against an independent integral and raw-data simulation); 4 Monte-Carlo SE."""
    d = DESIGNS[name]
    sim = simulated_power(d, n, [(ratio, cv, cv)], approach="none", alpha=0.05,
                          simulations=100_000, seed=11)[0]
    exact = design_power(d, n, cv=cv, ratio=ratio, limits=(0.80, 1.25), alpha=0.05)
    assert abs(sim.power - exact) <= 4 * math.sqrt(exact * (1 - exact) / sim.simulations)


def simulate_raw(name: str, m: int, cv_t: float, cv_r: float, ratio: float, approach: str,
                 studies: int, seed: int) -> float:
    """Fraction of raw-data studies that pass, analysed as the guidance texts describe.

    Log values = subject (SD 0.5) + period + log ratio on T + error (SD σ_wT or σ_wR). Fixed-effects
    model on all data and the reference-only model by least squares on the design matrix; I and D
    per subject by sequence means. widened_limits: EMA 2010 §4.1.10; reference_scaled: FDA
    progesterone draft guidance 2011 with Howe's upper bound (Hyslop, Hsuan & Holder 2000)."""
    d = DESIGNS[name]
    s, p = len(d.sequences), d.periods
    n = s * m
    subject, period, is_test = raw_design(d.sequences, m)
    pinv, resid, df = least_squares(subject, period, [is_test.astype(float)])
    r_rows = np.flatnonzero(~is_test)
    _, resid_r, df_r = least_squares(np.unique(subject[r_rows], return_inverse=True)[1],
                                     period[r_rows], [])
    sigma = np.where(is_test, sigma_from_cv(cv_t), sigma_from_cv(cv_r))
    t_full, t_i = sps.t.ppf(0.95, df), sps.t.ppf(0.95, n - s)
    se_factor = float(np.sum(pinv[-1] ** 2))
    rng = np.random.default_rng(seed)
    passed = 0
    for _ in range(studies // 20_000):
        y = (rng.normal(0.0, 0.5, (20_000, n))[:, subject] + 0.04 * period
             + math.log(ratio) * is_test + rng.normal(0.0, 1.0, (20_000, n * p)) * sigma)
        delta = y @ pinv[-1]
        e = y @ resid
        se = np.sqrt((e * e).sum(axis=1) / df * se_factor)
        lower, upper = delta - t_full * se, delta + t_full * se
        pe_ok = np.abs(delta) <= LN125
        if approach == "widened_limits":
            e_r = y[:, r_rows] @ resid_r
            s2_wr = (e_r * e_r).sum(axis=1) / df_r
            limit = np.where(np.sqrt(np.expm1(s2_wr)) <= 0.30, LN125,
                             0.760 * np.minimum(np.sqrt(s2_wr), math.sqrt(math.log(1.25))))
            ok = (lower >= -limit) & (upper <= limit) & pe_ok
        else:
            cube = y.reshape(20_000, s, m, p)
            t_mask = np.array([[c == "T" for c in order] for order in d.sequences])[:, None, :]
            i = ((cube * t_mask).sum(-1) / t_mask.sum(-1)
                 - (cube * ~t_mask).sum(-1) / (~t_mask).sum(-1))
            i_means = i.mean(axis=2)
            delta_i = i_means.mean(axis=1)
            s2_i = ((i - i_means[..., None]) ** 2).sum(axis=(1, 2)) / (n - s)
            s2_delta = s2_i / n
            two = [k for k, order in enumerate(d.sequences) if order.count("R") == 2]
            ss_d = np.zeros(20_000)
            for k in two:
                first, second = [j for j, c in enumerate(d.sequences[k]) if c == "R"]
                diff = cube[:, k, :, first] - cube[:, k, :, second]
                ss_d += ((diff - diff.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
            df_d = len(two) * (m - 1)
            s2_wr = ss_d / (2 * df_d)
            x = delta_i**2 - s2_delta
            x_u = (np.abs(delta_i) + t_i * np.sqrt(s2_delta)) ** 2
            y_lin = -THETA * s2_wr
            y_u = -THETA * s2_wr * df_d / sps.chi2.ppf(0.95, df_d)
            bound = x + y_lin + np.sqrt((x_u - x) ** 2 + (y_u - y_lin) ** 2)
            scaled = (bound <= 0) & (np.abs(delta_i) <= LN125)
            unscaled = (lower >= -LN125) & (upper <= LN125)
            ok = np.where(np.sqrt(s2_wr) < 0.294, unscaled, scaled)
        passed += int(np.count_nonzero(ok))
    return passed / studies


@pytest.mark.parametrize(("name", "m", "cv_t", "cv_r", "ratio", "approach"), [
    ("full_replicate_3", 9, 0.35, 0.50, 0.92, "widened_limits"),
    ("partial_replicate", 8, 0.30, 0.45, 0.92, "widened_limits"),
    ("partial_replicate", 6, 0.30, 0.40, 0.92, "reference_scaled"),
    ("full_replicate_4", 8, 0.40, 0.32, 0.95, "reference_scaled"),
])
def test_scaled_simulation_matches_raw_data_studies(
    name: str, m: int, cv_t: float, cv_r: float, ratio: float, approach: str,
) -> None:
    """Source: 60 000 raw-data studies per case analysed here by least squares and the decision
    rules of EMA 2010 §4.1.10 or the FDA progesterone draft guidance 2011 (numpy, scipy.stats);
    agreement within 4 combined Monte-Carlo SE. Unequal CV_wT and CV_wR on purpose."""
    d = DESIGNS[name]
    n = len(d.sequences) * m
    raw = simulate_raw(name, m, cv_t, cv_r, ratio, approach, 60_000, seed=5)
    sim = simulated_power(d, n, [(ratio, cv_t, cv_r)], approach=approach, alpha=0.05,
                          simulations=100_000, seed=9)[0]
    assert 0.2 < sim.power < 0.95
    se = math.sqrt(sim.power * (1 - sim.power) * (1 / 60_000 + 1 / 100_000))
    assert abs(raw - sim.power) <= 4 * se


def test_seeded_simulation_is_reproducible_and_reports_its_standard_error() -> None:
    """Source: the binomial standard error sqrt(p(1 − p)/N) of a fraction of N independent studies
    (common practice); the same seed must repeat every number, another seed must not."""
    d = DESIGNS["full_replicate_4"]
    points = [(0.9, 0.45, 0.45), (0.95, 0.5, 0.5)]
    first = simulated_power(d, 24, points, approach="widened_limits", alpha=0.05,
                            simulations=30_001, seed=123)
    again = simulated_power(d, 24, points, approach="widened_limits", alpha=0.05,
                            simulations=30_001, seed=123)
    other = simulated_power(d, 24, points, approach="widened_limits", alpha=0.05,
                            simulations=30_001, seed=124)
    assert first == again
    assert first != other
    for result in first:
        assert result.power == result.passes / 30_001
        assert result.standard_error == pytest.approx(
            math.sqrt(result.power * (1 - result.power) / 30_001), rel=1e-12)
