from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import stats as sps

from service.stats.scaling import (
    SCALING_CAUTION,
    THETA,
    no_scaling,
    reference_scaled_acceptance,
    reference_scaled_bound,
    scaled_acceptance_to_json,
    widened_limits_acceptance,
    widened_limits_percent,
)


def s_wr_for_cv(cv_percent: float) -> float:
    """Log-scale SD of a log-normal with this CV: sqrt(ln(1 + CV²)) (log-normal identity)."""
    return math.sqrt(math.log1p((cv_percent / 100.0) ** 2))


def replicate_study(
    seed: int, orders: dict[str, int], *, log_ratio: float, s_wr: float, s_wt: float,
    period_effects: tuple[float, ...] = (0.0, 0.04, -0.03, 0.02),
) -> pd.DataFrame:
    """Long-form replicate-design data from a seeded log-normal model (constructed for the test)."""
    rng = np.random.default_rng(seed)
    rows: list[dict[str, Any]] = []
    number = 0
    for sequence, n in orders.items():
        for _ in range(n):
            number += 1
            subject_effect = rng.normal(0.0, 0.4)
            for period, treatment in enumerate(sequence, start=1):
                mean = 3.0 + subject_effect + period_effects[period - 1]
                mean += log_ratio if treatment == "T" else 0.0
                sd = s_wt if treatment == "T" else s_wr
                rows.append({"subject": f"S{number:03d}", "sequence": sequence, "period": period,
                             "treatment": treatment,
                             "y": math.exp(mean + rng.normal(0.0, sd))})
    return pd.DataFrame(rows)


def run_scaled(df: pd.DataFrame, lower: float | None = 95.0, upper: float | None = 105.0) -> Any:
    return reference_scaled_acceptance(
        subjects=list(df["subject"]), sequences=list(df["sequence"]),
        periods=[int(p) for p in df["period"]], treatments=list(df["treatment"]),
        values=df["y"].to_numpy(), test="T", reference="R",
        unscaled_lower_percent=lower, unscaled_upper_percent=upper)


def independent_bound(df: pd.DataFrame) -> dict[str, float]:
    """Second implementation: per-subject D and I by pandas, OLS on C(sequence) by statsmodels."""
    logs = df.assign(ly=np.log(df["y"]))
    r = logs[logs["treatment"] == "R"].sort_values(["subject", "period"])
    r_rank = r.groupby("subject").cumcount()
    r_wide = r.assign(k=r_rank).pivot(index="subject", columns="k", values="ly")
    seq = logs.groupby("subject")["sequence"].first()
    d = (r_wide[0] - r_wide[1]).dropna().rename("D").to_frame().join(seq)
    fit_d = smf.ols("D ~ C(sequence)", data=d).fit()
    s2_wr = fit_d.mse_resid / 2.0
    df_d = int(fit_d.df_resid)
    means = logs.groupby(["subject", "treatment"])["ly"].mean().unstack()
    i = (means["T"] - means["R"]).dropna().rename("I").to_frame().join(seq)
    # Sum-to-zero coding: the intercept is the unweighted mean of the sequence means.
    fit_i = smf.ols("I ~ C(sequence, Sum)", data=i).fit()
    delta, se, df_i = float(fit_i.params["Intercept"]), float(fit_i.bse["Intercept"]), int(fit_i.df_resid)
    t = sps.t.ppf(0.95, df_i)
    lo, hi = delta - t * se, delta + t * se          # 90 % interval of the difference
    x, x_u = delta**2 - se**2, max(abs(lo), abs(hi)) ** 2
    theta = (math.log(1.25) / 0.25) ** 2
    y = -theta * s2_wr
    y_u = y * df_d / sps.chi2.ppf(0.95, df_d)
    return {"delta": delta, "se": se, "df_i": df_i, "s_wr": math.sqrt(s2_wr), "df_d": df_d,
            "estimate": x + y, "bound": x + y + math.sqrt((x_u - x) ** 2 + (y_u - y) ** 2),
            "n_d": len(d), "n_i": len(i)}


@pytest.mark.parametrize(("cv", "lower", "upper"), [
    (30.0, 80.00, 125.00), (35.0, 77.23, 129.48), (40.0, 74.62, 134.02),
    (45.0, 72.15, 138.59), (50.0, 69.84, 143.19), (60.0, 69.84, 143.19)])
def test_widened_limits_match_the_ema_table(cv: float, lower: float, upper: float) -> None:
    """Expected limits: the table of EMA 2010 (CPMP/EWP/QWP/1401/98 Rev.1) §4.1.10."""
    assert widened_limits_percent(s_wr_for_cv(cv)) == (lower, upper)
    a = widened_limits_acceptance(s_wr=s_wr_for_cv(cv), point_estimate_percent=100.0,
                                  lower_percent=lower + 0.1, upper_percent=upper - 0.1)
    assert (a.limit_lower, a.limit_upper) == (lower, upper)
    assert a.applied is (cv > 30.0)
    assert a.verdict == "within_limits"
    assert a.cv_wr_percent == pytest.approx(cv, rel=1e-12)


def test_widened_limits_round_bounds_and_require_the_point_estimate() -> None:
    """EMA 2010 §4.1.10: bounds compared after rounding to two decimals; the point estimate must
    lie within 80.00–125.00 % even when the widened limits would contain the interval."""
    s_wr = s_wr_for_cv(35.0)                                 # limits 77.23–129.48 (EMA table)
    edge = widened_limits_acceptance(s_wr=s_wr, point_estimate_percent=100.0,
                                     lower_percent=77.225, upper_percent=129.484)
    assert edge.verdict == "within_limits"
    assert edge.interval is not None and edge.interval.lower == 77.23
    out = widened_limits_acceptance(s_wr=s_wr, point_estimate_percent=77.224,
                                    lower_percent=77.224, upper_percent=129.0)
    assert out.verdict == "not_within_limits"
    pe_out = widened_limits_acceptance(s_wr=s_wr, point_estimate_percent=125.006,
                                       lower_percent=110.0, upper_percent=129.0)
    assert pe_out.point_estimate_within is False and pe_out.verdict == "not_within_limits"


def test_widened_limits_without_s_wr_or_interval_are_undetermined_and_json_clean() -> None:
    """Project rule (common practice for reports): non-computable figures are null, never NaN."""
    for a in (widened_limits_acceptance(s_wr=None, point_estimate_percent=100.0, lower_percent=90.0,
                                        upper_percent=110.0),
              widened_limits_acceptance(s_wr=0.4, point_estimate_percent=None, lower_percent=None,
                                        upper_percent=None)):
        assert a.verdict == "undetermined"
        block = scaled_acceptance_to_json(a)
        json.dumps(block, allow_nan=False)
        assert block["criterion"] is None and block["caution"] == SCALING_CAUTION
    with pytest.raises(ValueError, match="s_wr"):
        widened_limits_acceptance(s_wr=float("nan"), point_estimate_percent=100.0,
                                  lower_percent=90.0, upper_percent=110.0)


@pytest.mark.parametrize(("orders", "log_ratio"), [
    ({"TRR": 9, "RTR": 8, "RRT": 10}, 0.08),
    ({"TRTR": 11, "RTRT": 12}, -0.15),
])
def test_reference_scaled_bound_matches_statsmodels(orders: dict[str, int], log_ratio: float) -> None:
    """Expected values: an independent implementation in this test (pandas per-subject D and I,
    statsmodels OLS on C(sequence)) of the FDA progesterone draft guidance (2011) computation."""
    df = replicate_study(7, orders, log_ratio=log_ratio, s_wr=0.45, s_wt=0.35)
    # One subject loses a reference value, another its test value(s): D and I use different subjects.
    df = df.drop(df.index[(df["subject"] == "S002") & (df["treatment"] == "R")][:1])
    df = df.drop(df.index[(df["subject"] == "S005") & (df["treatment"] == "T")])
    a = run_scaled(df)
    ref = independent_bound(df)
    assert a.applied and a.criterion is not None
    c = a.criterion
    assert c.s_wr == pytest.approx(ref["s_wr"], rel=1e-10) and c.df == ref["df_d"]
    assert c.log_difference == pytest.approx(ref["delta"], rel=1e-10, abs=1e-12)
    assert c.standard_error == pytest.approx(ref["se"], rel=1e-10)
    assert c.df_log_difference == ref["df_i"]
    assert c.estimate == pytest.approx(ref["estimate"], rel=1e-9, abs=1e-12)
    assert c.upper_bound == pytest.approx(ref["bound"], rel=1e-9, abs=1e-12)
    assert c.theta == pytest.approx(0.797, abs=5e-4)        # FDA 2011 quotes θ ≈ 0.797 (from memory)
    assert (a.subjects_reference_replicated, a.subjects_test_and_reference) == (ref["n_d"], ref["n_i"])
    assert a.point_estimate_percent == pytest.approx(100.0 * math.exp(ref["delta"]), rel=1e-12)
    expected = ("within_limits" if ref["bound"] <= 0 and 80.0 <= a.point_estimate_percent <= 125.0
                else "not_within_limits")
    assert a.verdict == expected
    json.dumps(scaled_acceptance_to_json(a), allow_nan=False)


def test_reference_scaled_falls_back_to_unscaled_below_0_294() -> None:
    """FDA progesterone draft guidance (2011): s_wR < 0.294 → unscaled limits 80.00–125.00 %;
    the s_wR itself checked against the statsmodels implementation above."""
    df = replicate_study(11, {"TRR": 12, "RTR": 12, "RRT": 12}, log_ratio=0.0, s_wr=0.12, s_wt=0.12)
    ref = independent_bound(df)
    a = run_scaled(df, 93.0, 107.0)
    assert ref["s_wr"] < 0.294 and a.s_wr == pytest.approx(ref["s_wr"], rel=1e-10)
    assert not a.applied and a.criterion is None
    assert (a.limit_lower, a.limit_upper) == (80.0, 125.0)
    assert a.verdict == "within_limits" and "unscaled" in a.reason
    assert run_scaled(df, 79.99, 107.0).verdict == "not_within_limits"
    assert run_scaled(df, None, None).verdict == "undetermined"


def test_reference_scaled_reports_missing_degrees_of_freedom_as_null() -> None:
    """Project rule: not computable → null with a warning code. One subject per sequence leaves
    s²_wR with n_D − m = 0 degrees of freedom (regression identity)."""
    df = replicate_study(3, {"TRR": 1, "RTR": 1, "RRT": 1}, log_ratio=0.0, s_wr=0.4, s_wt=0.4)
    a = run_scaled(df)
    assert a.verdict == "undetermined" and a.s_wr is None
    assert [d.code for d in a.diagnostics] == ["no_reference_replicate_df"]
    json.dumps(scaled_acceptance_to_json(a), allow_nan=False)
    json.dumps(scaled_acceptance_to_json(no_scaling()), allow_nan=False)


def test_reference_scaled_rejects_bad_input_naming_the_field() -> None:
    """Project rule: errors name the field and the problem."""
    df = replicate_study(5, {"TRR": 3, "RTR": 3}, log_ratio=0.0, s_wr=0.4, s_wt=0.4)
    values = df["y"].to_numpy().copy()
    values[4] = -1.0
    with pytest.raises(ValueError, match=r"values\[4\]"):
        reference_scaled_acceptance(
            subjects=list(df["subject"]), sequences=list(df["sequence"]),
            periods=[int(p) for p in df["period"]], treatments=list(df["treatment"]), values=values,
            test="T", reference="R", unscaled_lower_percent=None, unscaled_upper_percent=None)
    with pytest.raises(ValueError, match="reference: treatment 'X'"):
        reference_scaled_acceptance(
            subjects=list(df["subject"]), sequences=list(df["sequence"]),
            periods=[int(p) for p in df["period"]], treatments=list(df["treatment"]),
            values=df["y"].to_numpy(), test="T", reference="X", unscaled_lower_percent=None,
            unscaled_upper_percent=None)


def simulated_level(seed: int, s_wr: float, s_i: float, per_sequence: int, studies: int,
                    chi2_quantile: float | None = None) -> float:
    """Share of studies whose bound is ≤ 0 when (μT − μR)² − θσ²_wR = 0 exactly.

    Per-subject D ~ N(0, 2σ²_wR) and I ~ N(δ, σ²_I), independent (three sequences), as in the
    model behind the FDA progesterone draft guidance (2011).
    """
    rng = np.random.default_rng(seed)
    m = 3
    delta = math.sqrt(THETA) * s_wr                           # on the boundary
    d = rng.normal(0.0, math.sqrt(2.0) * s_wr, size=(studies, m, per_sequence))
    i = rng.normal(delta, s_i, size=(studies, m, per_sequence))
    df_d = df_i = m * per_sequence - m
    s2_wr = ((d - d.mean(axis=2, keepdims=True)) ** 2).sum(axis=(1, 2)) / (2 * df_d)
    seq_means = i.mean(axis=2)
    delta_hat = seq_means.mean(axis=1)
    s2_i = ((i - seq_means[..., None]) ** 2).sum(axis=(1, 2)) / df_i
    s2_delta = s2_i * (m / per_sequence) / m**2
    if chi2_quantile is None:
        bound = reference_scaled_bound(delta_hat, s2_delta, df_i, s2_wr, df_d)[1]
    else:                                                       # the alternative reading
        t = sps.t.ppf(0.95, df_i)
        x, x_u = delta_hat**2 - s2_delta, (abs(delta_hat) + t * np.sqrt(s2_delta)) ** 2
        y = -THETA * s2_wr
        y_u = y * df_d / sps.chi2.ppf(chi2_quantile, df_d)
        bound = x + y + np.sqrt((x_u - x) ** 2 + (y_u - y) ** 2)
    return float(np.mean(bound <= 0.0))


@pytest.mark.parametrize(("s_wr", "s_i", "per_sequence"), [(0.40, 0.49, 8), (0.30, 0.30, 12)])
def test_reference_scaled_bound_has_a_five_percent_level_at_the_boundary(
    s_wr: float, s_i: float, per_sequence: int,
) -> None:
    """Expected: a one-sided 95 % upper bound rejects at the boundary ≈ 5 % of the time (definition
    of a confidence bound; Howe's method is close to nominal, Hyslop, Hsuan & Holder 2000).
    Monte-Carlo with 40 000 studies: standard error ≈ 0.11 %, band ±1 %. The reading with
    chi2.ppf(0.05, df) is far below the band, which settles the choice of quantile."""
    level = simulated_level(2026, s_wr, s_i, per_sequence, 40_000)
    assert abs(level - 0.05) < 0.01
    alternative = simulated_level(2026, s_wr, s_i, per_sequence, 40_000, chi2_quantile=0.05)
    assert alternative < 0.035
