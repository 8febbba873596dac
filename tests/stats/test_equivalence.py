from __future__ import annotations

import json
import math
import statistics
import time
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import stats as sps
from statsmodels.stats.anova import anova_lm

from service.stats.deadlines import ComputeTimeExceeded
from service.stats.equivalence import (
    ROUNDING_RULE,
    AverageBioequivalence,
    average_bioequivalence,
    average_bioequivalence_to_json,
    judge_ratio_interval,
    round_percent,
    tmax_summary,
)

WILLIAMS_3 = ("PRT", "RTP", "TPR", "PTR", "RPT", "TRP")


def simulate(
    seed: int, orders: dict[str, int], *, log_ratio: float = -0.03, cv_within: float = 0.2,
    sd_between: float = 0.35, period_effects: tuple[float, ...] = (0.0, 0.05, -0.04),
) -> pd.DataFrame:
    """Long-form crossover data from a seeded lognormal model (constructed, no published set).

    ``orders`` maps a sequence label, whose letters are the treatments by period, to its number
    of subjects. Treatment effects: R = 0, T = log_ratio, P (placebo) = -1.
    """
    rng = np.random.default_rng(seed)
    sigma_w = math.sqrt(math.log1p(cv_within**2))
    effect = {"R": 0.0, "T": log_ratio, "P": -1.0}
    rows: list[dict[str, Any]] = []
    number = 0
    for sequence, n in orders.items():
        for _ in range(n):
            number += 1
            subject = f"S{number:03d}"
            subject_effect = rng.normal(0.0, sd_between)
            for period, treatment in enumerate(sequence, start=1):
                log_y = (4.0 + subject_effect + period_effects[period - 1] + effect[treatment]
                         + rng.normal(0.0, sigma_w))
                rows.append({"subject": subject, "sequence": sequence, "period": period,
                             "treatment": treatment, "y": math.exp(log_y)})
    return pd.DataFrame(rows)


def analyse(df: pd.DataFrame, **kwargs: Any) -> AverageBioequivalence:
    return average_bioequivalence(
        subjects=list(df["subject"]), sequences=list(df["sequence"]),
        periods=[int(p) for p in df["period"]], treatments=list(df["treatment"]),
        values=df["y"].to_numpy(dtype=np.float64), test="T", reference="R", **kwargs)


CASES = {
    "balanced_2x2": ({"TR": 12, "RT": 12}, False),
    "unbalanced_2x2": ({"TR": 13, "RT": 11}, False),
    "three_period_williams": ({s: 3 for s in WILLIAMS_3}, False),
    "three_period_t_and_r_only": ({s: 4 for s in WILLIAMS_3}, True),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_contrast_matches_statsmodels_ols(case: str) -> None:
    """Source: statsmodels OLS ``np.log(y) ~ C(subject) + C(period) + C(treatment)`` (full-rank
    form of the same fixed-effects crossover model), T − R contrast by ``t_test``."""
    orders, drop_placebo = CASES[case]
    df = simulate(11 + len(case), orders)
    if drop_placebo:
        df = df[df["treatment"] != "P"].reset_index(drop=True)
    result = analyse(df)
    fit = smf.ols("np.log(y) ~ C(subject) + C(period) + C(treatment)", data=df).fit()
    # Treatment coding with the first sorted level as base: P when present, else R.
    hypothesis = ("C(treatment)[T.T] - C(treatment)[T.R] = 0" if "P" in set(df["treatment"])
                  else "C(treatment)[T.T] = 0")
    tt = fit.t_test(hypothesis)
    ci = np.asarray(tt.conf_int(alpha=0.10)).ravel()
    assert result.df == int(fit.df_resid)
    assert result.log_difference == pytest.approx(float(np.squeeze(tt.effect)), rel=1e-8,
                                                  abs=1e-12)
    assert result.standard_error == pytest.approx(float(np.squeeze(tt.sd)), rel=1e-8)
    assert result.ratio_lower_percent == pytest.approx(100 * math.exp(ci[0]), rel=1e-8)
    assert result.ratio_upper_percent == pytest.approx(100 * math.exp(ci[1]), rel=1e-8)
    assert result.residual_mean_square == pytest.approx(float(fit.mse_resid), rel=1e-8)


def test_two_by_two_period_difference_closed_form() -> None:
    """Source: the 2×2 crossover analysis by half period differences d = (P2 − P1)/2, compared
    between sequences with a pooled two-sample t on n1 + n2 − 2 df (Jones & Kenward, Design and
    Analysis of Cross-Over Trials — from memory); estimate = (mean_TR − mean_RT) with sign
    such that TR's d is (R − T)/2, i.e. T − R = mean_RT(d) − mean_TR(d)."""
    df = simulate(2024, {"TR": 13, "RT": 11})
    result = analyse(df)
    wide = df.assign(ly=np.log(df["y"])).pivot(index="subject", columns="period", values="ly")
    seq = df.groupby("subject")["sequence"].first()
    d = (wide[2] - wide[1]) / 2.0
    d_tr, d_rt = d[seq == "TR"].to_numpy(), d[seq == "RT"].to_numpy()
    n1, n2 = d_tr.size, d_rt.size
    estimate = d_rt.mean() - d_tr.mean()
    s2 = ((n1 - 1) * d_tr.var(ddof=1) + (n2 - 1) * d_rt.var(ddof=1)) / (n1 + n2 - 2)
    se = math.sqrt(s2 * (1 / n1 + 1 / n2))
    t_crit = sps.t.ppf(0.95, n1 + n2 - 2)
    assert result.df == n1 + n2 - 2
    assert result.log_difference == pytest.approx(estimate, rel=1e-10)
    assert result.standard_error == pytest.approx(se, rel=1e-10)
    assert result.ratio_lower_percent == pytest.approx(100 * math.exp(estimate - t_crit * se),
                                                       rel=1e-10)
    assert result.ratio_upper_percent == pytest.approx(100 * math.exp(estimate + t_crit * se),
                                                       rel=1e-10)


def test_tost_p_values_and_cv_from_scipy_t() -> None:
    """Source: Schuirmann 1987 (J Pharmacokinet Biopharm 15:657–680) one-sided t statistics,
    evaluated with scipy.stats.t; within-subject CV = 100·sqrt(exp(MSE) − 1) (lognormal
    identity, common practice); a 90 % interval inside the limits ⇔ both p < 0.05
    (Schuirmann 1987)."""
    df = simulate(7, {"TR": 10, "RT": 10}, log_ratio=0.08)
    r = analyse(df)
    assert r.standard_error is not None and r.residual_mean_square is not None
    t_lo = (r.log_difference - math.log(0.80)) / r.standard_error
    t_hi = (r.log_difference - math.log(1.25)) / r.standard_error
    assert r.p_lower == pytest.approx(1 - sps.t.cdf(t_lo, r.df), rel=1e-9)
    assert r.p_upper == pytest.approx(sps.t.cdf(t_hi, r.df), rel=1e-9)
    assert r.within_subject_cv_percent == pytest.approx(
        100 * math.sqrt(math.exp(r.residual_mean_square) - 1), rel=1e-12)
    assert r.p_lower is not None and r.p_upper is not None
    inside = 80.0 <= r.ratio_lower_percent <= r.ratio_upper_percent <= 125.0  # type: ignore
    assert inside == (max(r.p_lower, r.p_upper) < 0.05)


@pytest.mark.parametrize("log_ratio", [0.0, -0.3])
def test_verdict_agrees_with_both_one_sided_tests(log_ratio: float) -> None:
    """Source: Schuirmann 1987 — the 90 % interval lies within [80, 125] exactly when both
    one-sided 5 % tests reject; a true ratio of 74 % with 40 subjects should fail (common
    practice expectation for a ratio far outside the limits)."""
    df = simulate(99, {"TR": 20, "RT": 20}, log_ratio=log_ratio, cv_within=0.15)
    r = analyse(df)
    assert r.p_lower is not None and r.p_upper is not None
    both_reject = max(r.p_lower, r.p_upper) < 0.05
    assert (r.acceptance.verdict == "within_limits") == both_reject
    assert r.acceptance.verdict == ("within_limits" if log_ratio == 0.0 else "not_within_limits")


@pytest.mark.parametrize("orders", [{"TR": 13, "RT": 11}, {s: 3 for s in WILLIAMS_3}])
def test_sequence_effect_matches_anova_on_subject_sums(orders: dict[str, int]) -> None:
    """Source: statsmodels ``anova_lm`` of the between-subject model ``total ~ C(sequence)`` on
    the per-subject sums of log values (the between-subject stratum of a crossover)."""
    df = simulate(5, orders)
    r = analyse(df)
    totals = (df.assign(ly=np.log(df["y"])).groupby("subject")
              .agg(total=("ly", "sum"), sequence=("sequence", "first")).reset_index())
    table = anova_lm(smf.ols("total ~ C(sequence)", data=totals).fit())
    assert r.sequence_f == pytest.approx(float(table.loc["C(sequence)", "F"]), rel=1e-9)
    assert r.sequence_p == pytest.approx(float(table.loc["C(sequence)", "PR(>F)"]), rel=1e-8)
    assert r.sequence_df_numerator == len(orders) - 1
    assert r.sequence_df_denominator == sum(orders.values()) - len(orders)


def test_sequence_effect_is_squared_pooled_t_on_totals_in_two_by_two() -> None:
    """Source: in a 2×2 the sequence (carry-over) test is the pooled two-sample t on subject
    totals (Jones & Kenward — from memory), with F = t²; computed by scipy.stats.ttest_ind."""
    df = simulate(31, {"TR": 9, "RT": 14})
    r = analyse(df)
    totals = df.assign(ly=np.log(df["y"])).groupby(["sequence", "subject"])["ly"].sum()
    t = sps.ttest_ind(totals["TR"], totals["RT"], equal_var=True)
    assert r.sequence_f == pytest.approx(float(t.statistic) ** 2, rel=1e-9)
    assert r.sequence_p == pytest.approx(float(t.pvalue), rel=1e-8)


def test_rounding_at_the_limits() -> None:
    """Source: two-decimal rounding of the percent bounds before comparison with 80.00–125.00
    (common practice in FDA/EMA guidance; from memory); half away from zero per
    decimal.ROUND_HALF_UP."""
    assert round_percent(79.995) == 80.00
    assert round_percent(79.994) == 79.99
    assert round_percent(125.005) == 125.01
    assert round_percent(125.004) == 125.00
    assert judge_ratio_interval(79.995, 100.0, (80.0, 125.0)).verdict == "within_limits"
    assert judge_ratio_interval(79.994, 100.0, (80.0, 125.0)).verdict == "not_within_limits"
    assert judge_ratio_interval(90.0, 125.004, (80.0, 125.0)).verdict == "within_limits"
    assert judge_ratio_interval(90.0, 125.005, (80.0, 125.0)).verdict == "not_within_limits"
    passed = judge_ratio_interval(79.995, 125.0, (80.0, 125.0))
    assert (passed.lower, passed.upper, passed.rounding) == (80.0, 125.0, ROUNDING_RULE)
    with pytest.raises(ValueError, match="value"):
        round_percent(float("nan"))


def test_row_order_does_not_change_the_result() -> None:
    """Source: least squares depends on the set of observations, not their order (common
    practice: the normalized request sorts records, so results must be order-free)."""
    df = simulate(3, {s: 2 for s in WILLIAMS_3})
    shuffled = df.sample(frac=1.0, random_state=np.random.RandomState(8)).reset_index(drop=True)
    a, b = analyse(df), analyse(shuffled)
    assert a.log_difference == pytest.approx(b.log_difference, rel=1e-10)
    assert a.standard_error == pytest.approx(b.standard_error, rel=1e-10)
    assert a.sequence_f == pytest.approx(b.sequence_f, rel=1e-10)


def test_zero_residual_df_is_undetermined_without_nan() -> None:
    """Source: a 2×2 with one subject per sequence has N − rank = 4 − 4 = 0 residual df
    (dimension count of the model, common practice); output must be strict JSON (RFC 8259
    has no NaN)."""
    df = simulate(1, {"TR": 1, "RT": 1})
    r = analyse(df)
    assert r.df == 0 and r.standard_error is None and r.acceptance.verdict == "undetermined"
    assert "degrees of freedom" in r.acceptance.reason
    assert r.sequence_f is None
    doc = average_bioequivalence_to_json(r)
    json.dumps(doc, allow_nan=False)
    assert {d["code"] for d in doc["warnings"]} >= {"no_residual_df", "no_between_subject_df"}


def test_exact_fit_is_undetermined_without_nan() -> None:
    """Source: values built exactly from subject + period + treatment effects leave a zero
    residual sum of squares (least-squares identity); the contract asks for null plus a code."""
    df = simulate(6, {"TR": 4, "RT": 4})
    effect = {"T": 0.1, "R": 0.0}
    base = {s: 3.0 + 0.1 * i for i, s in enumerate(sorted(set(df["subject"])))}
    df["y"] = [math.exp(base[s] + 0.02 * p + effect[t])
               for s, p, t in zip(df["subject"], df["period"], df["treatment"], strict=True)]
    r = analyse(df)
    assert r.log_difference == pytest.approx(0.1, rel=1e-9)
    assert r.acceptance.verdict == "undetermined" and r.p_lower is None
    assert "zero_residual_variance" in {d.code for d in r.diagnostics}
    json.dumps(average_bioequivalence_to_json(r), allow_nan=False)


def test_json_block_has_the_contract_paths() -> None:
    """Source: DESIGN.md §Average bioequivalence (the public JSON contract)."""
    r = analyse(simulate(4, {"TR": 6, "RT": 6}))
    doc = json.loads(json.dumps(average_bioequivalence_to_json(r), allow_nan=False))
    assert set(doc["log_difference"]) == {"estimate", "standard_error", "df"}
    assert set(doc["ratio_percent"]) == {"estimate", "lower", "upper"}
    assert set(doc["tost"]) == {"p_lower", "p_upper"}
    assert {"f", "p"} <= set(doc["sequence_effect"])
    assert {"limits", "lower", "upper", "verdict", "rounding", "reason"} <= set(doc["acceptance"])
    assert doc["acceptance"]["limits"] == {"lower": 80.0, "upper": 125.0}
    assert doc["confidence_level"] == 0.9 and doc["subjects"] == 12 and doc["observations"] == 24
    assert doc["ratio_percent"]["estimate"] == pytest.approx(
        100 * math.exp(doc["log_difference"]["estimate"]), rel=1e-12)


def test_bad_input_names_the_field() -> None:
    """Source: DESIGN.md — bad input gets an error naming the field and the problem."""
    df = simulate(2, {"TR": 3, "RT": 3})
    values = df["y"].to_numpy(dtype=np.float64).copy()
    values[4] = -1.0
    with pytest.raises(ValueError, match=r"values: entries \[4\]"):
        average_bioequivalence(subjects=list(df["subject"]), sequences=list(df["sequence"]),
                               periods=list(df["period"]), treatments=list(df["treatment"]),
                               values=values, test="T", reference="R")
    with pytest.raises(ValueError, match="reference: treatment 'X'"):
        average_bioequivalence(subjects=list(df["subject"]), sequences=list(df["sequence"]),
                               periods=list(df["period"]), treatments=list(df["treatment"]),
                               values=df["y"].to_numpy(), test="T", reference="X")
    with pytest.raises(ValueError, match="periods: has 5 entries"):
        average_bioequivalence(subjects=list(df["subject"]), sequences=list(df["sequence"]),
                               periods=[1, 2, 1, 2, 1], treatments=list(df["treatment"]),
                               values=df["y"].to_numpy(), test="T", reference="R")
    with pytest.raises(ValueError, match="confidence_level"):
        analyse(df, confidence_level=1.5)
    with pytest.raises(ValueError, match="limits_percent"):
        analyse(df, limits_percent=(125.0, 80.0))


def test_tmax_summary_matches_stdlib_statistics() -> None:
    """Source: Python's statistics.median, min and max."""
    rng = np.random.default_rng(12)
    data = {"T": rng.choice([0.5, 1.0, 1.5, 2.0, 3.0], size=13).tolist(),
            "R": rng.choice([0.5, 1.0, 1.5, 2.0], size=12).tolist(), "P": []}
    out = tmax_summary(data)
    for trt in ("T", "R"):
        assert out[trt] == {"n": len(data[trt]), "median": statistics.median(data[trt]),
                            "min": min(data[trt]), "max": max(data[trt])}
    assert out["P"] == {"n": 0, "median": None, "min": None, "max": None}
    with pytest.raises(ValueError, match="tmax_by_treatment"):
        tmax_summary({"T": [1.0, float("nan")]})


def full_dummy_fit(df: pd.DataFrame, test: str = "T", reference: str = "R") -> dict[str, float]:
    """The fit as it was before the within-subject sweep: least squares on the full dummy
    design (intercept and every level of sequence, subject, period and treatment) by the
    pseudo-inverse, rank from the design. Kept here as an independent reference."""
    log_y = np.log(df["y"].to_numpy(dtype=np.float64))
    n_obs = log_y.size
    blocks = [np.ones((n_obs, 1))]
    offset = 1
    for name in ("sequence", "subject", "period", "treatment"):
        levels = sorted(set(df[name]))
        codes = np.array([levels.index(v) for v in df[name]])
        blocks.append(np.eye(len(levels))[codes])
        if name == "treatment":
            treatment_levels = levels
        else:
            offset += len(levels)
    design = np.hstack(blocks)
    pinv = np.linalg.pinv(design, rcond=1e-10)
    beta = pinv @ log_y
    rank = int(np.linalg.matrix_rank(design, tol=1e-10 * max(design.shape)
                                     * np.linalg.norm(design, 2)))
    contrast = np.zeros(design.shape[1])
    contrast[offset + treatment_levels.index(test)] = 1.0
    contrast[offset + treatment_levels.index(reference)] = -1.0
    if not np.allclose(contrast @ pinv @ design, contrast, atol=1e-8):
        raise ValueError("not estimable")
    residuals = log_y - design @ beta
    df_resid = n_obs - rank
    mse = float(residuals @ residuals) / df_resid
    se = math.sqrt(mse * float(contrast @ (pinv @ pinv.T) @ contrast))
    estimate = float(contrast @ beta)
    t_crit = float(sps.t.ppf(0.95, df_resid))
    return {"estimate": estimate, "se": se, "df": df_resid, "mse": mse,
            "lower": 100 * math.exp(estimate - t_crit * se),
            "upper": 100 * math.exp(estimate + t_crit * se),
            "p_lower": float(sps.t.sf((estimate - math.log(0.8)) / se, df_resid)),
            "p_upper": float(sps.t.cdf((estimate - math.log(1.25)) / se, df_resid))}


REFERENCE_CASES = {
    "balanced_2x2": ({"TR": 10, "RT": 10}, None),
    "unbalanced_2x2": ({"TR": 17, "RT": 8}, None),
    "williams_three_treatments": ({s: 2 for s in WILLIAMS_3}, None),
    "williams_t_and_r_only": ({s: 3 for s in WILLIAMS_3}, "P"),
    "unbalanced_four_period_two_arms": ({"TRRT": 7, "RTTR": 4}, None),
}


@pytest.mark.parametrize("case", sorted(REFERENCE_CASES))
def test_absorbed_fit_matches_the_full_dummy_pseudo_inverse(case: str) -> None:
    """Source: the full-dummy pseudo-inverse least squares kept in this file (full_dummy_fit)
    and the Frisch–Waugh–Lovell theorem (Frisch & Waugh 1933; Lovell 1963): absorbing the
    subjects gives the same estimate, residuals and rank, so every figure agrees to 1e-10."""
    orders, dropped = REFERENCE_CASES[case]
    df = simulate(40 + len(case), orders, period_effects=(0.0, 0.05, -0.04, 0.02))
    if dropped:
        df = df[df["treatment"] != dropped].reset_index(drop=True)
    r = analyse(df)
    old = full_dummy_fit(df)
    assert r.df == old["df"]
    assert r.log_difference == pytest.approx(old["estimate"], rel=1e-10, abs=1e-13)
    for name, value in (("se", r.standard_error), ("mse", r.residual_mean_square),
                        ("lower", r.ratio_lower_percent), ("upper", r.ratio_upper_percent),
                        ("p_lower", r.p_lower), ("p_upper", r.p_upper)):
        assert value == pytest.approx(old[name], rel=1e-10), name
    assert r.within_subject_cv_percent == pytest.approx(
        100 * math.sqrt(math.expm1(old["mse"])), rel=1e-10)


def test_confounded_contrast_raises_as_the_full_dummy_fit_does() -> None:
    """Source: with every subject in one sequence of a 2×2, treatment is aliased with period
    (design fact, common practice); the full-dummy fit kept in this file rejects the contrast
    too."""
    df = simulate(8, {"TR": 6})
    with pytest.raises(ValueError, match="not estimable"):
        full_dummy_fit(df)
    with pytest.raises(ValueError, match="treatments: the test − reference contrast is not "
                                         "estimable from this design"):
        analyse(df)


def test_passed_deadline_stops_the_fit() -> None:
    """Source: service.stats.deadlines contract — a deadline (time.monotonic()) that has passed
    raises ComputeTimeExceeded and returns nothing partial; a distant one changes nothing."""
    df = simulate(9, {"TR": 5, "RT": 5})
    with pytest.raises(ComputeTimeExceeded, match="time is up"):
        analyse(df, deadline=time.monotonic() - 1.0)
    assert analyse(df, deadline=time.monotonic() + 3600.0) == analyse(df)
