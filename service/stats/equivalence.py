"""Average bioequivalence on the log scale after a crossover study.

The model is the fixed-effects linear model of a crossover,
``log y = sequence + subject(sequence) + period + treatment + error``, fitted by least squares on
the full dummy design. That design is rank-deficient on purpose (subjects are nested in
sequences, every factor keeps all its levels), so the fit uses the pseudo-inverse and the rank
comes from the design itself; the treatment contrast test − reference is estimable in it and its
estimate does not depend on the generalised inverse chosen.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from decimal import ROUND_HALF_UP, Decimal
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import stats as sps

from service.stats.diagnostics import Diagnostic

ROUNDING_RULE = (
    "The confidence bounds in percent are rounded to two decimals, half away from zero, from "
    "their shortest decimal representation, and then compared with the limits inclusively."
)

METHOD = (
    "Fixed-effects linear model on natural-log values: sequence + subject within sequence + "
    "period + treatment, least squares on the full dummy design (pseudo-inverse, rank from the "
    "design). Sequence effect: one-way analysis of variance of the per-subject sums of log values "
    "by sequence (between-subject stratum)."
)

# Relative tolerance for the rank and for the estimability of the contrast.
_RANK_RTOL = 1e-10


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
    limit_lower, limit_upper = _check_limits(limits_percent)
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
) -> AverageBioequivalence:
    """Log-scale average bioequivalence of ``test`` against ``reference``.

    One entry per observation (long form); values must be finite and > 0. The caller passes
    complete subjects only. The interval is the two-sided ``confidence_level`` interval of the
    treatment contrast, which at 90 % is the two one-sided tests at 5 % (Schuirmann 1987).
    """
    y, subj_codes, seq_codes, per_codes, trt_codes, labels = _validate(
        subjects, sequences, periods, treatments, values, test, reference, confidence_level)
    limit_lower, limit_upper = _check_limits(limits_percent)
    subject_labels, sequence_labels, period_labels, treatment_labels = labels
    n_obs = y.size
    n_subjects = len(subject_labels)
    diagnostics: list[Diagnostic] = []

    log_y = np.log(y)
    # Full dummy design: intercept, every level of every factor (aliasing resolved by pinv).
    blocks = [np.ones((n_obs, 1))]
    for codes, k in ((seq_codes, len(sequence_labels)), (subj_codes, n_subjects),
                     (per_codes, len(period_labels)), (trt_codes, len(treatment_labels))):
        blocks.append(np.eye(k)[codes])
    design = np.hstack(blocks)
    offset_treatment = 1 + len(sequence_labels) + n_subjects + len(period_labels)

    design_pinv = np.linalg.pinv(design, rcond=_RANK_RTOL)
    beta = design_pinv @ log_y
    xtx_pinv = design_pinv @ design_pinv.T  # (X'X)^+ = X^+ (X^+)'
    rank = int(np.linalg.matrix_rank(design, tol=_RANK_RTOL * max(design.shape)
                                     * np.linalg.norm(design, 2)))
    df = n_obs - rank

    contrast = np.zeros(design.shape[1])
    contrast[offset_treatment + treatment_labels.index(test)] = 1.0
    contrast[offset_treatment + treatment_labels.index(reference)] = -1.0
    # Estimable iff the contrast lies in the row space of the design: L X^+ X = L.
    projection = contrast @ design_pinv @ design
    if not np.allclose(projection, contrast, atol=1e-8):
        raise ValueError("treatments: the test − reference contrast is not estimable from this "
                         "design (test and reference are confounded with subjects or periods)")
    estimate = float(contrast @ beta)

    residuals = log_y - design @ beta
    sse = float(residuals @ residuals)
    mse: float | None = sse / df if df > 0 else None
    se: float | None = None
    ratio = _exp_percent(estimate)
    lower = upper = p_lower = p_upper = None
    cv: float | None = None
    reason_missing = "no confidence interval could be computed"
    if mse is None:
        diagnostics.append(Diagnostic("no_residual_df", "zero residual degrees of freedom: the "
                                      "model fits the data exactly; no standard error"))
        reason_missing = "zero residual degrees of freedom"
    else:
        cv = _finite_or_none(100.0 * math.sqrt(math.expm1(mse))) if mse < 700 else None
        se = math.sqrt(mse * float(contrast @ xtx_pinv @ contrast))
        # An exact fit leaves only rounding noise in the residuals: treat it as zero variance.
        noise_floor = 1e-12 * max(1.0, float(np.max(np.abs(log_y))))
        if math.sqrt(mse) <= noise_floor:
            diagnostics.append(Diagnostic("zero_residual_variance", "the residual variance is "
                                          "zero: no interval or tests can be computed"))
            reason_missing = "the residual variance is zero"
            se = 0.0
        else:
            alpha = 1.0 - confidence_level
            t_crit = float(sps.t.ppf(1.0 - alpha / 2.0, df))
            lower = _exp_percent(estimate - t_crit * se)
            upper = _exp_percent(estimate + t_crit * se)
            # Two one-sided tests, Schuirmann 1987: H0 ratio <= lower, H0 ratio >= upper.
            t_lower = (estimate - math.log(limit_lower / 100.0)) / se
            t_upper = (estimate - math.log(limit_upper / 100.0)) / se
            p_lower = float(sps.t.sf(t_lower, df))
            p_upper = float(sps.t.cdf(t_upper, df))

    seq = _sequence_effect(log_y, subj_codes, seq_codes, n_subjects, len(sequence_labels),
                           diagnostics)
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
        diagnostics=tuple(diagnostics))


def _sequence_effect(
    log_y: NDArray[np.float64], subj_codes: NDArray[np.intp], seq_codes: NDArray[np.intp],
    n_subjects: int, n_sequences: int, diagnostics: list[Diagnostic],
) -> tuple[float | None, float | None, int | None, int | None]:
    """F = MS(sequence) / MS(subject within sequence) from the per-subject sums of log values.

    Between-subject stratum of the crossover: the subject sums carry the sequence and subject
    effects only (every subject received the same set of treatments), so a one-way analysis of
    variance of the sums by sequence gives both mean squares.
    """
    df_num = n_sequences - 1
    df_den = n_subjects - n_sequences
    if df_num < 1:
        diagnostics.append(Diagnostic("single_sequence", "only one sequence: no sequence effect"))
        return None, None, None, None
    if df_den < 1:
        diagnostics.append(Diagnostic("no_between_subject_df", "as many sequences as subjects: "
                                      "no sequence effect"))
        return None, None, df_num, None
    totals = np.bincount(subj_codes, weights=log_y, minlength=n_subjects)
    subject_sequence = np.zeros(n_subjects, dtype=np.intp)
    subject_sequence[subj_codes] = seq_codes
    counts = np.bincount(subject_sequence, minlength=n_sequences)
    seq_means = np.bincount(subject_sequence, weights=totals, minlength=n_sequences) / counts
    grand = totals.mean()
    ss_seq = float(np.sum(counts * (seq_means - grand) ** 2))
    ss_subj = float(np.sum((totals - seq_means[subject_sequence]) ** 2))
    if ss_subj <= 0.0:
        diagnostics.append(Diagnostic("zero_between_subject_variance", "subject sums do not "
                                      "vary within sequences: no sequence effect"))
        return None, None, df_num, df_den
    f = (ss_seq / df_num) / (ss_subj / df_den)
    return _finite_or_none(f), _finite_or_none(float(sps.f.sf(f, df_num, df_den))), df_num, df_den


def _validate(
    subjects: Sequence[str], sequences: Sequence[str], periods: Sequence[int],
    treatments: Sequence[str], values: NDArray[np.float64], test: str, reference: str,
    confidence_level: float,
) -> tuple[NDArray[np.float64], NDArray[np.intp], NDArray[np.intp], NDArray[np.intp],
           NDArray[np.intp], tuple[list[str], list[str], list[int], list[str]]]:
    y = np.asarray(values, dtype=np.float64)
    problems: list[str] = []
    if y.ndim != 1:
        raise ValueError(f"values: expected a one-dimensional array, got shape {y.shape}")
    n = y.size
    for name, seq in (("subjects", subjects), ("sequences", sequences), ("periods", periods),
                      ("treatments", treatments)):
        if len(seq) != n:
            problems.append(f"{name}: has {len(seq)} entries, values has {n}")
    if problems:
        raise ValueError("; ".join(problems))
    bad = np.flatnonzero(~np.isfinite(y) | (y <= 0))
    if bad.size:
        problems.append(f"values: entries {bad[:10].tolist()} are not finite positive numbers "
                        "(the analysis is on the log scale)")
    if not (isinstance(confidence_level, float | int) and 0.0 < confidence_level < 1.0):
        problems.append(f"confidence_level: {confidence_level!r} is not between 0 and 1")
    if test == reference:
        problems.append(f"test/reference: both are {test!r}")
    trt_set = set(treatments)
    for name, label in (("test", test), ("reference", reference)):
        if label not in trt_set:
            problems.append(f"{name}: treatment {label!r} has no observation")
    seq_of: dict[str, str] = {}
    seen: set[tuple[str, int]] = set()
    treated: dict[str, set[str]] = {}
    for i, (s, q, p, t) in enumerate(zip(subjects, sequences, periods, treatments, strict=True)):
        if seq_of.setdefault(s, q) != q:
            problems.append(f"sequences[{i}]: subject {s!r} is in sequence {seq_of[s]!r} and {q!r}")
        if (s, p) in seen:
            problems.append(f"periods[{i}]: subject {s!r} has more than one value in period {p}")
        seen.add((s, p))
        treated.setdefault(s, set()).add(t)
    for s, trts in treated.items():
        missing = {test, reference} - trts
        if missing and test in trt_set and reference in trt_set:
            problems.append(f"subjects: {s!r} has no value for {sorted(missing)}")
    if n < 3:
        problems.append(f"values: {n} observations are too few")
    if problems:
        raise ValueError("; ".join(problems[:20]))

    subject_labels = sorted(seq_of)
    sequence_labels = sorted(set(sequences))
    period_labels = sorted(set(periods))
    treatment_labels = sorted(trt_set)
    codes = [_codes(col, lab) for col, lab in ((subjects, subject_labels),
                                                (sequences, sequence_labels),
                                                (periods, period_labels),
                                                (treatments, treatment_labels))]
    return (y, codes[0], codes[1], codes[2], codes[3],
            (subject_labels, sequence_labels, period_labels, treatment_labels))


def _codes(column: Sequence[Any], levels: Sequence[Any]) -> NDArray[np.intp]:
    index = {v: i for i, v in enumerate(levels)}
    return np.array([index[v] for v in column], dtype=np.intp)


def _check_limits(limits_percent: tuple[float, float]) -> tuple[float, float]:
    lower, upper = (float(v) for v in limits_percent)
    if not (math.isfinite(lower) and math.isfinite(upper) and 0.0 < lower < upper):
        raise ValueError(f"limits_percent: {limits_percent!r} must be finite with "
                         "0 < lower < upper")
    return lower, upper


def _exp_percent(log_value: float) -> float | None:
    if log_value > 700.0:
        return None
    return _finite_or_none(100.0 * math.exp(log_value))


def _finite_or_none(value: float) -> float | None:
    return value if math.isfinite(value) else None


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
        "acceptance": {"limits": {"lower": acc.limit_lower, "upper": acc.limit_upper},
                       "lower": acc.lower, "upper": acc.upper, "verdict": acc.verdict,
                       "rounding": acc.rounding, "reason": acc.reason},
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
