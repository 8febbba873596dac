"""Average bioequivalence on the log scale after a crossover or replicate study.

The model is the fixed-effects linear model of a crossover,
``log y = sequence + subject(sequence) + period + treatment + error``, fitted by least squares
with the subject effects absorbed (crossover_fit: within-subject sweep, Frisch–Waugh–Lovell);
sequence is nested in subject and absorbed with it. The reduced design keeps every level of
period and treatment, so it is rank-deficient on purpose: the rank comes from the reduced design,
the treatment contrast test − reference is checked for estimability, and its estimate does not
depend on the generalised inverse chosen. Work and memory are linear in the observations.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from decimal import ROUND_HALF_UP, Decimal
from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.stats import distributions as dist
from service.stats.crossover_fit import fit_absorbed
from service.stats.diagnostics import Diagnostic
from service.stats.observations import CodedObservations, code_observations
from service.stats.phases import check_deadline

ROUNDING_RULE = (
    "The confidence bounds in percent are rounded to two decimals, half away from zero, from "
    "their shortest decimal representation, and then compared with the limits inclusively."
)

# The text archived with every crossover record. The fit now absorbs the subject effects instead of
# forming the full dummy design, but the least-squares solution of the estimable contrast is the
# same one (Frisch–Waugh–Lovell), so the archived description stays as it was: records of unchanged
# requests keep their exact text.
METHOD = (
    "Fixed-effects linear model on natural-log values: sequence + subject within sequence + "
    "period + treatment, least squares on the full dummy design (pseudo-inverse, rank from the "
    "design). Sequence effect: one-way analysis of variance of the per-subject sums of log values "
    "by sequence (between-subject stratum)."
)

# Phases of the fit, for the deadline checks: coding, within-subject fit, contrast, sequence.
_PHASES = 4


@dataclass(frozen=True)
class RatioAcceptance:
    limit_lower: float
    limit_upper: float
    lower: float | None  # the rounded bounds that were compared
    upper: float | None
    verdict: str  # within_limits | not_within_limits | undetermined
    reason: str
    rounding: str = ROUNDING_RULE


@dataclass(frozen=True)
class AverageBioequivalence:
    test: str
    reference: str
    subjects: int
    observations: int
    confidence_level: float
    log_difference: float
    standard_error: float | None
    df: int
    ratio_percent: float | None
    ratio_lower_percent: float | None
    ratio_upper_percent: float | None
    p_lower: float | None
    p_upper: float | None
    residual_mean_square: float | None
    within_subject_cv_percent: float | None
    sequence_f: float | None
    sequence_p: float | None
    sequence_df_numerator: int | None
    sequence_df_denominator: int | None
    acceptance: RatioAcceptance
    diagnostics: tuple[Diagnostic, ...]
    method: str = METHOD


def round_percent(value: float) -> float:
    """Round a percent value to two decimals, half away from zero (79.995 -> 80.00).

    The shortest decimal representation of the float is rounded, so a bound printed as 79.995
    rounds up although its binary value lies a hair below.
    """
    if not math.isfinite(value):
        raise ValueError(f"value: {value!r} is not a finite number")
    return float(Decimal(repr(value)).quantize(Decimal("0.01"), rounding=ROUND_HALF_UP))


def judge_ratio_interval(
    lower: float | None, upper: float | None, limits_percent: tuple[float, float],
    *, reason_if_missing: str = "no confidence interval could be computed",
) -> RatioAcceptance:
    """Compare a ratio interval in percent with acceptance limits after two-decimal rounding.

    Both bounds are rounded with :func:`round_percent`; the interval passes when
    ``limit_lower <= rounded lower`` and ``rounded upper <= limit_upper``.
    """
    limit_lower, limit_upper = check_limits(limits_percent)
    if lower is None or upper is None or not (math.isfinite(lower) and math.isfinite(upper)):
        return RatioAcceptance(limit_lower, limit_upper, None, None, "undetermined",
                               reason_if_missing)
    lower_r, upper_r = round_percent(lower), round_percent(upper)
    if limit_lower <= lower_r and upper_r <= limit_upper:
        verdict = "within_limits"
        reason = (f"the rounded interval [{lower_r:.2f}, {upper_r:.2f}] lies within "
                  f"[{limit_lower:.2f}, {limit_upper:.2f}]")
    else:
        verdict = "not_within_limits"
        reason = (f"the rounded interval [{lower_r:.2f}, {upper_r:.2f}] is not contained in "
                  f"[{limit_lower:.2f}, {limit_upper:.2f}]")
    return RatioAcceptance(limit_lower, limit_upper, lower_r, upper_r, verdict, reason)


def average_bioequivalence(
    *, subjects: Sequence[str], sequences: Sequence[str], periods: Sequence[int],
    treatments: Sequence[str], values: NDArray[np.float64], test: str, reference: str,
    confidence_level: float = 0.90, limits_percent: tuple[float, float] = (80.0, 125.0),
    deadline: float | None = None,
) -> AverageBioequivalence:
    """Log-scale average bioequivalence of ``test`` against ``reference``.

    One entry per observation (long form); values must be finite and > 0. The caller passes
    complete subjects only. The interval is the two-sided ``confidence_level`` interval of the
    treatment contrast, which at 90 % is the two one-sided tests at 5 % (Schuirmann 1987).
    ``deadline`` (a time.monotonic() value) is checked between phases: PhaseTimeExceeded, a
    ComputeTimeExceeded.
    """
    coded = code_observations(subjects, sequences, periods, treatments, values, test, reference,
                              confidence_level)
    return fit_average_bioequivalence(coded, test=test, reference=reference,
                                      confidence_level=confidence_level,
                                      limits_percent=limits_percent, deadline=deadline)


def fit_average_bioequivalence(
    coded: CodedObservations, *, test: str, reference: str, confidence_level: float,
    limits_percent: tuple[float, float], method: str = METHOD,
    sequence_subjects: NDArray[np.bool_] | None = None,
    sequence_unavailable: Diagnostic | None = None, deadline: float | None = None,
) -> AverageBioequivalence:
    """The fixed-effects fit of already validated observations (crossover or replicate).

    The sequence effect uses the subjects where ``sequence_subjects`` is true (all when None);
    with ``sequence_unavailable`` set it is not computed and that diagnostic is reported."""
    limit_lower, limit_upper = check_limits(limits_percent)
    log_y = coded.log_values
    n_obs = log_y.size
    n_subjects = len(coded.subject_labels)
    n_periods, n_treatments = len(coded.period_labels), len(coded.treatment_labels)
    diagnostics: list[Diagnostic] = []

    check_deadline(deadline, "the within-subject fit", 1, _PHASES)
    fit = fit_absorbed(log_y, coded.subject_codes, n_subjects,
                       [(coded.period_codes, n_periods), (coded.treatment_codes, n_treatments)])
    check_deadline(deadline, "the treatment contrast", 2, _PHASES)
    contrast = np.zeros(n_periods + n_treatments)
    contrast[n_periods + coded.treatment_labels.index(test)] = 1.0
    contrast[n_periods + coded.treatment_labels.index(reference)] = -1.0
    estimated = fit.contrast(contrast)
    if estimated is None:
        raise ValueError("treatments: the test − reference contrast is not estimable from this "
                         "design (test and reference are confounded with subjects or periods)")
    estimate, variance_factor = estimated
    df = fit.df

    mse: float | None = fit.sse / df if df > 0 else None
    se: float | None = None
    ratio = exp_percent(estimate)
    lower = upper = p_lower = p_upper = None
    cv: float | None = None
    reason_missing = "no confidence interval could be computed"
    if mse is None:
        diagnostics.append(Diagnostic("no_residual_df", "zero residual degrees of freedom: the "
                                      "model fits the data exactly; no standard error"))
        reason_missing = "zero residual degrees of freedom"
    else:
        cv = cv_percent(mse)
        se = math.sqrt(mse * variance_factor)
        # An exact fit leaves only rounding noise in the residuals: treat it as zero variance.
        noise_floor = 1e-12 * max(1.0, float(np.max(np.abs(log_y))))
        if math.sqrt(mse) <= noise_floor:
            diagnostics.append(Diagnostic("zero_residual_variance", "the residual variance is "
                                          "zero: no interval or tests can be computed"))
            reason_missing = "the residual variance is zero"
            se = 0.0
        else:
            lower, upper, p_lower, p_upper = interval_and_tost(
                estimate, se, df, confidence_level, (limit_lower, limit_upper))

    check_deadline(deadline, "the sequence effect", 3, _PHASES)
    if sequence_unavailable is not None:
        diagnostics.append(sequence_unavailable)
        seq: tuple[float | None, float | None, int | None, int | None] = (None, None, None, None)
    else:
        seq = _sequence_effect(coded, sequence_subjects, diagnostics)
    if lower is None or upper is None:
        acceptance = judge_ratio_interval(None, None, (limit_lower, limit_upper),
                                          reason_if_missing=reason_missing)
    else:
        acceptance = judge_ratio_interval(lower, upper, (limit_lower, limit_upper))
    return AverageBioequivalence(
        test=test, reference=reference, subjects=n_subjects, observations=n_obs,
        confidence_level=confidence_level, log_difference=estimate, standard_error=se, df=df,
        ratio_percent=ratio, ratio_lower_percent=lower, ratio_upper_percent=upper,
        p_lower=p_lower, p_upper=p_upper, residual_mean_square=mse,
        within_subject_cv_percent=cv, sequence_f=seq[0], sequence_p=seq[1],
        sequence_df_numerator=seq[2], sequence_df_denominator=seq[3], acceptance=acceptance,
        diagnostics=tuple(diagnostics), method=method)


def interval_and_tost(
    estimate: float, standard_error: float, df: float, confidence_level: float,
    limits_percent: tuple[float, float],
) -> tuple[float | None, float | None, float, float]:
    """Ratio bounds in percent of the t interval and the two one-sided tests' p-values.

    ``standard_error`` must be > 0 and ``df`` > 0 (an integer, or Welch–Satterthwaite's)."""
    alpha = 1.0 - confidence_level
    t_crit = float(dist.t_ppf(1.0 - alpha / 2.0, df))
    lower = exp_percent(estimate - t_crit * standard_error)
    upper = exp_percent(estimate + t_crit * standard_error)
    # Two one-sided tests, Schuirmann 1987: H0 ratio <= lower, H0 ratio >= upper.
    t_lower = (estimate - math.log(limits_percent[0] / 100.0)) / standard_error
    t_upper = (estimate - math.log(limits_percent[1] / 100.0)) / standard_error
    return lower, upper, float(dist.t_sf(t_lower, df)), float(dist.t_cdf(t_upper, df))


def cv_percent(variance_log: float) -> float | None:
    """100·sqrt(exp(s²) − 1): the CV of a lognormal variable whose log has variance s²."""
    return finite_or_none(100.0 * math.sqrt(math.expm1(variance_log))) if variance_log < 700 else None


def _sequence_effect(
    coded: CodedObservations, use: NDArray[np.bool_] | None, diagnostics: list[Diagnostic],
) -> tuple[float | None, float | None, int | None, int | None]:
    """F = MS(sequence) / MS(subject within sequence) from the per-subject sums of log values.

    Between-subject stratum of the crossover: the subject sums carry the sequence and subject
    effects only (every subject received the same set of treatments), so a one-way analysis of
    variance of the sums by sequence gives both mean squares. Work is linear in the data.
    """
    n_subjects = len(coded.subject_labels)
    totals = np.bincount(coded.subject_codes, weights=coded.log_values, minlength=n_subjects)
    subject_sequence = coded.sequence_of_subject()
    if use is not None:
        totals, subject_sequence = totals[use], subject_sequence[use]
    n_sequences = len(coded.sequence_labels)
    counts = np.bincount(subject_sequence, minlength=n_sequences)
    present = counts > 0
    n_used_sequences = int(present.sum())
    df_num = n_used_sequences - 1
    df_den = totals.size - n_used_sequences
    if df_num < 1:
        diagnostics.append(Diagnostic("single_sequence", "only one sequence: no sequence effect"))
        return None, None, None, None
    if df_den < 1:
        diagnostics.append(Diagnostic("no_between_subject_df", "as many sequences as subjects: "
                                      "no sequence effect"))
        return None, None, df_num, None
    sums = np.bincount(subject_sequence, weights=totals, minlength=n_sequences)
    seq_means = np.divide(sums, counts, out=np.zeros(n_sequences), where=present)
    grand = totals.mean()
    ss_seq = float(np.sum(counts * (seq_means - grand) ** 2))
    ss_subj = float(np.sum((totals - seq_means[subject_sequence]) ** 2))
    if ss_subj <= 0.0:
        diagnostics.append(Diagnostic("zero_between_subject_variance", "subject sums do not "
                                      "vary within sequences: no sequence effect"))
        return None, None, df_num, df_den
    f = (ss_seq / df_num) / (ss_subj / df_den)
    return finite_or_none(f), finite_or_none(float(dist.f_sf(f, df_num, df_den))), df_num, df_den


def check_limits(limits_percent: tuple[float, float]) -> tuple[float, float]:
    lower, upper = (float(v) for v in limits_percent)
    if not (math.isfinite(lower) and math.isfinite(upper) and 0.0 < lower < upper):
        raise ValueError(f"limits_percent: {limits_percent!r} must be finite with "
                         "0 < lower < upper")
    return lower, upper


def exp_percent(log_value: float) -> float | None:
    if log_value > 700.0:
        return None
    return finite_or_none(100.0 * math.exp(log_value))


def finite_or_none(value: float) -> float | None:
    return value if math.isfinite(value) else None


def ratio_acceptance_to_json(acc: RatioAcceptance) -> dict[str, Any]:
    """The `acceptance` block of an average-bioequivalence result, whatever the design."""
    return {"limits": {"lower": acc.limit_lower, "upper": acc.limit_upper},
            "lower": acc.lower, "upper": acc.upper, "verdict": acc.verdict,
            "rounding": acc.rounding, "reason": acc.reason}


def average_bioequivalence_to_json(a: AverageBioequivalence) -> dict[str, Any]:
    """The ``average_bioequivalence`` block of a metric result (DESIGN.md)."""
    acc = a.acceptance
    return {
        "log_difference": {"estimate": a.log_difference, "standard_error": a.standard_error,
                           "df": a.df},
        "ratio_percent": {"estimate": a.ratio_percent, "lower": a.ratio_lower_percent,
                          "upper": a.ratio_upper_percent},
        "confidence_level": a.confidence_level,
        "tost": {"p_lower": a.p_lower, "p_upper": a.p_upper},
        "within_subject_cv_percent": a.within_subject_cv_percent,
        "residual_mean_square": a.residual_mean_square,
        "sequence_effect": {"f": a.sequence_f, "p": a.sequence_p,
                            "df_numerator": a.sequence_df_numerator,
                            "df_denominator": a.sequence_df_denominator},
        "acceptance": ratio_acceptance_to_json(acc),
        "test": a.test,
        "reference": a.reference,
        "subjects": a.subjects,
        "observations": a.observations,
        "method": a.method,
        "warnings": [{"code": d.code, "message": d.message} for d in a.diagnostics],
    }


def tmax_summary(tmax_by_treatment: Mapping[str, Sequence[float]]) -> dict[str, Any]:
    """Per treatment: number of values, median, minimum and maximum of Tmax (no model)."""
    summary: dict[str, Any] = {}
    for treatment in sorted(tmax_by_treatment):
        t = np.asarray(tmax_by_treatment[treatment], dtype=np.float64)
        if t.ndim != 1 or not np.all(np.isfinite(t)):
            raise ValueError(f"tmax_by_treatment[{treatment!r}]: values must be finite numbers")
        if t.size == 0:
            summary[treatment] = {"n": 0, "median": None, "min": None, "max": None}
        else:
            summary[treatment] = {"n": int(t.size), "median": float(np.median(t)),
                                  "min": float(t.min()), "max": float(t.max())}
    return summary
