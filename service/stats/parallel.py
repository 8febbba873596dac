"""Average bioequivalence of two parallel groups on the log scale (Welch's t).

d = mean(log y | test) − mean(log y | reference); SE = sqrt(s²_T/n_T + s²_R/n_R) (Welch 1947,
Biometrika 34:28–35); df = SE⁴ / [(s²_T/n_T)²/(n_T − 1) + (s²_R/n_R)²/(n_R − 1)]
(Welch–Satterthwaite; Satterthwaite 1946, Biometrics Bulletin 2:110–114), not an integer.
The ratio interval is exp(d ± t(1 − α/2, df)·SE); the two one-sided tests use the same t
(Schuirmann 1987). CV per group = sqrt(exp(s²) − 1) of that group's log values.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.stats.diagnostics import Diagnostic
from service.stats.equivalence import (
    RatioAcceptance,
    check_limits,
    cv_percent,
    exp_percent,
    finite_or_none,
    interval_and_tost,
    judge_ratio_interval,
    ratio_acceptance_to_json,
)
from service.stats.observations import code_observations
from service.stats.phases import check_deadline

PARALLEL_METHOD = (
    "Parallel groups on natural-log values: difference of the group means (test − reference) "
    "with Welch's standard error and Welch–Satterthwaite degrees of freedom (not an integer); "
    "two-sided t interval of the difference, exponentiated to a ratio in percent; two one-sided "
    "tests (Schuirmann 1987) with the same t. CV per group = 100·sqrt(exp(s²) − 1) of the "
    "group's log standard deviation. No within-subject CV, sequence effect or reference "
    "variability exists in this design (one observation per subject)."
)


@dataclass(frozen=True)
class GroupSummary:
    treatment: str
    n: int
    mean_log: float
    sd_log: float | None  # None below two subjects
    cv_percent: float | None


@dataclass(frozen=True)
class ParallelAverageBioequivalence:
    test: str
    reference: str
    subjects: int  # in the test and reference groups
    observations: int
    confidence_level: float
    log_difference: float
    standard_error: float | None
    df: float | None  # Welch–Satterthwaite
    ratio_percent: float | None
    ratio_lower_percent: float | None
    ratio_upper_percent: float | None
    p_lower: float | None
    p_upper: float | None
    test_group: GroupSummary
    reference_group: GroupSummary
    acceptance: RatioAcceptance
    diagnostics: tuple[Diagnostic, ...]
    method: str = PARALLEL_METHOD
    design: str = "parallel"


def parallel_average_bioequivalence(
    *, subjects: Sequence[str], sequences: Sequence[str], periods: Sequence[int],
    treatments: Sequence[str], values: NDArray[np.float64], test: str, reference: str,
    confidence_level: float = 0.90, limits_percent: tuple[float, float] = (80.0, 125.0),
    deadline: float | None = None,
) -> ParallelAverageBioequivalence:
    """Welch-based ABE of ``test`` against ``reference``; one observation per subject.

    ``sequences`` and ``periods`` are only checked (one sequence and one period per subject);
    groups of other treatments are ignored with a warning."""
    coded = code_observations(subjects, sequences, periods, treatments, values, test, reference,
                              confidence_level, require_test_and_reference=False)
    per_subject = np.bincount(coded.subject_codes, minlength=len(coded.subject_labels))
    repeated = [coded.subject_labels[i] for i in np.flatnonzero(per_subject > 1)[:10]]
    if repeated:
        raise ValueError(f"subjects: {', '.join(map(repr, repeated))} have more than one "
                         "observation; parallel groups have one per subject")
    limits = check_limits(limits_percent)
    check_deadline(deadline, "the group summaries", 1, 2)
    diagnostics: list[Diagnostic] = []
    others = sorted(set(coded.treatment_labels) - {test, reference})
    if others:
        diagnostics.append(Diagnostic("other_groups_ignored", f"groups {', '.join(others)} are "
                                      "not part of the test–reference comparison"))
    groups = [_group(coded.log_values[coded.treatment_codes == coded.treatment_labels.index(t)], t)
              for t in (test, reference)]
    g_t, g_r = groups
    estimate = g_t.mean_log - g_r.mean_log
    se: float | None = None
    df: float | None = None
    lower = upper = p_lower = p_upper = None
    reason = "no confidence interval could be computed"
    if g_t.sd_log is None or g_r.sd_log is None:
        small = [g.treatment for g in groups if g.sd_log is None]
        diagnostics.append(Diagnostic("group_too_small", f"group(s) {', '.join(small)} have fewer "
                                      "than two subjects: no standard deviation, no interval"))
        reason = "a group has fewer than two subjects"
    else:
        v_t, v_r = g_t.sd_log**2 / g_t.n, g_r.sd_log**2 / g_r.n
        se = math.sqrt(v_t + v_r)  # Welch 1947
        noise_floor = 1e-12 * max(1.0, float(np.max(np.abs(coded.log_values))))
        if se <= noise_floor:
            diagnostics.append(Diagnostic("zero_residual_variance", "the log values do not vary "
                                          "within either group: no interval or tests"))
            reason = "the variance within the groups is zero"
            se = 0.0
        else:
            # Welch–Satterthwaite df (Satterthwaite 1946 eq. 17; Welch 1947)
            df = (v_t + v_r) ** 2 / (v_t**2 / (g_t.n - 1) + v_r**2 / (g_r.n - 1))
            lower, upper, p_lower, p_upper = interval_and_tost(estimate, se, df, confidence_level,
                                                               limits)
    acceptance = (judge_ratio_interval(lower, upper, limits) if lower is not None and upper is not None
                  else judge_ratio_interval(None, None, limits, reason_if_missing=reason))
    diagnostics.append(Diagnostic("parallel_design", "parallel groups: within-subject CV, "
                                  "sequence effect and reference variability do not exist in "
                                  "this design and are null"))
    return ParallelAverageBioequivalence(
        test=test, reference=reference, subjects=g_t.n + g_r.n, observations=g_t.n + g_r.n,
        confidence_level=confidence_level, log_difference=estimate, standard_error=se, df=df,
        ratio_percent=exp_percent(estimate), ratio_lower_percent=lower, ratio_upper_percent=upper,
        p_lower=p_lower, p_upper=p_upper, test_group=g_t, reference_group=g_r,
        acceptance=acceptance, diagnostics=tuple(diagnostics))


def _group(log_values: NDArray[np.float64], treatment: str) -> GroupSummary:
    n = int(log_values.size)
    mean = float(log_values.mean())
    if n < 2:
        return GroupSummary(treatment, n, mean, None, None)
    variance = float(log_values.var(ddof=1))
    return GroupSummary(treatment, n, mean, math.sqrt(variance), cv_percent(variance))


def _group_to_json(g: GroupSummary, role: str) -> dict[str, Any]:
    return {"treatment": g.treatment, "role": role, "n": g.n, "mean_log": finite_or_none(g.mean_log),
            "sd_log": g.sd_log, "cv_percent": g.cv_percent}


def parallel_average_bioequivalence_to_json(a: ParallelAverageBioequivalence) -> dict[str, Any]:
    """The ``average_bioequivalence`` block of a parallel-group study: the crossover block's keys
    (within-subject figures null) plus design, reference_variability (null) and groups."""
    acc = a.acceptance
    return {
        "log_difference": {"estimate": a.log_difference, "standard_error": a.standard_error,
                           "df": a.df},
        "ratio_percent": {"estimate": a.ratio_percent, "lower": a.ratio_lower_percent,
                          "upper": a.ratio_upper_percent},
        "confidence_level": a.confidence_level,
        "tost": {"p_lower": a.p_lower, "p_upper": a.p_upper},
        "within_subject_cv_percent": None,
        "residual_mean_square": None,
        "sequence_effect": {"f": None, "p": None, "df_numerator": None, "df_denominator": None},
        "acceptance": ratio_acceptance_to_json(acc),
        "test": a.test,
        "reference": a.reference,
        "subjects": a.subjects,
        "observations": a.observations,
        "method": a.method,
        "warnings": [{"code": d.code, "message": d.message} for d in a.diagnostics],
        "design": a.design,
        "reference_variability": None,
        "groups": [_group_to_json(a.test_group, "test"),
                   _group_to_json(a.reference_group, "reference")],
    }
