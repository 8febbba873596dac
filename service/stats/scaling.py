"""Acceptance limits scaled to the within-subject variability of the reference.

Two approaches, from two jurisdictions, each chosen per metric before the study:

- widened limits (EMA 2010, CPMP/EWP/QWP/1401/98 Rev.1, §4.1.10): the usual interval test against
  limits ``exp(±0.760·s_wR)``, widened only above CV_wR = 30 % and capped at CV_wR = 50 %;
- reference-scaled average bioequivalence (FDA draft guidance on progesterone, 2011): a linearised
  criterion ``(μT − μR)² − θ·σ²_wR ≤ 0`` judged by the 95 % upper bound of Howe's method as used by
  Hyslop, Hsuan & Holder 2000 (Stat Med 19:2885), from per-subject contrasts of a replicate design.

Both also require the point estimate of the ratio within 80.00–125.00 %.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from service.stats import distributions as dist
from service.stats.diagnostics import Diagnostic
from service.stats.equivalence import RatioAcceptance, judge_ratio_interval, round_percent

SCALING_CAUTION = (
    "Scaled acceptance limits are valid only when the protocol fixed the approach, the metrics it "
    "applies to and the method before the study, and only where the agency that will assess the "
    "study accepts that approach: widened limits and reference-scaled average bioequivalence "
    "belong to different jurisdictions and are not interchangeable. Widened limits also need a "
    "clinical justification that the wider range does not matter for safety or efficacy, and a "
    "within-reference variability that is not the product of outliers. This is not a substitute "
    "for the protocol's statistical analysis plan, a qualified statistician's review, or the "
    "applicable regulatory guidance (ICH, FDA, EMA, local authorities)."
)

WIDENED_METHOD = (
    "Widened limits (EMA 2010 §4.1.10): CV_wR = sqrt(exp(s_wR²) − 1); at CV_wR ≤ 30 % the limits "
    "are 80.00–125.00 %; above, 100·exp(±0.760·s_wR) with s_wR capped at its value for CV_wR = "
    "50 % (69.84–143.19 %). Limits and confidence bounds are rounded to two decimals and compared "
    "inclusively; the rounded point estimate must lie within 80.00–125.00 %."
)

REFERENCE_SCALED_METHOD = (
    "Reference-scaled average bioequivalence (FDA draft guidance on progesterone, 2011): "
    "D = log R₁ − log R₂ per subject with two reference values, regressed on sequence, gives "
    "s²_wR = SS_within/(2·df), df = subjects − sequences. Below s_wR = 0.294 unscaled average "
    "bioequivalence applies. Otherwise I = mean log T − mean log R per subject with at least one "
    "of each, regressed on sequence; the difference is the unweighted mean of the sequence means. "
    "Criterion (μT − μR)² − θ·σ²_wR, θ = (ln 1.25/0.25)², judged by its 95 % upper bound by "
    "Howe's method (Hyslop, Hsuan & Holder 2000); it passes when the bound is ≤ 0 and the rounded "
    "point estimate lies within 80.00–125.00 %. The limits shown, 100·exp(±sqrt(θ)·s_wR), are "
    "implied by the criterion and given for reading only; the bound decides."
)

STANDARD_LIMITS_PERCENT = (80.0, 125.0)
WIDENING_FACTOR = 0.760                      # EMA 2010 §4.1.10
WIDENING_CV_FROM = 30.0                      # percent, EMA 2010 §4.1.10
WIDENING_CV_CAP = 50.0                       # percent, EMA 2010 §4.1.10
SIGMA_W0 = 0.25                              # regulatory constant, FDA progesterone guidance 2011
THETA = (math.log(1.25) / SIGMA_W0) ** 2     # FDA progesterone guidance 2011
S_WR_SCALING_FROM = 0.294                    # FDA progesterone guidance 2011
BOUND_LEVEL = 0.95                           # one-sided level of the upper bound, same guidance


@dataclass(frozen=True)
class ScalingCriterion:
    """The linearised reference-scaled criterion and its 95 % upper bound (Howe's method)."""
    estimate: float | None       # x + y
    upper_bound: float | None
    theta: float
    s_wr: float
    df: int                      # degrees of freedom of s²_wR
    log_difference: float        # δ̂, the mean of the sequence means of I
    standard_error: float        # s_δ
    df_log_difference: int


@dataclass(frozen=True)
class ScaledAcceptance:
    approach: str                # none | widened_limits | reference_scaled
    applied: bool                # the limits were actually scaled
    limit_lower: float | None    # percent, rounded to two decimals
    limit_upper: float | None
    point_estimate_percent: float | None
    point_estimate_within: bool | None
    verdict: str | None          # within_limits | not_within_limits | undetermined; None for "none"
    reason: str
    s_wr: float | None
    cv_wr_percent: float | None
    interval: RatioAcceptance | None       # the interval test, when the decision uses one
    criterion: ScalingCriterion | None     # reference_scaled when applied
    subjects_reference_replicated: int | None = None
    subjects_test_and_reference: int | None = None
    diagnostics: tuple[Diagnostic, ...] = ()
    method: str | None = None
    caution: str = SCALING_CAUTION


def no_scaling() -> ScaledAcceptance:
    """The block for ``approach: "none"``: the usual limits of the analysis apply unchanged."""
    return ScaledAcceptance("none", False, None, None, None, None, None,
                            "no scaling was chosen in the settings", None, None, None, None)


def cv_from_s_wr(s_wr: float) -> float:
    """CV in percent of a log-normal with log-scale SD ``s_wr``: 100·sqrt(exp(s²) − 1)."""
    return 100.0 * math.sqrt(math.expm1(s_wr * s_wr))


def widened_limits_percent(s_wr: float) -> tuple[float, float]:
    """The EMA acceptance limits in percent for this s_wR, rounded to two decimals."""
    if not (math.isfinite(s_wr) and s_wr >= 0.0):
        raise ValueError(f"s_wr: {s_wr!r} is not a finite number ≥ 0")
    if cv_from_s_wr(s_wr) <= WIDENING_CV_FROM * (1.0 + 1e-12):  # floating noise at exactly 30 %
        return STANDARD_LIMITS_PERCENT
    s_cap = math.sqrt(math.log1p((WIDENING_CV_CAP / 100.0) ** 2))  # s_wR at CV_wR = 50 %
    k_s = WIDENING_FACTOR * min(s_wr, s_cap)                     # EMA 2010 §4.1.10
    return round_percent(100.0 * math.exp(-k_s)), round_percent(100.0 * math.exp(k_s))


def widened_limits_acceptance(
    *, s_wr: float | None, point_estimate_percent: float | None, lower_percent: float | None,
    upper_percent: float | None,
) -> ScaledAcceptance:
    """Judge a ratio interval in percent against the EMA widened limits for ``s_wr``.

    ``s_wr`` is the within-subject SD of the reference on the log scale (from the reference-only
    model of a replicate design); None when it could not be computed.
    """
    if s_wr is not None and not (math.isfinite(s_wr) and s_wr >= 0.0):
        raise ValueError(f"s_wr: {s_wr!r} is not a finite number ≥ 0")
    pe_within = _point_estimate_within(point_estimate_percent)
    if s_wr is None:
        return ScaledAcceptance(
            "widened_limits", False, None, None, point_estimate_percent, pe_within,
            "undetermined", "s_wR could not be computed: no limits", None, None, None, None,
            diagnostics=(Diagnostic("s_wr_unavailable", "the within-subject SD of the reference "
                                    "could not be computed; widened limits cannot be set"),),
            method=WIDENED_METHOD)
    cv = cv_from_s_wr(s_wr)
    limits = widened_limits_percent(s_wr)
    applied = cv > WIDENING_CV_FROM * (1.0 + 1e-12)   # CV_wR = 30 % exactly is not above 30 %
    interval = judge_ratio_interval(lower_percent, upper_percent, limits)
    if not applied:
        why = f"CV_wR = {cv:.2f} % ≤ {WIDENING_CV_FROM:.0f} %: the limits stay 80.00–125.00 %"
    elif cv > WIDENING_CV_CAP:
        why = (f"CV_wR = {cv:.2f} % > {WIDENING_CV_CAP:.0f} %: limits capped at "
               f"{limits[0]:.2f}–{limits[1]:.2f} %")
    else:
        why = f"CV_wR = {cv:.2f} %: limits widened to {limits[0]:.2f}–{limits[1]:.2f} %"
    interval_ok = None if interval.verdict == "undetermined" else interval.verdict == "within_limits"
    verdict, reason = _combine(interval_ok, interval.reason, pe_within, point_estimate_percent)
    return ScaledAcceptance("widened_limits", applied, limits[0], limits[1],
                            point_estimate_percent, pe_within, verdict, f"{why}; {reason}", s_wr, cv,
                            interval, None, method=WIDENED_METHOD)


def reference_scaled_bound(
    delta_hat: ArrayLike, s2_delta: ArrayLike, df_delta: int, s2_wr: ArrayLike, df_wr: int,
    *, theta: float = THETA, level: float = BOUND_LEVEL,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Estimate x + y and the one-sided ``level`` upper bound of (μT − μR)² − θ·σ²_wR.

    Vectorised over studies. Howe's approximation as in Hyslop, Hsuan & Holder 2000 (eq. of the
    MLS bound): bound = x + y + sqrt((x_u − x)² + (y_u − y)²), where each x_u, y_u is the one-sided
    ``level`` upper bound of its own component.

    Which χ² quantile: y = −θ·σ²_wR enters with a negative sign, so its one-sided upper bound y_u
    is −θ times the one-sided *lower* bound of σ²_wR. Since df·s²/σ² ~ χ²_df,
    P(df·s²/σ² ≤ q) = 0.95 for q = chi2.ppf(0.95, df) (the value exceeded with probability 0.05),
    i.e. σ² ≥ df·s²/q with probability 0.95; hence y_u = −θ·s²_wR·df/chi2.ppf(0.95, df), which
    lies closer to zero than y (q > df). chi2.ppf(0.05, df) would give the *upper* bound of σ²_wR,
    i.e. a lower bound of y: plugged into the formula it only inflates the square root and gives
    a conservative bound (level well under 5 %). The Monte-Carlo test of the level at the
    boundary confirms ≈ 5 % for the first and far less for the second.
    """
    d = np.asarray(delta_hat, dtype=np.float64)
    v = np.asarray(s2_delta, dtype=np.float64)
    s2 = np.asarray(s2_wr, dtype=np.float64)
    t = float(dist.t_ppf(level, df_delta))
    x = d * d - v                                          # bias-corrected δ², FDA 2011
    x_u = (np.abs(d) + t * np.sqrt(v)) ** 2                # max(|δ̂ ± t·s_δ|)², FDA 2011
    y = -theta * s2
    y_u = -theta * s2 * df_wr / float(dist.chi2_ppf(level, df_wr))  # see the docstring
    estimate = x + y
    return estimate, estimate + np.sqrt((x_u - x) ** 2 + (y_u - y) ** 2)


def reference_scaled_acceptance(
    *, subjects: Sequence[str], sequences: Sequence[str], periods: Sequence[int],
    treatments: Sequence[str], values: ArrayLike, test: str, reference: str,
    unscaled_lower_percent: float | None, unscaled_upper_percent: float | None,
) -> ScaledAcceptance:
    """Reference-scaled average bioequivalence from long-form replicate-design data.

    One entry per observation; rows of other treatments are ignored. Per subject, D uses the
    first two reference values by period and needs exactly two (subjects with one are left out
    of s²_wR); I uses every subject with at least one test and one reference value. When
    s_wR < 0.294 the decision is the unscaled interval test of ``unscaled_lower_percent`` and
    ``unscaled_upper_percent`` (the average-bioequivalence interval) against 80.00–125.00 %.
    """
    d_values, d_seq, i_values, i_seq = _per_subject_contrasts(
        subjects, sequences, periods, treatments, values, test, reference)
    diagnostics: list[Diagnostic] = []
    n_d, n_i = d_values.size, i_values.size
    base: dict[str, Any] = {"subjects_reference_replicated": n_d,
                            "subjects_test_and_reference": n_i, "method": REFERENCE_SCALED_METHOD}

    ss_d, m_d = _within_sequence_ss(d_values, d_seq)
    df_d = n_d - m_d
    if df_d < 1:
        diagnostics.append(Diagnostic("no_reference_replicate_df", f"{n_d} subjects with two "
                                      f"reference values in {m_d} sequences: s_wR has no degrees "
                                      "of freedom"))
        return ScaledAcceptance("reference_scaled", False, None, None, None, None, "undetermined",
                                "s_wR could not be computed", None, None, None, None,
                                diagnostics=tuple(diagnostics), **base)
    s2_wr = ss_d / (2.0 * df_d)                      # FDA 2011: MSE of D on sequence, halved
    s_wr = math.sqrt(s2_wr)
    cv = cv_from_s_wr(s_wr) if s2_wr < 700.0 else None

    delta_hat: float | None = None
    s2_delta: float | None = None
    df_i = 0
    if n_i:
        means, counts = _sequence_means(i_values, i_seq)
        m_i = means.size
        df_i = n_i - m_i
        delta_hat = float(means.mean())              # FDA 2011: mean of the sequence means
        if df_i >= 1:
            s2_i = _within_sequence_ss(i_values, i_seq)[0] / df_i
            s2_delta = s2_i * float(np.sum(1.0 / counts)) / m_i**2
    pe = _exp_percent(delta_hat) if delta_hat is not None else None
    pe_within = _point_estimate_within(pe)

    if s_wr < S_WR_SCALING_FROM:
        interval = judge_ratio_interval(unscaled_lower_percent, unscaled_upper_percent,
                                        STANDARD_LIMITS_PERCENT)
        why = (f"s_wR = {s_wr:.4f} < {S_WR_SCALING_FROM}: unscaled average bioequivalence "
               f"applies (limits 80.00–125.00 %); {interval.reason}")
        return ScaledAcceptance("reference_scaled", False, *STANDARD_LIMITS_PERCENT, pe, pe_within,
                                interval.verdict, why, s_wr, cv, interval, None,
                                diagnostics=tuple(diagnostics), **base)

    scale = math.sqrt(THETA) * s_wr                  # implied limits exp(±sqrt(θ)·s_wR), for reading
    lo_pe, hi_pe = _exp_percent(-scale), _exp_percent(scale)
    limits = (None if lo_pe is None else round_percent(lo_pe),
              None if hi_pe is None else round_percent(hi_pe))
    if delta_hat is None or s2_delta is None:
        diagnostics.append(Diagnostic("no_test_reference_df", f"{n_i} subjects with test and "
                                      "reference values: the test − reference difference has no "
                                      "standard error"))
        return ScaledAcceptance("reference_scaled", True, *limits, pe, pe_within, "undetermined",
                                "the criterion's upper bound could not be computed", s_wr, cv,
                                None, None, diagnostics=tuple(diagnostics), **base)
    est_a, bound_a = reference_scaled_bound(delta_hat, s2_delta, df_i, s2_wr, df_d)
    estimate, bound = _finite_or_none(float(est_a)), _finite_or_none(float(bound_a))
    criterion = ScalingCriterion(estimate, bound, THETA, s_wr, df_d, delta_hat,
                                 math.sqrt(s2_delta), df_i)
    bound_ok = None if bound is None else bound <= 0.0
    bound_text = ("the upper bound could not be computed" if bound is None else
                  f"the 95 % upper bound of the criterion is {bound:.6g} "
                  f"({'≤' if bound <= 0.0 else '>'} 0)")
    verdict, reason = _combine(bound_ok, bound_text, pe_within, pe)
    return ScaledAcceptance("reference_scaled", True, *limits, pe, pe_within, verdict,
                            f"s_wR = {s_wr:.4f} ≥ {S_WR_SCALING_FROM}: scaled; {reason}", s_wr, cv,
                            None, criterion, diagnostics=tuple(diagnostics), **base)


def scaled_acceptance_to_json(a: ScaledAcceptance) -> dict[str, Any]:
    """The ``average_bioequivalence.scaling`` block of a metric result."""
    c = a.criterion
    return {
        "approach": a.approach,
        "applied": a.applied,
        "limits_percent": {"lower": a.limit_lower, "upper": a.limit_upper},
        "point_estimate_percent": a.point_estimate_percent,
        "point_estimate_within": a.point_estimate_within,
        "criterion": None if c is None else {
            "estimate": c.estimate, "upper_bound": c.upper_bound, "theta": c.theta,
            "s_wr": c.s_wr, "df": c.df, "log_difference": c.log_difference,
            "standard_error": c.standard_error, "df_log_difference": c.df_log_difference},
        "interval_percent": None if a.interval is None else {
            "lower": a.interval.lower, "upper": a.interval.upper, "verdict": a.interval.verdict},
        "verdict": a.verdict,
        "reason": a.reason,
        "s_wr": a.s_wr,
        "cv_wr_percent": a.cv_wr_percent,
        "subjects": {"reference_replicated": a.subjects_reference_replicated,
                     "test_and_reference": a.subjects_test_and_reference},
        "method": a.method,
        "caution": a.caution,
        "warnings": [{"code": d.code, "message": d.message} for d in a.diagnostics],
    }


def _combine(main_ok: bool | None, main_text: str, pe_within: bool | None,
             pe: float | None) -> tuple[str, str]:
    """Verdict from the main test and the point-estimate constraint (both needed to pass)."""
    pe_text = ("no point estimate" if pe is None else
               f"the rounded point estimate {round_percent(pe):.2f} % is "
               f"{'within' if pe_within else 'outside'} 80.00–125.00 %")
    if main_ok is False or pe_within is False:
        return "not_within_limits", f"{main_text}; {pe_text}"
    if main_ok is None or pe_within is None:
        return "undetermined", f"{main_text}; {pe_text}"
    return "within_limits", f"{main_text}; {pe_text}"


def _point_estimate_within(pe: float | None) -> bool | None:
    if pe is None or not math.isfinite(pe):
        return None
    lower, upper = STANDARD_LIMITS_PERCENT
    return lower <= round_percent(pe) <= upper       # two-decimal rounding, EMA 2010 §4.1.10


def _per_subject_contrasts(
    subjects: Sequence[str], sequences: Sequence[str], periods: Sequence[int],
    treatments: Sequence[str], values: ArrayLike, test: str, reference: str,
) -> tuple[NDArray[np.float64], list[str], NDArray[np.float64], list[str]]:
    """D = log R₁ − log R₂ and I = mean log T − mean log R per subject, with their sequences."""
    y = np.asarray(values, dtype=np.float64)
    if y.ndim != 1:
        raise ValueError(f"values: expected a one-dimensional array, got shape {y.shape}")
    problems = [f"{name}: has {len(col)} entries, values has {y.size}"
                for name, col in (("subjects", subjects), ("sequences", sequences),
                                  ("periods", periods), ("treatments", treatments))
                if len(col) != y.size]
    if problems:
        raise ValueError("; ".join(problems))
    if test == reference:
        problems.append(f"test/reference: both are {test!r}")
    for name, label in (("test", test), ("reference", reference)):
        if label not in set(treatments):
            problems.append(f"{name}: treatment {label!r} has no observation")
    seq_of: dict[str, str] = {}
    seen: set[tuple[str, int]] = set()
    logs: dict[str, dict[str, list[tuple[int, float]]]] = {}
    for i, (s, q, p, t) in enumerate(zip(subjects, sequences, periods, treatments, strict=True)):
        if seq_of.setdefault(s, q) != q:
            problems.append(f"sequences[{i}]: subject {s!r} is in sequence {seq_of[s]!r} and {q!r}")
        if (s, p) in seen:
            problems.append(f"periods[{i}]: subject {s!r} has more than one value in period {p}")
        seen.add((s, p))
        if t not in (test, reference):
            continue
        if not (math.isfinite(y[i]) and y[i] > 0.0):
            problems.append(f"values[{i}]: {y[i]!r} is not a finite positive number "
                            "(the analysis is on the log scale)")
            continue
        logs.setdefault(s, {}).setdefault(t, []).append((p, math.log(y[i])))
    for s, by_t in logs.items():
        if len(by_t.get(reference, ())) > 2:
            problems.append(f"subjects: {s!r} has {len(by_t[reference])} reference values; at "
                            "most two are expected")
    if problems:
        raise ValueError("; ".join(problems[:20]))
    d_values: list[float] = []
    d_seq: list[str] = []
    i_values: list[float] = []
    i_seq: list[str] = []
    for s in sorted(logs):
        r = [v for _, v in sorted(logs[s].get(reference, []))]
        t_logs = [v for _, v in logs[s].get(test, [])]
        if len(r) == 2:
            d_values.append(r[0] - r[1])
            d_seq.append(seq_of[s])
        if r and t_logs:
            i_values.append(math.fsum(t_logs) / len(t_logs) - math.fsum(r) / len(r))
            i_seq.append(seq_of[s])
    return np.array(d_values), d_seq, np.array(i_values), i_seq


def _sequence_means(
    x: NDArray[np.float64], seq: list[str],
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    labels = sorted(set(seq))
    codes = np.array([labels.index(q) for q in seq], dtype=np.intp)
    counts = np.bincount(codes, minlength=len(labels)).astype(np.float64)
    return np.bincount(codes, weights=x, minlength=len(labels)) / counts, counts


def _within_sequence_ss(x: NDArray[np.float64], seq: list[str]) -> tuple[float, int]:
    """Residual sum of squares of x regressed on sequence, and the number of sequences."""
    if x.size == 0:
        return 0.0, 0
    labels = sorted(set(seq))
    means, _ = _sequence_means(x, seq)
    fitted = means[np.array([labels.index(q) for q in seq], dtype=np.intp)]
    return float(np.sum((x - fitted) ** 2)), len(labels)


def _exp_percent(log_value: float) -> float | None:
    return None if log_value > 700.0 else _finite_or_none(100.0 * math.exp(log_value))


def _finite_or_none(value: float) -> float | None:
    return value if math.isfinite(value) else None
