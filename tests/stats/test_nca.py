from __future__ import annotations

import json
import math

import numpy as np
import pytest
from numpy.typing import NDArray
from scipy import stats as sps
from scipy.integrate import quad, trapezoid

from service.stats.nca import ProfileMetrics, profile_metrics, profile_metrics_to_json

A, KA, KE = 12.0, 1.4, 0.18


def one_compartment(t: NDArray[np.float64]) -> NDArray[np.float64]:
    """Oral one-compartment model C(t) = A(e^(−ke·t) − e^(−ka·t)) (textbook pharmacokinetics)."""
    return A * (np.exp(-KE * t) - np.exp(-KA * t))


def run(t: NDArray[np.float64], c: NDArray[np.float64], blq: NDArray[np.bool_] | None = None,
        **kwargs: object) -> ProfileMetrics:
    mask = np.zeros(t.size, dtype=bool) if blq is None else blq
    return profile_metrics(t, c, mask, **kwargs)  # type: ignore[arg-type]


def test_dense_one_compartment_converges_to_closed_forms() -> None:
    """Source: one-compartment oral model (textbook pharmacokinetics): AUC0–∞ = A(1/ke − 1/ka),
    tmax = ln(ka/ke)/(ka − ke), Cmax = C(tmax). Tolerances for a 0.01 h grid to 120 h: AUC
    relative 1e-5 (trapezoid error O(h²)), tmax within half a grid step, Cmax relative 1e-6,
    λz = ke relative 1e-3; AUC0–tlast also against scipy.integrate.quad."""
    t = np.round(np.arange(0.0, 120.0 + 1e-9, 0.01), 10)
    m = run(t, one_compartment(t))
    tmax_true = math.log(KA / KE) / (KA - KE)
    assert m.auc_0_inf == pytest.approx(A * (1 / KE - 1 / KA), rel=1e-5)
    assert m.tmax is not None and abs(m.tmax - tmax_true) <= 0.005 + 1e-12
    assert m.cmax == pytest.approx(float(one_compartment(np.array([tmax_true]))[0]), rel=1e-6)
    # Loose on purpose: the 1e-4 adjusted-R² preference for more points admits early tail points
    # that still carry a trace of the absorption term.
    assert m.lambda_z == pytest.approx(KE, rel=1e-3)
    exact_0_t, _ = quad(lambda x: float(one_compartment(np.array([x]))[0]), 0.0, 120.0,
                        limit=200)
    assert m.auc_0_t == pytest.approx(exact_0_t, rel=1e-5)  # scipy.integrate.quad


def test_log_down_trapezoid_is_exact_on_a_mono_exponential() -> None:
    """Source: closed form ∫ C0·e^(−kt) dt = C0(1 − e^(−kT))/k, and ∫0^∞ = C0/k; the log
    trapezoid is exact on an exponential segment (Yeh & Kwan 1978)."""
    c0, k = 40.0, 0.35
    t = np.array([0.0, 0.5, 1.5, 4.0, 7.0, 12.0, 24.0])
    m = run(t, c0 * np.exp(-k * t))
    assert m.auc_0_t == pytest.approx(c0 * (1 - math.exp(-k * 24.0)) / k, rel=1e-12)
    assert m.auc_0_inf == pytest.approx(c0 / k, rel=1e-10)
    linear = run(t, c0 * np.exp(-k * t), auc_method="linear")
    assert linear.auc_0_t is not None and m.auc_0_t is not None
    assert linear.auc_0_t > m.auc_0_t  # chords lie above a convex curve (Jensen), not exact


def test_linear_trapezoid_equals_scipy() -> None:
    """Source: scipy.integrate.trapezoid on the same points (seeded random profile)."""
    rng = np.random.default_rng(41)
    t = np.concatenate(([0.0], np.cumsum(rng.uniform(0.2, 3.0, size=14))))
    c = np.concatenate(([0.0], rng.lognormal(1.0, 0.6, size=14)))
    m = run(t, c, auc_method="linear")
    assert m.auc_0_t == pytest.approx(trapezoid(c, t), rel=1e-13)


def test_lambda_z_recovers_exponential_tail() -> None:
    """Source: ln C = ln C0 − ke·t is linear; least squares (cross-checked with
    scipy.stats.linregress) recovers ke exactly; half-life = ln 2 / ke."""
    ke = 0.23
    t = np.array([0.0, 0.5, 1.0, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0, 24.0])
    c = np.where(t <= 1.0, [0.0, 30.0, 55.0] + [0.0] * 8, 120.0 * np.exp(-ke * t))
    m = run(t, c)
    assert m.tmax == 2.0
    assert m.lambda_z == pytest.approx(ke, rel=1e-10)
    assert m.half_life == pytest.approx(math.log(2) / ke, rel=1e-10)
    assert m.lambda_z_intercept == pytest.approx(math.log(120.0), rel=1e-10)
    assert m.lambda_z_times == tuple(float(v) for v in t[t > 2.0])
    assert m.r2_adjusted == pytest.approx(1.0, abs=1e-12)


def test_lambda_z_selection_matches_linregress_on_noisy_tail() -> None:
    """Source: scipy.stats.linregress on the chosen terminal points gives the same slope and
    intercept; adjusted R² = 1 − (1 − r²)(n − 1)/(n − 2) (standard regression identity)."""
    rng = np.random.default_rng(5)
    t = np.array([0.0, 0.25, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0, 24.0, 36.0])
    c = one_compartment(t) * rng.lognormal(0.0, 0.08, size=t.size)
    m = run(t, c)
    assert m.lambda_z is not None and m.r2_adjusted is not None
    chosen = np.isin(t, m.lambda_z_times)
    fit = sps.linregress(t[chosen], np.log(c[chosen]))
    n = int(chosen.sum())
    assert n >= 3 and t[chosen].min() > (m.tmax or 0.0)
    assert m.lambda_z == pytest.approx(-fit.slope, rel=1e-9)
    assert m.lambda_z_intercept == pytest.approx(fit.intercept, rel=1e-9)
    assert m.r2_adjusted == pytest.approx(1 - (1 - fit.rvalue**2) * (n - 1) / (n - 2), rel=1e-9)
    # No other candidate count beats the chosen one by more than the 1e-4 tolerance.
    after = t > (m.tmax or 0.0)
    tail_t, tail_c = t[after], c[after]
    for k in range(3, tail_t.size + 1):
        f = sps.linregress(tail_t[-k:], np.log(tail_c[-k:]))
        if f.slope < 0:
            r2a = 1 - (1 - f.rvalue**2) * (k - 1) / (k - 2)
            assert r2a <= m.r2_adjusted + 1e-4 + 1e-12


@pytest.mark.parametrize("rule", ["exclude", "zero"])
def test_below_lloq_rules(rule: str) -> None:
    """Source: common practice BLQ handling — before the first measurable value BLQ counts as 0;
    after it, left out or 0; AUC checked with scipy.integrate.trapezoid on the expected points."""
    t = np.array([0.0, 0.5, 1.0, 2.0, 4.0, 6.0, 8.0, 12.0])
    c = np.array([np.nan, 0.03, 5.0, 9.0, 0.02, 4.0, 2.0, np.nan])
    blq = np.array([True, False, False, False, False, False, False, True])
    m = run(t, c, blq, lloq=0.05, auc_method="linear", below_lloq_after_first=rule)
    if rule == "exclude":
        keep = np.array([True, True, True, True, False, True, True, False])
        expected_c = np.array([0.0, 0.0, 5.0, 9.0, 0.0, 4.0, 2.0, 0.0])
    else:
        keep = np.array([True, True, True, True, True, True, True, False])  # ends at Tlast 8 h
        expected_c = np.array([0.0, 0.0, 5.0, 9.0, 0.0, 4.0, 2.0, 0.0])
    assert m.tlast == 8.0 and m.clast == 2.0 and m.cmax == 9.0 and m.tmax == 2.0
    assert m.auc_0_t == pytest.approx(trapezoid(expected_c[keep], t[keep]), rel=1e-13)
    assert [p.used for p in m.points] == keep.tolist()
    assert m.points[0].concentration == 0.0 and m.points[1].concentration == 0.0
    assert (m.points[4].concentration is None) == (rule == "exclude")
    json.dumps(profile_metrics_to_json(m), allow_nan=False)


def test_baseline_correction_recovers_the_added_curve() -> None:
    """Source: identity — a constant endogenous level B added to a profile and subtracted again
    from its pre-dose mean leaves the metrics of the profile itself; the 5 %-of-Cmax pre-dose
    check (EMA CPMP/EWP/QWP/1401/98 Rev.1, 2010 — from memory) fires only without correction."""
    t = np.array([-1.0, 0.0, 0.5, 1.0, 2.0, 3.0, 5.0, 8.0, 12.0, 24.0])
    exogenous = np.where(t <= 0, 0.0, one_compartment(np.clip(t, 0.0, None)))
    level = 3.0
    plain = run(t, exogenous)
    corrected = run(t, exogenous + level, baseline_correction=True)
    assert corrected.baseline == pytest.approx(level, rel=1e-12)
    for name in ("cmax", "tmax", "auc_0_t", "auc_0_inf", "lambda_z"):
        assert getattr(corrected, name) == pytest.approx(getattr(plain, name), rel=1e-10), name
    assert "predose_above_5_percent" not in corrected.flags
    uncorrected = run(t, exogenous + level)
    assert "predose_above_5_percent" in uncorrected.flags
    small = exogenous.copy()
    small[0] = 0.04 * float(np.max(exogenous))
    assert "predose_above_5_percent" not in run(t, small).flags
    small[0] = 0.06 * float(np.max(exogenous))
    assert "predose_above_5_percent" in run(t, small).flags


def test_extrapolated_flag_and_percent() -> None:
    """Source: % extrapolated = 100·(Clast/λz)/AUC0–∞ with the 20 % threshold (common practice;
    EMA 2010 — from memory)."""
    t = np.array([0.0, 0.5, 1.0, 2.0, 3.0, 4.0, 5.0])
    m = run(t, one_compartment(t))
    assert m.lambda_z is not None and m.clast is not None and m.auc_0_inf is not None
    share = 100 * (m.clast / m.lambda_z) / m.auc_0_inf
    assert m.auc_extrapolated_percent == pytest.approx(share, rel=1e-12)
    assert share > 20 and "extrapolated_above_20_percent" in m.flags
    long = np.array([0.0, 0.5, 1.0, 2.0, 4.0, 8.0, 12.0, 24.0, 36.0, 48.0])
    assert "extrapolated_above_20_percent" not in run(long, one_compartment(long)).flags


def test_missing_dose_sample_counts_as_zero() -> None:
    """Source: common practice for extravascular doses — with no sample at time 0 the
    concentration at dosing is taken as 0; checked with scipy.integrate.trapezoid."""
    t = np.array([0.5, 1.0, 2.0, 4.0, 8.0])
    c = np.array([4.0, 7.0, 6.0, 3.0, 1.0])
    m = run(t, c, auc_method="linear")
    assert m.auc_0_t == pytest.approx(trapezoid(np.r_[0.0, c], np.r_[0.0, t]), rel=1e-13)
    assert "concentration_at_dose_imputed" in m.flags


@pytest.mark.parametrize(
    ("t", "c", "blq", "flag"),
    [
        ([0.0, 1.0, 2.0, 4.0], [0.0, 0.0, 0.0, 0.0], None, "no_measurable_concentration"),
        ([0.0, 1.0, 2.0], [0.0, 0.0, 0.0], [True, True, True], "no_measurable_concentration"),
        ([0.0, 1.0, 2.0, 4.0, 6.0], [0.0, 3.0, 8.0, 5.0, 2.0], None, "lambda_z_too_few_points"),
        ([0.0, 1.0, 2.0, 4.0, 6.0, 8.0], [0.0, 9.0, 3.0, 4.0, 5.0, 6.0], None,
         "lambda_z_not_positive"),
    ],
)
def test_degenerate_profiles_give_none_and_a_flag(
    t: list[float], c: list[float], blq: list[bool] | None, flag: str,
) -> None:
    """Source: DESIGN.md contract — a figure that cannot be computed is null with a code, and
    JSON carries no NaN (RFC 8259); λz needs at least 3 points after Tmax (common practice)."""
    mask = None if blq is None else np.array(blq)
    m = run(np.array(t), np.array(c, dtype=np.float64), mask)
    assert flag in m.flags
    assert m.lambda_z is None and m.half_life is None and m.auc_0_inf is None
    doc = json.loads(json.dumps(profile_metrics_to_json(m), allow_nan=False))
    assert doc["lambda_z"] is None and flag in doc["flags"]
    assert set(doc) >= {"cmax", "tmax", "auc_0_t", "auc_0_inf", "lambda_z", "half_life",
                        "r2_adjusted", "lambda_z_times", "auc_extrapolated_percent", "flags",
                        "clast", "tlast", "lambda_z_intercept", "points"}


def test_bad_input_names_the_field() -> None:
    """Source: DESIGN.md — bad input gets an error naming the field and the problem."""
    t = np.array([0.0, 1.0, 2.0])
    ok = np.array([0.0, 2.0, 1.0])
    no = np.zeros(3, dtype=bool)
    with pytest.raises(ValueError, match="times: must be strictly increasing"):
        profile_metrics(np.array([0.0, 2.0, 2.0]), ok, no)
    with pytest.raises(ValueError, match=r"concentrations: entries \[1\]"):
        profile_metrics(t, np.array([0.0, -1.0, 1.0]), no)
    with pytest.raises(ValueError, match="auc_method"):
        profile_metrics(t, ok, no, auc_method="spline")
    with pytest.raises(ValueError, match="below_lloq_after_first"):
        profile_metrics(t, ok, no, below_lloq_after_first="half")
    with pytest.raises(ValueError, match="baseline_correction"):
        profile_metrics(np.array([0.5, 1.0, 2.0]), ok, no, baseline_correction=True)
    with pytest.raises(ValueError, match="lloq"):
        profile_metrics(t, ok, no, lloq=-1.0)
