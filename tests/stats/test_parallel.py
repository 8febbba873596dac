from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pytest
from scipy import stats as sps

from service.stats.deadlines import ComputeTimeExceeded
from service.stats.parallel import (
    parallel_average_bioequivalence,
    parallel_average_bioequivalence_to_json,
)


def groups(seed: int, n_test: int, n_reference: int, *, log_ratio: float = 0.05,
           sd_test: float = 0.3, sd_reference: float = 0.45) -> dict[str, Any]:
    """Seeded lognormal parallel groups (constructed; no published data set), one row each."""
    rng = np.random.default_rng(seed)
    log_t = rng.normal(4.0 + log_ratio, sd_test, n_test)
    log_r = rng.normal(4.0, sd_reference, n_reference)
    n = n_test + n_reference
    return {"subjects": [f"S{i:03d}" for i in range(n)],
            "sequences": ["T"] * n_test + ["R"] * n_reference, "periods": [1] * n,
            "treatments": ["T"] * n_test + ["R"] * n_reference,
            "values": np.exp(np.concatenate([log_t, log_r]))}


CASES = [(1, 12, 12), (2, 20, 9), (3, 7, 31), (4, 40, 40)]


@pytest.mark.parametrize(("seed", "n_test", "n_reference"), CASES)
def test_welch_interval_matches_scipy(seed: int, n_test: int, n_reference: int) -> None:
    """Source: scipy.stats.ttest_ind(equal_var=False) on the log values — its Welch statistic,
    Welch–Satterthwaite df and ``confidence_interval(0.90)`` of the difference of means."""
    data = groups(seed, n_test, n_reference)
    r = parallel_average_bioequivalence(**data, test="T", reference="R")
    logs = np.log(np.asarray(data["values"]))
    log_t, log_r = logs[:n_test], logs[n_test:]
    welch = sps.ttest_ind(log_t, log_r, equal_var=False)
    ci = welch.confidence_interval(confidence_level=0.90)
    assert r.df == pytest.approx(float(welch.df), rel=1e-12)
    assert r.log_difference == pytest.approx(log_t.mean() - log_r.mean(), rel=1e-12)
    assert r.standard_error is not None
    assert r.log_difference / r.standard_error == pytest.approx(float(welch.statistic), rel=1e-10)
    assert r.ratio_lower_percent == pytest.approx(100 * math.exp(ci.low), rel=1e-10)
    assert r.ratio_upper_percent == pytest.approx(100 * math.exp(ci.high), rel=1e-10)
    assert r.df is not None and not r.df.is_integer()


@pytest.mark.parametrize(("seed", "n_test", "n_reference"), CASES)
def test_tost_p_values_are_one_sided_welch_tests(seed: int, n_test: int, n_reference: int) -> None:
    """Source: Schuirmann 1987 two one-sided tests, each computed by scipy.stats.ttest_ind
    (equal_var=False, one-sided) on log values shifted by the log limit; CV per group =
    sqrt(exp(s²) − 1) with s the group's log SD from numpy (lognormal identity)."""
    data = groups(seed, n_test, n_reference, log_ratio=-0.1)
    r = parallel_average_bioequivalence(**data, test="T", reference="R")
    logs = np.log(np.asarray(data["values"]))
    log_t, log_r = logs[:n_test], logs[n_test:]
    lower = sps.ttest_ind(log_t - math.log(0.80), log_r, equal_var=False, alternative="greater")
    upper = sps.ttest_ind(log_t - math.log(1.25), log_r, equal_var=False, alternative="less")
    assert r.p_lower == pytest.approx(float(lower.pvalue), rel=1e-9)
    assert r.p_upper == pytest.approx(float(upper.pvalue), rel=1e-9)
    for group, values in ((r.test_group, log_t), (r.reference_group, log_r)):
        assert group.n == values.size
        assert group.cv_percent == pytest.approx(100 * math.sqrt(math.expm1(values.var(ddof=1))),
                                                 rel=1e-12)
    assert r.p_lower is not None and r.p_upper is not None
    assert (r.acceptance.verdict == "within_limits") == (max(r.p_lower, r.p_upper) < 0.05)


def test_json_keeps_the_crossover_keys_with_nulls() -> None:
    """Source: DESIGN.md §Average bioequivalence (public JSON paths) and issue 10 (design;
    log_difference.df carries the non-integer df); RFC 8259 JSON has no NaN."""
    r = parallel_average_bioequivalence(**groups(5, 10, 14), test="T", reference="R")
    doc = json.loads(json.dumps(parallel_average_bioequivalence_to_json(r), allow_nan=False))
    assert {"log_difference", "ratio_percent", "confidence_level", "tost",
            "within_subject_cv_percent", "sequence_effect", "acceptance", "design",
            "reference_variability"} <= set(doc)
    assert set(doc["log_difference"]) == {"estimate", "standard_error", "df"}
    assert doc["log_difference"]["df"] == r.df and doc["design"] == "parallel"
    assert doc["within_subject_cv_percent"] is None and doc["reference_variability"] is None
    assert doc["sequence_effect"]["f"] is None
    assert "parallel_design" in {w["code"] for w in doc["warnings"]}
    assert [g["role"] for g in doc["groups"]] == ["test", "reference"]


def test_degenerate_groups_give_null_not_nan() -> None:
    """Source: a sample variance needs two values (n − 1 = 0 otherwise; common practice);
    identical values have zero variance, so no t interval exists."""
    tiny = groups(6, 1, 5)
    r = parallel_average_bioequivalence(**tiny, test="T", reference="R")
    assert r.standard_error is None and r.df is None and r.acceptance.verdict == "undetermined"
    assert "group_too_small" in {d.code for d in r.diagnostics}
    json.dumps(parallel_average_bioequivalence_to_json(r), allow_nan=False)
    flat = groups(7, 4, 4)
    flat["values"] = np.full(8, 50.0)
    r = parallel_average_bioequivalence(**flat, test="T", reference="R")
    assert r.standard_error == 0.0 and r.p_lower is None
    assert "zero_residual_variance" in {d.code for d in r.diagnostics}


def test_bad_input_and_deadline() -> None:
    """Source: DESIGN.md (errors name the field) and the service.stats.deadlines contract."""
    data = groups(8, 5, 5)
    twice = {**data, "subjects": ["S000"] * 2 + data["subjects"][2:], "periods": [1, 2] + [1] * 8}
    with pytest.raises(ValueError, match="subjects: 'S000' have more than one observation"):
        parallel_average_bioequivalence(**twice, test="T", reference="R")
    with pytest.raises(ComputeTimeExceeded):
        parallel_average_bioequivalence(**data, test="T", reference="R", deadline=0.0)
