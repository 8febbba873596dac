"""Replicate, parallel and unsupported designs through the whole record (issue: highly variable
drugs). The stats modules are tested on their own in tests/stats; here the records that clients
read are checked against independent computations."""

from __future__ import annotations

import copy
import math
import warnings
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.tools.sm_exceptions import SingularMatrixWarning

from service.intake.problems import InvalidRequest
from service.intake.tables import normalize_request
from service.records.building import build_record
from service.records.hashing import canonical_json, load_canonical
from service.records.reproduction import reproduce


def _replicate_request(n: int = 16, seed: int = 8, drop_last_of: tuple[int, ...] = (3,)) -> dict[str, Any]:
    """Seeded, constructed TRTR/RTRT table with one subject missing its last period (test data)."""
    rng = np.random.default_rng(seed)
    records = []
    for i in range(n):
        sequence = "TRTR" if i % 2 == 0 else "RTRT"
        subject_effect = rng.normal(0.0, 0.3)
        for period in range(1, 5 if i not in drop_last_of else 4):
            treatment = sequence[period - 1]
            log_value = 4.0 + subject_effect + 0.02 * period + (-0.05 if treatment == "T" else 0.0)
            log_value += rng.normal(0.0, 0.35 if treatment == "R" else 0.25)
            records.append({"subject": f"S{i:02d}", "period": period, "sequence": sequence,
                            "treatment": treatment, "metric": "Cmax",
                            "value": float(np.exp(log_value))})
    return {"design": {"test": "T", "reference": "R"}, "records": records,
            "settings": {"replicates": 200, "seed": 3}}


def _metric(record: dict[str, Any]) -> dict[str, Any]:
    (metric,) = record["result"]["metrics"]
    return metric


def test_replicate_design_is_recognised_and_fitted_like_statsmodels() -> None:
    """Method A of the EMA Q&A (fixed sequence, subject, period, treatment over all observations):
    the 90 % CI of T/R equals the one from statsmodels OLS with C(subject) + C(period) +
    C(treatment) on the natural logs (sequence is nested in subject); s²_wR equals the residual mean
    square of OLS on the reference observations alone with C(subject) + C(period)."""
    request = _replicate_request()
    record = build_record(normalize_request(request))
    abe = _metric(record)["average_bioequivalence"]
    assert abe["design"] == "replicate"
    frame = pd.DataFrame(request["records"])
    frame["log_value"] = np.log(frame["value"])
    fit = smf.ols("log_value ~ C(subject) + C(period) + C(treatment, Treatment('R'))", frame).fit()
    name = "C(treatment, Treatment('R'))[T.T]"
    lower, upper = fit.conf_int(alpha=0.10).loc[name]
    assert abe["log_difference"]["estimate"] == pytest.approx(fit.params[name], rel=1e-10)
    assert abe["ratio_percent"]["lower"] == pytest.approx(100 * math.exp(lower), rel=1e-10)
    assert abe["ratio_percent"]["upper"] == pytest.approx(100 * math.exp(upper), rel=1e-10)
    reference = frame[frame["treatment"] == "R"]
    # On the reference rows alone the periods of a sequence are aliased with its subjects
    # (TRTR gives R in periods 2 and 4 only): statsmodels fits by pseudo-inverse, takes the
    # residual df from the rank, and warns; the warning is expected here.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SingularMatrixWarning)
        only_r = smf.ols("log_value ~ C(subject) + C(period)", reference).fit()
    assert abe["reference_variability"]["s_wr"] ** 2 == pytest.approx(only_r.mse_resid, rel=1e-10)


def test_theta_in_a_replicate_design_uses_each_subjects_mean_of_its_replicates() -> None:
    """θ = (mean_T − mean_R) / mean_R (DESIGN.md) where each subject's value is the mean over its
    replicates of that treatment (issue text, item 7), computed here with pandas."""
    request = _replicate_request()
    record = build_record(normalize_request(request))
    frame = pd.DataFrame(request["records"])
    means = frame.groupby(["subject", "treatment"])["value"].mean().unstack()
    t, r = means["T"].mean(), means["R"].mean()
    theta = _metric(record)["ratio_of_mean_differences"]["estimate"]["theta"]
    assert theta == pytest.approx((t - r) / r, rel=1e-12)


def test_parallel_groups_give_welch_interval_and_no_within_subject_ratio() -> None:
    """Parallel groups: the CI of the log difference is Welch's, as
    scipy.stats.ttest_ind(equal_var=False).confidence_interval gives it; θ (a within-subject
    statistic) is null with a warning code, never a made-up number."""
    rng = np.random.default_rng(21)
    records = []
    for i in range(30):
        treatment = "T" if i < 14 else "R"
        value = float(np.exp(rng.normal(3.0 if treatment == "T" else 3.05, 0.4 if treatment == "T" else 0.3)))
        records.append({"subject": f"P{i:02d}", "period": 1, "treatment": treatment, "value": value})
    record = build_record(normalize_request({"design": {"test": "T", "reference": "R"},
                                             "records": records, "settings": {"seed": 1}}))
    metric = _metric(record)
    abe = metric["average_bioequivalence"]
    assert abe["design"] == "parallel"
    logs = {g: np.log([r["value"] for r in records if r["treatment"] == g]) for g in "TR"}
    ci = stats.ttest_ind(logs["T"], logs["R"], equal_var=False).confidence_interval(0.90)
    assert abe["ratio_percent"]["lower"] == pytest.approx(100 * math.exp(ci.low), rel=1e-10)
    assert abe["ratio_percent"]["upper"] == pytest.approx(100 * math.exp(ci.high), rel=1e-10)
    assert metric["ratio_of_mean_differences"] is None
    assert "ratio_not_paired" in {w["code"] for w in record["result"]["warnings"]}


def test_a_table_that_fits_no_supported_design_is_refused_with_the_reason() -> None:
    """Sequences TRRR and RTTT give each product a different number of times per sequence: no
    supported replicate family (EMA 2010 names 2×2 and replicate designs); the refusal names the
    metric and why, like every other invalid request."""
    request = _replicate_request(drop_last_of=())
    for r in request["records"]:
        if r["period"] > 2:
            r["treatment"] = "R" if r["sequence"] == "TRTR" else "T"
            r["sequence"] = "TRRR" if r["sequence"] == "TRTR" else "RTTT"
        else:
            r["sequence"] = "TRRR" if r["sequence"] == "TRTR" else "RTTT"
    with pytest.raises(InvalidRequest) as caught:
        build_record(normalize_request(request))
    (problem,) = caught.value.problems
    assert problem.loc == ("records",) and "fits no supported design" in problem.msg


def test_scaling_on_a_two_period_crossover_does_not_apply_and_says_why() -> None:
    """Scaled limits need the reference given twice (EMA 2010 §4.1.10; FDA 2011): on a 2×2 the
    unscaled verdict stands and a warning says so."""
    request = _replicate_request(drop_last_of=())
    request["records"] = [r for r in request["records"] if r["period"] <= 2]
    plain = build_record(normalize_request(request))
    request["settings"]["scaling"] = {"approach": "widened_limits", "metrics": ["Cmax"]}
    scaled = build_record(normalize_request(request))
    block = _metric(scaled)["average_bioequivalence"]
    assert block["design"] == "crossover" and block["scaling"]["applied"] is False
    assert block["acceptance"] == _metric(plain)["average_bioequivalence"]["acceptance"]
    assert "scaling_needs_replicate_design" in {w["code"] for w in scaled["result"]["warnings"]}


def test_requests_without_the_new_settings_keep_their_inputs() -> None:
    """The inputs hash of an unchanged request stays stable: settings added later (scaling,
    tmax_limits) do not appear in the normalized inputs unless the request gives them."""
    inputs = normalize_request(_replicate_request())
    assert "scaling" not in inputs["settings"] and "tmax_limits" not in inputs["settings"]


def test_reproduction_lists_additions_and_last_digit_changes_apart() -> None:
    """Reproduction (README §Archive checks): a field the archived result lacks (a newer engine's
    addition) and a number off in its last digits (relative 1e-15) do not fail; a real change
    (relative 1e-9) does."""
    record = build_record(normalize_request(_replicate_request()))
    # as the archive stores it: after the RFC 8785 round trip
    archived = copy.deepcopy(load_canonical(canonical_json(record)))
    abe = archived["result"]["metrics"][0]["average_bioequivalence"]
    del abe["design_description"]
    abe["log_difference"]["estimate"] *= 1 + 1e-15
    outcome = reproduce(archived)
    assert outcome["reproduced"] is True
    assert ["result", "metrics", 0, "average_bioequivalence", "design_description"] in outcome["additions"]
    assert len(outcome["rounding_differences"]) == 1
    abe["log_difference"]["estimate"] *= 1 + 1e-9
    assert reproduce(archived)["reproduced"] is False
