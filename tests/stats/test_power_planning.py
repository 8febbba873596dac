"""Sample size, enrolment, curve, validation and the JSON answer (service.stats.planning)."""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats as sps

from service.stats.planning import (
    CAUTIONS,
    PlanningInputError,
    TargetNotReached,
    cv_upper_limit_to_json,
    plan,
    plan_cv_upper_limit,
    plan_to_json,
    validate_planning,
)
from service.stats.power import DESIGNS, design_power
from service.stats.power_scaled import simulated_power
from service.stats.sample_size import enrolment, smallest_total


@pytest.mark.parametrize(("cv", "target", "total"), [
    (0.20, 0.80, 20), (0.25, 0.80, 28), (0.30, 0.80, 40), (0.40, 0.80, 66),
    (0.20, 0.90, 26), (0.30, 0.90, 52),
])
def test_classical_two_by_two_sample_sizes(cv: float, target: float, total: int) -> None:
    """Source: published exact sample-size tables for the 2×2 crossover at ratio 0.95, α 0.05,
    limits 0.80–1.25 (from memory)."""
    p = plan(design="two_by_two", cv=cv, target_power=target)
    assert p.total == total and p.per_sequence == total // 2
    assert p.power >= target
    assert design_power(DESIGNS["two_by_two"], total - 2, cv=cv, ratio=0.95,
                        limits=(0.80, 1.25), alpha=0.05) < target


def test_power_at_twenty_for_cv_twenty_percent() -> None:
    """Source: published exact power of the 2×2 design, CV 20 %, ratio 0.95, n = 20: 0.8347
    (from memory, four decimals)."""
    assert plan(design="two_by_two", cv=0.20).power == pytest.approx(0.8347, abs=5e-5)


@given(name=st.sampled_from(sorted(DESIGNS)), cv=st.floats(0.05, 0.8), ratio=st.floats(0.85, 1.15),
       target=st.floats(0.5, 0.95))
@settings(max_examples=40, deadline=None)
def test_answer_is_the_smallest_balanced_total(name: str, cv: float, ratio: float,
                                               target: float) -> None:
    """Source: the definition of the answer (issue 11 item 3): power ≥ target at the total and
    below it one sequence-step lower, unless the EMA 2010 minimum of 12 binds."""
    d = DESIGNS[name]
    try:
        p = plan(design=name, cv=cv, ratio=ratio, target_power=target)
    except TargetNotReached:
        assert design_power(d, 10_000 // len(d.sequences) * len(d.sequences), cv=cv, ratio=ratio,
                            limits=(0.80, 1.25), alpha=0.05) < target
        return
    step = len(d.sequences)
    assert p.total % step == 0 and p.total >= 12 and p.power >= target
    if p.minimum_applies:
        assert p.total == 12
    else:
        assert design_power(d, p.total - step, cv=cv, ratio=ratio, limits=(0.80, 1.25),
                            alpha=0.05) < target


def test_minimum_of_twelve_binds_and_says_so() -> None:
    """Source: EMA 2010 (CPMP/EWP/QWP/1401/98 Rev.1) §4.1.3, at least 12 evaluable subjects; the
    exact power shows that fewer subjects would reach the target."""
    p = plan(design="two_by_two", cv=0.08)
    assert p.total == 12 and p.minimum_applies
    assert design_power(DESIGNS["two_by_two"], 8, cv=0.08, ratio=0.95, limits=(0.80, 1.25),
                        alpha=0.05) >= 0.80
    assert [w.code for w in p.warnings] == ["minimum_total_applies"]
    assert plan_to_json(p)["design"]["minimum_applies"] is True


@pytest.mark.parametrize(("total", "rate", "step", "enrol"), [
    (20, 0.2, 2, 26), (20, 0.0, 2, 20), (24, 0.15, 3, 30), (40, 0.1, 2, 46), (12, 0.5, 3, 24),
    (30, 0.1, 3, 36)])
def test_enrolment_after_dropouts_stays_balanced(total: int, rate: float, step: int,
                                                 enrol: int) -> None:
    """Source: arithmetic (common practice): the smallest multiple of the sequence count E with
    E·(1 − rate) ≥ total; 20/(1 − 0.2) = 25 exactly, then 26 for two equal sequences."""
    assert enrolment(total, rate, step) == enrol


def test_enrolment_in_the_answer() -> None:
    """Source: arithmetic as above, through plan(): 40 subjects at 10 % dropout → 44.4 → 46."""
    p = plan(design="two_by_two", cv=0.30, dropout_rate=0.10)
    assert (p.total, p.enrol_total, p.enrol_per_sequence) == (40, 46, 23)


def test_cap_gives_a_problem_with_the_power_at_the_cap() -> None:
    """Source: issue 11 item 4 (a target that no total up to the cap reaches is refused); the
    power at the cap from the exact integral."""
    with pytest.raises(TargetNotReached) as caught:
        plan(design="two_by_two", cv=0.30, max_total=31)
    assert caught.value.problems[0][0] == "target_power"
    assert caught.value.cap == 30
    assert caught.value.power_at_cap == pytest.approx(design_power(
        DESIGNS["two_by_two"], 30, cv=0.30, ratio=0.95, limits=(0.80, 1.25), alpha=0.05))
    assert isinstance(caught.value, PlanningInputError)


@pytest.mark.parametrize("ratio", [1.30, 0.80, 1.25, 0.5])
def test_true_ratio_outside_the_limits_is_refused(ratio: float) -> None:
    """Source: the interval test cannot pass more often than α when the true ratio is on or outside
    a limit (Schuirmann 1987), so no sample size exists; issue 11 item 4 asks for a problem."""
    with pytest.raises(PlanningInputError) as caught:
        plan(design="two_by_two", cv=0.2, ratio=ratio)
    assert [f for f, _ in caught.value.problems] == ["ratio"]


def test_every_problem_is_reported_at_once() -> None:
    """Source: the house rule (validate at the edge, collect every problem); field names as in
    the request of issue 11 item 4."""
    with pytest.raises(PlanningInputError) as caught:
        validate_planning(design="latin_square", cv=20.0, ratio=float("nan"), limits=(1.25, 0.8),
                          alpha=0.7, target_power=1.0, dropout_rate=1.0, approach="wider",
                          method="guess", max_total=5)
    fields = {f for f, _ in caught.value.problems}
    assert fields == {"design", "cv", "ratio", "limits", "alpha", "target_power", "dropout_rate",
                      "approach", "method", "max_total"}
    assert "fraction" in dict(caught.value.problems)["cv"]


@pytest.mark.parametrize(("kwargs", "field"), [
    ({"design": "two_by_two", "approach": "widened_limits"}, "approach"),
    ({"design": "parallel", "approach": "reference_scaled"}, "approach"),
    ({"design": "full_replicate_4", "approach": "reference_scaled", "method": "normal"}, "method"),
    ({"design": "full_replicate_4", "approach": "widened_limits", "limits": (0.9, 1.11)}, "limits"),
    ({"design": "full_replicate_4", "cv_reference": 0.4}, "cv_reference"),
    ({"design": "full_replicate_4", "approach": "widened_limits", "simulations": 10}, "simulations"),
    ({"design": "full_replicate_4", "approach": "widened_limits", "seed": -1}, "seed"),
    ({"design": "two_by_two", "alpha": True}, "alpha"),
])
def test_combinations_that_have_no_meaning_are_refused(kwargs: dict[str, Any], field: str) -> None:
    """Source: EMA 2010 §4.1.10 and the FDA progesterone draft guidance 2011 define scaling only for
    designs that repeat the reference and only from 80.00–125.00 %; the shortcuts are for unscaled
    limits; booleans are not numbers."""
    with pytest.raises(PlanningInputError) as caught:
        validate_planning(cv=0.4, **kwargs)
    assert field in {f for f, _ in caught.value.problems}


def test_scaled_plan_is_reproducible_with_its_seed_and_reports_its_standard_error() -> None:
    """Source: binomial standard error sqrt(p(1 − p)/N) (common practice); the same seed repeats
    the plan; the total one step lower fails the target with the same seed (definition)."""
    args: dict[str, Any] = {"design": "full_replicate_4", "cv": 0.45, "ratio": 0.90,
                            "approach": "widened_limits", "simulations": 20_000, "seed": 42}
    first, again = plan(**args), plan(**args)
    assert first == again
    assert first.power_method == "simulation"
    assert first.monte_carlo_standard_error == pytest.approx(
        math.sqrt(first.power * (1 - first.power) / 20_000), rel=1e-12)
    below = simulated_power(DESIGNS["full_replicate_4"], first.total - 2, [(0.90, 0.45, 0.45)],
                            approach="widened_limits", alpha=0.05, simulations=20_000, seed=42)
    assert below[0].power < 0.80 <= first.power
    centre = [c for c in first.curve if c.cv == 0.45 and c.ratio == 0.90]
    assert [c.power for c in centre] == [first.power]


def test_seed_is_drawn_and_reported_when_not_given() -> None:
    """Source: the house rule that the inputs hold the seed that was used (DESIGN.md)."""
    p = plan(design="partial_replicate", cv=0.4, approach="reference_scaled", simulations=5_000)
    seed = p.request.seed
    assert isinstance(seed, int)
    again = plan(design="partial_replicate", cv=0.4, approach="reference_scaled",
                 simulations=5_000, seed=seed)
    assert again.power == p.power and plan_to_json(p)["assumptions"]["seed"] == seed


def test_json_answer_has_the_shape_of_the_issue() -> None:
    """Source: issue 11 items 4 and 6 (answer fields; cautions on every answer); JSON without
    NaN (RFC 8259 has no NaN)."""
    p = plan(design="full_replicate_3", cv=0.3, dropout_rate=0.1)
    answer = plan_to_json(p)
    text = json.dumps(answer, allow_nan=False)
    assert json.loads(text) == answer
    for key in ("sample_size", "power", "power_method", "monte_carlo_standard_error", "enrol",
                "curve", "cautions"):
        assert key in answer
    assert set(answer["sample_size"]) == {"total", "per_sequence"}
    assert answer["power_method"] == "exact" and answer["monte_carlo_standard_error"] is None
    assert all(set(c) == {"cv", "ratio", "power"} for c in answer["curve"])
    cvs = [c["power"] for c in answer["curve"] if c["ratio"] == 0.95]
    assert cvs == sorted(cvs, reverse=True)                      # power falls with CV
    for caution in CAUTIONS:
        assert caution in answer["cautions"]
    assert any("80.00–125.00 %" in c for c in answer["cautions"])


def test_parallel_plan_mentions_its_df_choice() -> None:
    """Source: two groups of n/2, Var(δ̂) = 4σ²/n, pooled df n − 2 (common practice)."""
    p = plan(design="parallel", cv=0.3)
    assert p.df == p.total - 2 and p.per_sequence * 2 == p.total
    assert any("Welch" in c for c in p.cautions)


def test_search_stops_at_the_cap() -> None:
    """Source: definition of the search: multiples of the step between the floor and the cap."""
    calls: list[int] = []

    def power(n: int) -> float:
        calls.append(n)
        return n / 1000.0

    found = smallest_total(power, step=3, target=0.9, cap=100)
    assert found.total is None and found.largest_tried == 99 and max(calls) == 99
    found = smallest_total(power, step=3, target=0.05, cap=100)
    assert found.total == 51 and all(n % 3 == 0 for n in calls)


def test_cv_upper_limit_covers_at_its_level() -> None:
    """Source: definition of a one-sided confidence limit, checked by simulation of
    s² ~ σ²·χ²_df/df (numpy); and the formula with scipy.stats.chi2 at CV 25 %, df 20."""
    u = plan_cv_upper_limit(0.25, 20, 0.80)
    s2 = math.log1p(0.25**2)
    assert u.cv_upper == pytest.approx(math.sqrt(math.expm1(20 * s2 / sps.chi2.ppf(0.2, 20))))
    rng = np.random.default_rng(8)
    sigma2 = math.log1p(0.3**2)
    s2_hat = sigma2 * rng.chisquare(12, 100_000) / 12
    covered = float(np.mean(12 * s2_hat / sps.chi2.ppf(0.2, 12) >= sigma2))
    assert abs(covered - 0.80) < 4 * math.sqrt(0.8 * 0.2 / 100_000)
    assert cv_upper_limit_to_json(u)["cv_upper"] == u.cv_upper


def test_cv_upper_limit_refuses_bad_input() -> None:
    """Source: the house rule (every problem, by field)."""
    with pytest.raises(PlanningInputError) as caught:
        plan_cv_upper_limit(-0.1, 0, 1.5)
    assert {f for f, _ in caught.value.problems} == {"cv", "df", "level"}
