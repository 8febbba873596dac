"""Planning a bioequivalence study: one checked request in, one frozen answer out.

:func:`plan` takes the fields of a planning request, checks every one of them in one place
(:func:`validate_planning` raises :class:`PlanningInputError` with every (field, message) problem),
then finds the smallest balanced total that reaches the target power (exactly for approach
``none``, by simulation for the scaled approaches), the enrolment after dropouts and a power
curve around the answer. :func:`plan_to_json` gives the answer's JSON.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from service.stats.diagnostics import Diagnostic
from service.stats.power import DESIGNS, METHODS, PARALLEL_DF_NOTE, design_power
from service.stats.power_scaled import (
    APPROACHES,
    SimulatedPower,
    full_model_df,
    reference_df,
    simulated_power,
)
from service.stats.sample_size import (
    MINIMUM_TOTAL,
    CvUpperLimit,
    curve_points,
    cv_upper_limit,
    enrolment,
    smallest_total,
)

DEFAULT_MAX_TOTAL = 10_000
DEFAULT_SIMULATIONS = 100_000
MIN_SIMULATIONS, MAX_SIMULATIONS = 1_000, 1_000_000
MAX_CV = 5.0                      # 500 %: larger values are most likely percent given as fractions
MAX_DROPOUT = 0.9
STANDARD_LIMITS = (0.80, 1.25)
SCALED_DESIGNS = ("full_replicate_4", "full_replicate_3", "partial_replicate")

CAUTIONS = (
    "Planning assumptions are not guarantees: the power holds only if the true ratio and "
    "variability are as assumed, and a CV taken from an earlier study is itself an estimate with "
    "its own uncertainty.",
    "The protocol and a qualified statistician fix the sample size, the acceptance limits and the "
    "method of analysis before the study. This answer is not a substitute for the protocol's "
    "statistical analysis plan, a qualified statistician's review, or the applicable regulatory "
    "guidance (ICH, FDA, EMA, local authorities).",
    "Agencies differ on scaled approaches: widened limits (EMA 2010 §4.1.10) and reference-scaled "
    "average bioequivalence (FDA draft guidance on progesterone, 2011) belong to different "
    "jurisdictions, apply under different conditions and are not interchangeable; other agencies "
    "may accept neither.",
)
CROSSOVER_ASSUMPTIONS = (
    "The crossover plan assumes no carry-over, no subject-by-formulation interaction and, unless "
    "cv_reference is given for a scaled approach, the same within-subject CV for test and reference."
)
PARALLEL_ASSUMPTIONS = "For a parallel design cv is the total (between- plus within-subject) CV."

Problems = list[tuple[str, str]]


class PlanningInputError(ValueError):
    """Every problem of a planning request, each a (field, message) pair."""

    def __init__(self, problems: Sequence[tuple[str, str]]) -> None:
        self.problems = tuple(problems)
        super().__init__("; ".join(f"{field}: {message}" for field, message in self.problems))


class TargetNotReached(PlanningInputError):
    """No balanced total up to the cap reaches the target power."""

    def __init__(self, cap: int, power: float, target: float) -> None:
        self.cap, self.power_at_cap = cap, power
        super().__init__([("target_power", f"no balanced total up to {cap} subjects reaches power "
                           f"{target}; {cap} subjects give {power:.4f}")])


@dataclass(frozen=True)
class PlanningRequest:
    design: str
    cv: float
    ratio: float
    limits: tuple[float, float]
    alpha: float
    target_power: float
    dropout_rate: float
    approach: str
    cv_reference: float | None    # scaled approaches only; the CV when not given
    method: str
    simulations: int | None       # scaled approaches only
    seed: int | None              # scaled approaches only; drawn from OS entropy when not given
    max_total: int


@dataclass(frozen=True)
class CurvePoint:
    cv: float
    ratio: float
    power: float


@dataclass(frozen=True)
class Plan:
    request: PlanningRequest      # as used: defaults filled, the seed that was drawn
    total: int
    per_sequence: int
    power: float
    power_method: str             # exact | noncentral_t | shifted_t | normal | simulation
    monte_carlo_standard_error: float | None
    enrol_total: int
    enrol_per_sequence: int
    curve: tuple[CurvePoint, ...]
    sequences: tuple[str, ...]
    variance_factor: float
    df: int
    reference_df: int | None
    minimum_applies: bool
    method: str
    warnings: tuple[Diagnostic, ...]
    cautions: tuple[str, ...]


def validate_planning(
    *, design: str, cv: float, ratio: float = 0.95, limits: tuple[float, float] = STANDARD_LIMITS,
    alpha: float = 0.05, target_power: float = 0.80, dropout_rate: float = 0.0,
    approach: str = "none", cv_reference: float | None = None, method: str = "exact",
    simulations: int = DEFAULT_SIMULATIONS, seed: int | None = None,
    max_total: int = DEFAULT_MAX_TOTAL,
) -> PlanningRequest:
    """Check every field, collect every problem, raise :class:`PlanningInputError` if any."""
    problems: Problems = []
    if not isinstance(design, str) or design not in DESIGNS:
        problems.append(("design", f"{design!r} is not one of {', '.join(DESIGNS)}"))
    cv_ok = _fraction(problems, "cv", cv, upper=MAX_CV)
    pair: tuple[object, ...] = tuple(limits) if isinstance(limits, tuple | list) else ()
    lower = upper = None
    if len(pair) != 2:
        problems.append(("limits", f"{limits!r} is not a (lower, upper) pair"))
    else:
        lower = _number(problems, "limits.lower", pair[0])
        upper = _number(problems, "limits.upper", pair[1])
    if lower is not None and upper is not None and not 0.0 < lower < upper:
        problems.append(("limits", f"({lower}, {upper}) must satisfy 0 < lower < upper"))
        lower = upper = None
    ratio_ok = _number(problems, "ratio", ratio)
    if ratio_ok is not None and lower is not None and upper is not None \
            and not lower < ratio_ok < upper:
        problems.append(("ratio", f"the true ratio {ratio_ok} is not strictly inside the limits "
                         f"{lower}–{upper}: the power stays at or below alpha whatever the size"))
    alpha_ok = _number(problems, "alpha", alpha)
    if alpha_ok is not None and not 0.0 < alpha_ok < 0.5:
        problems.append(("alpha", f"{alpha_ok} must be between 0 and 0.5"))
    target = _number(problems, "target_power", target_power)
    if target is not None and not 0.0 < target < 1.0:
        problems.append(("target_power", f"{target} must be between 0 and 1"))
    dropout = _number(problems, "dropout_rate", dropout_rate)
    if dropout is not None and not 0.0 <= dropout <= MAX_DROPOUT:
        problems.append(("dropout_rate", f"{dropout} must be at least 0 and at most {MAX_DROPOUT}"))
    cap = _integer(problems, "max_total", max_total, lowest=MINIMUM_TOTAL)

    known_approach = isinstance(approach, str) and approach in APPROACHES
    scaled = known_approach and approach != "none"
    if not known_approach:
        problems.append(("approach", f"{approach!r} is not one of {', '.join(APPROACHES)}"))
    if not isinstance(method, str) or method not in METHODS:
        problems.append(("method", f"{method!r} is not one of {', '.join(METHODS)}"))
    cv_ref: float | None = None
    sims: int | None = None
    seed_ok: int | None = None
    if scaled:
        if isinstance(design, str) and design in DESIGNS and design not in SCALED_DESIGNS:
            problems.append(("approach", f"{approach} needs a design that repeats the reference: "
                             f"{', '.join(SCALED_DESIGNS)}"))
        if isinstance(method, str) and method in METHODS and method != "exact":
            problems.append(("method", f"{method} is a shortcut for approach none; the scaled "
                             "approaches are simulated from the exact distributions (use exact)"))
        if (lower, upper) != STANDARD_LIMITS and lower is not None and upper is not None:
            problems.append(("limits", "the scaled approaches define their own limits from "
                             "0.80–1.25; other limits are not defined for them"))
        cv_ref = cv_ok if cv_reference is None else _fraction(problems, "cv_reference",
                                                              cv_reference, upper=MAX_CV)
        sims = _integer(problems, "simulations", simulations, lowest=MIN_SIMULATIONS,
                        highest=MAX_SIMULATIONS)
        if seed is not None:
            seed_ok = _integer(problems, "seed", seed, lowest=0, highest=2**64 - 1)
    elif cv_reference is not None and approach == "none":
        problems.append(("cv_reference", "applies only to the scaled approaches"))
    if (problems or cv_ok is None or ratio_ok is None or lower is None or upper is None
            or alpha_ok is None or target is None or dropout is None or cap is None):
        raise PlanningInputError(problems)
    return PlanningRequest(design, cv_ok, ratio_ok, (lower, upper), alpha_ok, target, dropout,
                           approach, cv_ref, method, sims, seed_ok, cap)


def plan(
    *, design: str, cv: float, ratio: float = 0.95, limits: tuple[float, float] = STANDARD_LIMITS,
    alpha: float = 0.05, target_power: float = 0.80, dropout_rate: float = 0.0,
    approach: str = "none", cv_reference: float | None = None, method: str = "exact",
    simulations: int = DEFAULT_SIMULATIONS, seed: int | None = None,
    max_total: int = DEFAULT_MAX_TOTAL,
) -> Plan:
    """Sample size, power, enrolment and power curve of one planning request.

    Raises :class:`PlanningInputError` for bad input (every problem at once) and its subclass
    :class:`TargetNotReached` when no balanced total up to ``max_total`` reaches the target."""
    request = validate_planning(
        design=design, cv=cv, ratio=ratio, limits=limits, alpha=alpha, target_power=target_power,
        dropout_rate=dropout_rate, approach=approach, cv_reference=cv_reference, method=method,
        simulations=simulations, seed=seed, max_total=max_total)
    if request.approach != "none" and request.seed is None:
        request = replace(request, seed=int(np.random.SeedSequence().generate_state(1)[0]))
    return plan_checked(request)


def plan_checked(r: PlanningRequest) -> Plan:
    """The plan of a request that :func:`validate_planning` accepted."""
    d = DESIGNS[r.design]
    step = len(d.sequences)
    scaled = r.approach != "none"
    cv_ref = r.cv_reference if r.cv_reference is not None else r.cv

    def power_at(n: int) -> float:
        if not scaled:
            return design_power(d, n, cv=r.cv, ratio=r.ratio, limits=r.limits, alpha=r.alpha,
                                method=r.method)
        return _simulate(r, n, [(r.ratio, r.cv, cv_ref)])[0].power

    found = smallest_total(power_at, step=step, target=r.target_power, cap=r.max_total)
    if found.total is None:
        raise TargetNotReached(found.largest_tried, found.power, r.target_power)
    total = found.total

    grid = curve_points(r.cv, r.ratio, r.limits)
    mc_se: float | None = None
    if scaled:
        sims = _simulate(r, total, [(ratio, c, c * cv_ref / r.cv) for c, ratio in grid])
        curve = tuple(CurvePoint(c, ratio, s.power) for (c, ratio), s in zip(grid, sims, strict=True))
        mc_se = math.sqrt(found.power * (1.0 - found.power) / sims[0].simulations)  # binomial
        df, ref_df = full_model_df(d, total), reference_df(d, total, r.approach)
    else:
        curve = tuple(CurvePoint(c, ratio, power_at_point(r, total, c, ratio)) for c, ratio in grid)
        df, ref_df = d.df(total), None

    warnings: list[Diagnostic] = []
    if found.minimum_applies:
        warnings.append(Diagnostic("minimum_total_applies", (
            f"EMA 2010 §4.1.3 asks for at least {MINIMUM_TOTAL} evaluable subjects; "
            f"{total} subjects already give power {found.power:.4f} ≥ {r.target_power}, so the "
            "minimum, not the power, sets the total")))
    if r.method != "exact":
        warnings.append(Diagnostic("power_shortcut", (
            f"the {r.method} shortcut approximates the exact power; the total may differ from the "
            "exact method's")))
    enrol = enrolment(total, r.dropout_rate, step)
    method = _method_text(r, d.variance_factor, df, ref_df)
    cautions = (*CAUTIONS, PARALLEL_ASSUMPTIONS if not d.crossover else CROSSOVER_ASSUMPTIONS,
                *(() if d.crossover else (PARALLEL_DF_NOTE,)), f"Used: {method}")
    return Plan(r, total, total // step, found.power, "simulation" if scaled else r.method, mc_se,
                enrol, enrol // step, curve, d.sequences, d.variance_factor, df, ref_df,
                found.minimum_applies, method, tuple(warnings), cautions)


def _simulate(
    r: PlanningRequest, total: int, points: Sequence[tuple[float, float, float]],
) -> tuple[SimulatedPower, ...]:
    if r.simulations is None or r.seed is None:
        raise ValueError("seed: a scaled approach needs simulations and a seed (plan() draws one)")
    return simulated_power(DESIGNS[r.design], total, points, approach=r.approach, alpha=r.alpha,
                           simulations=r.simulations, seed=r.seed)


def power_at_point(r: PlanningRequest, total: int, cv: float, ratio: float) -> float:
    """Power of approach ``none`` for the request's design, limits, α and method at (cv, ratio)."""
    return design_power(DESIGNS[r.design], total, cv=cv, ratio=ratio, limits=r.limits,
                        alpha=r.alpha, method=r.method)


def _method_text(r: PlanningRequest, b: float, df: int, ref_df: int | None) -> str:
    level = f"{100.0 * (1.0 - 2.0 * r.alpha):g} %"
    limits = f"{100.0 * r.limits[0]:.2f}–{100.0 * r.limits[1]:.2f} %"
    if r.approach == "none":
        how = {"exact": "exact power (Owen's Q integral, Owen 1965; Phillips 1990), Gauss–Legendre "
                        "quadrature",
               "noncentral_t": "noncentral t shortcut P(T₁ ≥ t) + P(T₂ ≤ −t) − 1",
               "shifted_t": "shifted central t shortcut", "normal": "normal shortcut"}[r.method]
        return (f"design {r.design}; two one-sided tests at α = {r.alpha:g} (the {level} interval "
                f"within {limits}); {how}; Var(δ̂) = {b:g}·σ²/n with σ² = ln(1 + CV²); "
                f"df = {df} at the answer")
    rule = ("widened limits, EMA 2010 §4.1.10 (s_wR from the reference-only model)"
            if r.approach == "widened_limits" else
            "reference-scaled average bioequivalence, FDA draft guidance on progesterone 2011, "
            "upper bound by Howe's method (Hyslop, Hsuan & Holder 2000)")
    return (f"design {r.design}; {rule}; point estimate within 80.00–125.00 %; {level} interval; "
            f"power from {r.simulations} simulated studies (seed {r.seed}) drawn from the exact "
            f"normal and Wishart distributions of the sequence means and cross-products; CV_wT = "
            f"{r.cv:g}, CV_wR = {r.cv_reference if r.cv_reference is not None else r.cv:g}; df of "
            f"the full model {df}, of s²_wR {ref_df}; decisions unrounded; Monte-Carlo standard "
            "error sqrt(p(1 − p)/N)")


def plan_to_json(p: Plan) -> dict[str, Any]:
    """The planning answer: the issue's shape plus ``assumptions``, ``design``, ``method``,
    ``warnings``."""
    r = p.request
    return {
        "sample_size": {"total": p.total, "per_sequence": p.per_sequence},
        "power": p.power,
        "power_method": p.power_method,
        "monte_carlo_standard_error": p.monte_carlo_standard_error,
        "enrol": {"total": p.enrol_total, "per_sequence": p.enrol_per_sequence},
        "curve": [{"cv": c.cv, "ratio": c.ratio, "power": c.power} for c in p.curve],
        "cautions": list(p.cautions),
        "assumptions": {
            "design": r.design, "cv": r.cv, "cv_reference": r.cv_reference, "ratio": r.ratio,
            "limits": {"lower": r.limits[0], "upper": r.limits[1]}, "alpha": r.alpha,
            "target_power": r.target_power, "dropout_rate": r.dropout_rate, "approach": r.approach,
            "method": r.method, "simulations": r.simulations, "seed": r.seed,
            "max_total": r.max_total},
        "design": {"sequences": list(p.sequences), "variance_factor": p.variance_factor,
                   "df": p.df, "reference_df": p.reference_df,
                   "minimum_total": MINIMUM_TOTAL, "minimum_applies": p.minimum_applies},
        "method": p.method,
        "warnings": [{"code": w.code, "message": w.message} for w in p.warnings],
    }


def plan_cv_upper_limit(cv: float, df: int, level: float = 0.80) -> CvUpperLimit:
    """Check the inputs of :func:`service.stats.sample_size.cv_upper_limit` and compute it: the
    one-sided upper ``level`` confidence limit of a CV estimated on ``df`` degrees of freedom."""
    problems: Problems = []
    cv_ok = _fraction(problems, "cv", cv, upper=MAX_CV)
    df_ok = _integer(problems, "df", df, lowest=1)
    level_ok = _number(problems, "level", level)
    if level_ok is not None and not 0.5 <= level_ok < 1.0:
        problems.append(("level", f"{level_ok} must be at least 0.5 and below 1"))
    if problems or cv_ok is None or df_ok is None or level_ok is None:
        raise PlanningInputError(problems)
    return cv_upper_limit(cv_ok, df_ok, level_ok)


def cv_upper_limit_to_json(u: CvUpperLimit) -> dict[str, Any]:
    warnings = [] if u.cv_upper is not None else [
        {"code": "cv_upper_not_finite", "message": "the upper limit of the CV overflows: no value"}]
    return {"cv": u.cv, "df": u.df, "level": u.level, "cv_upper": u.cv_upper,
            "method": "s²_upper = df·s²/χ²_{1−level, df} (lower-tail quantile), s² = ln(1 + CV²), "
                      "CV_upper = sqrt(exp(s²_upper) − 1)",
            "warnings": warnings}


def _number(problems: Problems, field: str, value: object) -> float | None:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        problems.append((field, f"{value!r} is not a finite number"))
        return None
    return float(value)


def _fraction(problems: Problems, field: str, value: object, *, upper: float) -> float | None:
    x = _number(problems, field, value)
    if x is not None and not 0.0 < x <= upper:
        problems.append((field, f"{x} must be above 0 and at most {upper:g} (a fraction: 0.25 "
                         "for 25 %)"))
        return None
    return x


def _integer(problems: Problems, field: str, value: object, *, lowest: int,
             highest: int | None = None) -> int | None:
    if isinstance(value, bool) or not isinstance(value, int):
        problems.append((field, f"{value!r} is not a whole number"))
        return None
    if value < lowest or (highest is not None and value > highest):
        bound = f"at least {lowest}" + ("" if highest is None else f" and at most {highest}")
        problems.append((field, f"{value} must be {bound}"))
        return None
    return value
