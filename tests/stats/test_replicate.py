from __future__ import annotations

import json
import math
import warnings
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from statsmodels.stats.anova import anova_lm
from statsmodels.tools.sm_exceptions import SingularMatrixWarning

from service.stats.deadlines import ComputeTimeExceeded
from service.stats.equivalence import average_bioequivalence, average_bioequivalence_to_json
from service.stats.replicate import (
    reference_variability,
    replicate_average_bioequivalence,
    replicate_average_bioequivalence_to_json,
)
from tests.stats.study_tables import columns, simulate_table

DESIGNS = {
    "TRTR/RTRT": {"TRTR": 9, "RTRT": 9},
    "TRT/RTR": {"TRT": 10, "RTR": 10},
    "TRR/RTR/RRT": {"TRR": 7, "RTR": 7, "RRT": 7},
    "TRRT/RTTR": {"TRRT": 9, "RTTR": 9},
    "TRTR/RTRT/TRRT/RTTR": {"TRTR": 5, "RTRT": 5, "TRRT": 5, "RTTR": 5},
}
TEST_REPLICATED = {"TRTR/RTRT": True, "TRT/RTR": True, "TRR/RTR/RRT": False, "TRRT/RTTR": True,
                   "TRTR/RTRT/TRRT/RTTR": True}


def table(name: str, balanced: bool) -> pd.DataFrame:
    """Balanced: equal sequences, no missing value. Unbalanced: one more subject in the first
    sequence, one fewer in the last, about 10 % of the values missing, and the first subject
    without any test value (so it must be left out of the ABE model)."""
    orders = dict(DESIGNS[name])
    seed = 100 + sorted(DESIGNS).index(name) + (0 if balanced else 50)
    if balanced:
        return simulate_table(seed, orders)
    first, last = list(orders)[0], list(orders)[-1]
    orders[first] += 1
    orders[last] -= 1
    df = simulate_table(seed, orders, drop_fraction=0.1)
    return df[~((df["subject"] == "S001") & (df["treatment"] == "T"))].reset_index(drop=True)


CASES = [(name, balanced) for name in sorted(DESIGNS) for balanced in (True, False)]


def ols_within(data: pd.DataFrame) -> object:
    """subject + period on one treatment's observations. In most replicate designs the periods
    of one treatment are aliased with sequence, hence with the subjects: the design is
    rank-deficient on purpose and statsmodels' pseudo-inverse fit (which warns) is what we want."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SingularMatrixWarning)
        return smf.ols("np.log(y) ~ C(subject) + C(period)", data=data).fit()


def analysed_subjects(df: pd.DataFrame) -> pd.DataFrame:
    has = df.groupby("subject")["treatment"].agg(lambda t: {"T", "R"} <= set(t))
    return df[df["subject"].isin(has[has].index)].reset_index(drop=True)


@pytest.mark.parametrize(("name", "balanced"), CASES)
def test_method_a_matches_statsmodels_ols(name: str, balanced: bool) -> None:
    """Source: statsmodels OLS ``np.log(y) ~ C(subject) + C(period) + C(treatment)`` on all
    observations of the subjects with a test and a reference value (EMA Q&A method A, fixed
    effects; sequence is nested in subject), T − R by ``t_test``, 90 % interval by conf_int."""
    df = table(name, balanced)
    r = replicate_average_bioequivalence(**columns(df), test="T", reference="R")
    a = r.average_bioequivalence
    used = analysed_subjects(df)
    fit = smf.ols("np.log(y) ~ C(subject) + C(period) + C(treatment)", data=used).fit()
    tt = fit.t_test("C(treatment)[T.T] = 0")
    ci = np.asarray(tt.conf_int(alpha=0.10)).ravel()
    assert a.df == int(fit.df_resid)
    assert a.subjects == used["subject"].nunique() and a.observations == len(used)
    assert a.log_difference == pytest.approx(float(np.squeeze(tt.effect)), rel=1e-9, abs=1e-12)
    assert a.standard_error == pytest.approx(float(np.squeeze(tt.sd)), rel=1e-9)
    assert a.ratio_lower_percent == pytest.approx(100 * math.exp(ci[0]), rel=1e-9)
    assert a.ratio_upper_percent == pytest.approx(100 * math.exp(ci[1]), rel=1e-9)
    assert a.residual_mean_square == pytest.approx(float(fit.mse_resid), rel=1e-9)
    left = {s.subject for s in r.left_out}
    assert left == set(df["subject"]) - set(used["subject"])
    assert ("S001" in left) == (not balanced)


@pytest.mark.parametrize(("name", "balanced"), CASES)
def test_within_subject_variability_matches_statsmodels_ols(name: str, balanced: bool) -> None:
    """Source: statsmodels OLS ``np.log(y) ~ C(subject) + C(period)`` on the reference
    observations only (EMA Q&A: s²_wR is its residual mean square), likewise on the test
    observations where the test is replicated; CV = sqrt(exp(s²) − 1) (lognormal identity)."""
    df = table(name, balanced)
    v = replicate_average_bioequivalence(**columns(df), test="T",
                                         reference="R").reference_variability
    ref: Any = ols_within(df[df["treatment"] == "R"])
    assert v.df == int(ref.df_resid)
    assert v.s_wr == pytest.approx(math.sqrt(ref.mse_resid), rel=1e-9)
    assert v.cv_wr_percent == pytest.approx(100 * math.sqrt(math.expm1(ref.mse_resid)), rel=1e-9)
    if TEST_REPLICATED[name]:
        tst: Any = ols_within(df[df["treatment"] == "T"])
        assert v.df_wt == int(tst.df_resid)
        assert v.s_wt == pytest.approx(math.sqrt(tst.mse_resid), rel=1e-9)
        assert v.cv_wt_percent == pytest.approx(100 * math.sqrt(math.expm1(tst.mse_resid)),
                                                rel=1e-9)
    else:
        assert v.s_wt is None and v.cv_wt_percent is None and v.df_wt is None
        assert "test_not_replicated" in {d.code for d in v.diagnostics}
    alone = reference_variability(**columns(df), test="T", reference="R")
    assert alone == v


@pytest.mark.parametrize(("name", "balanced"), CASES)
def test_sequence_effect_on_complete_subjects(name: str, balanced: bool) -> None:
    """Source: statsmodels ``anova_lm`` of ``total ~ C(sequence)`` on the per-subject sums of
    log values of the subjects with a value in every period (between-subject stratum). Where
    the sequences give the test a different number of times (TRT/RTR) the sums mix sequence
    and treatment (design fact, common practice), so no F is reported."""
    df = table(name, balanced)
    a = replicate_average_bioequivalence(**columns(df), test="T",
                                         reference="R").average_bioequivalence
    codes = {d.code for d in a.diagnostics}
    if name == "TRT/RTR":
        assert a.sequence_f is None and "sequence_effect_not_separable" in codes
        return
    used = analysed_subjects(df)
    n_periods = used.groupby("subject")["period"].count()
    complete = n_periods[n_periods == used.groupby("subject")["sequence"].first().str.len()].index
    totals = (used[used["subject"].isin(complete)].assign(ly=np.log(used["y"]))
              .groupby("subject").agg(total=("ly", "sum"), sequence=("sequence", "first")))
    anova = anova_lm(smf.ols("total ~ C(sequence)", data=totals).fit())
    assert a.sequence_f == pytest.approx(float(anova.loc["C(sequence)", "F"]), rel=1e-9)
    assert a.sequence_p == pytest.approx(float(anova.loc["C(sequence)", "PR(>F)"]), rel=1e-8)
    assert a.sequence_df_denominator == int(anova.loc["Residual", "df"])
    assert ("sequence_effect_complete_subjects" in codes) == (not balanced)


def test_complete_two_period_block_equals_the_crossover_fit() -> None:
    """Source: a table with no repeated treatment is a crossover; the replicate entry point
    refuses it and names the design (issue 10: the design is recognised from the table), while
    the crossover fit of a replicate's complete subjects equals method A on them (same model,
    statsmodels-checked above)."""
    df = table("TRTR/RTRT", True)
    r = replicate_average_bioequivalence(**columns(df), test="T", reference="R")
    crossover = average_bioequivalence(**columns(df), test="T", reference="R")
    assert r.average_bioequivalence.log_difference == pytest.approx(crossover.log_difference,
                                                                    rel=1e-12)
    two_by_two = simulate_table(5, {"TR": 6, "RT": 6})
    with pytest.raises(ValueError, match="design: not a supported replicate design: the table "
                                         "is a crossover design"):
        replicate_average_bioequivalence(**columns(two_by_two), test="T", reference="R")


def test_json_keeps_the_crossover_keys_and_adds_the_replicate_ones() -> None:
    """Source: DESIGN.md §Average bioequivalence (the public JSON contract) and issue 10
    (design, reference_variability {s_wr, cv_wr_percent, df, s_wt, cv_wt_percent}); RFC 8259
    JSON has no NaN."""
    df = table("TRR/RTR/RRT", False)
    r = replicate_average_bioequivalence(**columns(df), test="T", reference="R")
    doc = json.loads(json.dumps(replicate_average_bioequivalence_to_json(r), allow_nan=False))
    crossover_keys = set(average_bioequivalence_to_json(r.average_bioequivalence))
    assert crossover_keys <= set(doc)
    assert doc["design"] == "replicate"
    assert {"s_wr", "cv_wr_percent", "df", "s_wt", "cv_wt_percent"} <= set(doc["reference_variability"])
    assert doc["reference_variability"]["s_wt"] is None
    assert "test_not_replicated" in {w["code"] for w in doc["warnings"]}
    assert [s["subject"] for s in doc["subjects_left_out"]] == [s.subject for s in r.left_out]
    assert doc["subjects_left_out"] and all("no test value" in s["reason"] or "no reference value"
                                            in s["reason"] for s in doc["subjects_left_out"])


def test_bad_values_and_deadline() -> None:
    """Source: DESIGN.md (errors name the field and entry) and the service.stats.deadlines
    contract (a passed deadline raises ComputeTimeExceeded)."""
    df = table("TRTR/RTRT", True)
    cols = columns(df)
    cols["values"] = cols["values"].copy()
    cols["values"][3] = 0.0
    with pytest.raises(ValueError, match=r"values: entries \[3\]"):
        replicate_average_bioequivalence(**cols, test="T", reference="R")
    with pytest.raises(ComputeTimeExceeded):
        replicate_average_bioequivalence(**columns(df), test="T", reference="R", deadline=0.0)
