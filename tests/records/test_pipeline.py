"""End to end through the pipeline (tables → stats → records), checked against outside references."""

from __future__ import annotations

import json
import math
import statistics
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate

from service.intake.tables import InvalidRequest, normalize_request
from service.records.building import _replace_nonfinite, build_record

TIMES = (0.0, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0, 24.0)


def profile_request(subjects: int = 14, seed: int = 3, method: str = "linear") -> dict[str, Any]:
    """Seeded one-compartment oral profiles C(t) = A(e^(−ke·t) − e^(−ka·t)) with noise, 2×2 TR/RT."""
    rng = np.random.default_rng(seed)
    points = []
    for i in range(subjects):
        sequence = ("T", "R") if i % 2 == 0 else ("R", "T")
        a0, ka, ke = 100 * math.exp(rng.normal(0, 0.2)), 1.5, 0.15 * math.exp(rng.normal(0, 0.1))
        for period, treatment in enumerate(sequence, 1):
            a = a0 * (0.95 if treatment == "T" else 1.0) * math.exp(rng.normal(0, 0.08))
            for t in TIMES:
                c = a * (math.exp(-ke * t) - math.exp(-ka * t)) * math.exp(rng.normal(0, 0.03))
                points.append({"subject": f"P{i:02d}", "period": period, "treatment": treatment,
                               "sequence": "".join(sequence), "time": t, "concentration": c})
    return {
        "design": {"test": "T", "reference": "R"},
        "profiles": points,
        "settings": {"replicates": 300, "seed": 9, "profiles": {"auc_method": method}},
    }


def test_profiles_give_metrics_matching_scipy_and_statsmodels() -> None:
    """Derived AUC 0–t with the linear rule equals scipy.integrate.trapezoid on each profile; the ABE
    on the derived AUC equals statsmodels OLS `log(y) ~ C(subject) + C(period) + C(treatment)`
    (T − R contrast, t interval on the residual df); Tmax medians equal statistics.median."""
    request = profile_request()
    record = build_record(normalize_request(request))
    result = record["result"]
    by_key = {(p["subject"], p["period"]): p for p in result["profiles"]}
    rows = []
    for (subject, period), p in sorted(by_key.items()):
        pts = [q for q in request["profiles"] if q["subject"] == subject and q["period"] == period]
        expected = integrate.trapezoid([q["concentration"] for q in pts], [q["time"] for q in pts])
        assert p["auc_0_t"] == pytest.approx(expected, rel=1e-12)
        rows.append({"subject": subject, "period": period, "treatment": p["treatment"],
                     "y": p["auc_0_t"]})
    frame = pd.DataFrame(rows)
    fit = smf.ols("np.log(y) ~ C(subject) + C(period) + C(treatment, Treatment('R'))", frame).fit()
    name = "C(treatment, Treatment('R'))[T.T]"
    low, high = fit.conf_int(alpha=0.10).loc[name]
    metrics = {m["metric"]: m for m in result["metrics"]}
    abe = metrics["auc_0_t"]["average_bioequivalence"]
    assert abe["log_difference"]["estimate"] == pytest.approx(fit.params[name], abs=1e-10)
    assert abe["log_difference"]["standard_error"] == pytest.approx(fit.bse[name], abs=1e-10)
    assert abe["log_difference"]["df"] == fit.df_resid
    assert abe["ratio_percent"]["lower"] == pytest.approx(100 * math.exp(low), abs=1e-8)
    assert abe["ratio_percent"]["upper"] == pytest.approx(100 * math.exp(high), abs=1e-8)
    assert metrics["tmax"]["analysis"] == "summary_only"
    for treatment in ("T", "R"):
        tmax = [p["tmax"] for p in result["profiles"] if p["treatment"] == treatment]
        assert metrics["tmax"]["summary"][treatment]["median"] == statistics.median(tmax)
    assert {"auc_0_t", "auc_0_inf", "cmax"} <= set(metrics)
    json.dumps(record, allow_nan=False)


def test_three_period_with_placebo_compares_test_with_reference_only() -> None:
    """With treatments_in_model = "compared" (the default), the ABE uses only T and R observations:
    it equals statsmodels OLS on that subset (EMA 2010 asks for pairwise analysis of multi-arm
    studies — from memory)."""
    rng = np.random.default_rng(21)
    orders = ["TRB", "RBT", "BTR", "TBR", "RTB", "BRT"]
    records = []
    for i in range(18):
        level = rng.normal(0, 0.3)
        for period, treatment in enumerate(orders[i % 6], 1):
            shift = {"T": 0.02, "R": 0.0, "B": -0.5}[treatment]
            records.append({"subject": f"S{i:02d}", "period": period, "treatment": treatment,
                            "sequence": orders[i % 6],
                            "value": float(np.exp(3 + level + shift + rng.normal(0, 0.1)))})
    request = {"design": {"test": "T", "reference": "R", "baseline": "B"}, "records": records,
               "settings": {"replicates": 200, "seed": 1}}
    abe = build_record(normalize_request(request))["result"]["metrics"][0]["average_bioequivalence"]
    frame = pd.DataFrame([r for r in records if r["treatment"] != "B"])
    fit = smf.ols("np.log(value) ~ C(subject) + C(period) + C(treatment, Treatment('R'))", frame).fit()
    name = "C(treatment, Treatment('R'))[T.T]"
    assert abe["log_difference"]["estimate"] == pytest.approx(fit.params[name], abs=1e-10)
    assert abe["log_difference"]["df"] == fit.df_resid


def test_confounded_design_gives_warning_not_failure() -> None:
    """When every subject is in one sequence of a 2×2, treatment is aliased with period, so the
    contrast is not estimable (common practice: a design fact); θ is still computed."""
    records = []
    rng = np.random.default_rng(2)
    for i in range(6):
        for period, treatment in ((1, "T"), (2, "R")):
            records.append({"subject": f"S{i}", "period": period, "treatment": treatment,
                            "value": float(rng.uniform(5, 6))})
    request = {"design": {"test": "T", "reference": "R"}, "records": records,
               "settings": {"replicates": 200, "seed": 1}}
    result = build_record(normalize_request(request))["result"]
    assert result["metrics"][0]["average_bioequivalence"] is None
    assert "average_bioequivalence_not_estimable" in {w["code"] for w in result["warnings"]}
    assert result["metrics"][0]["ratio_of_mean_differences"]["estimate"]["theta"] is not None


def test_nonfinite_figures_become_null_with_a_listing() -> None:
    """DESIGN.md §Record: JSON never carries NaN or Infinity; a figure that cannot be computed is null."""
    found: list[str] = []
    cleaned = _replace_nonfinite({"a": [1.0, float("inf")], "b": {"c": float("nan")}}, ("r",), found)
    assert cleaned == {"a": [1.0, None], "b": {"c": None}}
    assert found == ["r.a.1", "r.b.c"]


def test_profile_problem_is_a_validation_error() -> None:
    """Baseline correction needs a pre-dose sample; a profile without one is refused with its location
    rather than failing inside the computation."""
    request = profile_request(subjects=4)
    request["profiles"] = [p for p in request["profiles"] if p["time"] > 0]
    request["settings"]["profiles"]["baseline_correction"] = True
    with pytest.raises(InvalidRequest) as caught:
        build_record(normalize_request(request))
    assert caught.value.problems[0].loc[0] == "profiles"


@settings(max_examples=8, deadline=None)
@given(st.permutations(list(range(36))))
def test_row_order_changes_no_number_and_no_hash(order: list[int]) -> None:
    """DESIGN.md §Request: normalization sorts the records, so row order changes neither the hash
    (RFC 8785 over the inputs) nor any figure of the result (property test, hypothesis)."""
    rng = np.random.default_rng(8)
    records = [
        {"subject": f"S{i:02d}", "period": p, "treatment": t,
         "value": float(rng.normal({"T": 10.4, "R": 10.0, "B": 6.0}[t], 0.5))}
        for i in range(12) for p, t in enumerate("BRT", 1)
    ]
    base = {"design": {"test": "T", "reference": "R", "baseline": "B"},
            "settings": {"replicates": 200, "seed": 4}}
    first = build_record(normalize_request({**base, "records": records}))
    shuffled = build_record(normalize_request({**base, "records": [records[i] for i in order]}))
    assert shuffled["inputs_sha256"] == first["inputs_sha256"]
    assert json.dumps(shuffled["result"], sort_keys=True) == json.dumps(first["result"], sort_keys=True)


def _incomplete_request() -> dict[str, Any]:
    """Seeded 2×2 with one subject lacking its second period (excluded by default)."""
    rng = np.random.default_rng(17)
    records = []
    for i in range(10):
        order = ("T", "R") if i % 2 else ("R", "T")
        for period, treatment in enumerate(order, 1):
            if i == 4 and period == 2:
                continue
            records.append({"subject": f"S{i}", "period": period, "sequence": "".join(order),
                            "treatment": treatment, "value": float(np.exp(rng.normal(4, 0.2)))})
    return {"design": {"test": "T", "reference": "R"}, "records": records,
            "settings": {"replicates": 200, "seed": 5}}


@pytest.mark.parametrize("request_of", [_incomplete_request, profile_request],
                         ids=["records", "profiles"])
def test_tables_handed_on_by_the_checks_give_the_same_record(request_of: Any) -> None:
    """The tables read_request_and_tables hands on give the record (every number, the inputs
    hash, the canonical result text) that building them again gives; with profiles none are
    handed on, as their derived metrics join the tables later (identity of the two paths)."""
    from service.intake.reading import read_request_and_tables
    from service.records.building import build_record_and_texts

    body = json.dumps(request_of()).encode()
    inputs, tables = read_request_and_tables("json", body, {})
    assert (tables is None) == bool(inputs["profiles"])
    handed, handed_texts = build_record_and_texts(inputs, tables=tables)
    rebuilt, rebuilt_texts = build_record_and_texts(inputs)
    if tables is not None:
        assert handed["result"]["metrics"][0]["subjects"]["excluded"]  # the case is exercised
    assert handed == rebuilt
    assert handed_texts == rebuilt_texts


@settings(max_examples=300, deadline=None)
@given(st.integers(1, 300), st.integers(1, 3), st.integers(0, 2**32 - 1),
       st.sampled_from([1e-3, 1.0, 1e4, 1e90]))
def test_treatment_summaries_are_numpys_mean_and_std_bit_for_bit(
    n: int, width: int, seed: int, scale: float,
) -> None:
    """building._summary_row runs numpy's mean and std(ddof=1) ufunc by ufunc; the reference is
    numpy's own ndarray.mean/std/min/max on the same strided column of a table (sizes past
    numpy's pairwise-summation blocks of 8 and 128 included)."""
    from service.records.building import _summary_row

    values = np.random.default_rng(seed).normal(3.0, 1.0, size=(n, width)) * scale
    for j in range(width):
        column = values[:, j]
        row = _summary_row("T", "test", column)
        assert row["n"] == n
        assert row["mean"] is not None and row["mean"].hex() == float(column.mean()).hex()
        if n > 1:
            assert row["sd"] is not None and row["sd"].hex() == float(column.std(ddof=1)).hex()
        else:
            assert row["sd"] is None
        assert (row["min"], row["max"]) == (float(column.min()), float(column.max()))
    empty = _summary_row("T", "test", np.empty(0))
    assert (empty["n"], empty["mean"], empty["sd"], empty["min"], empty["max"]) == (
        0, None, None, None, None)
