"""Average bioequivalence and within-subject variability in replicate designs.

ABE: the fixed-effects model of the crossover (sequence, subject within sequence, period,
treatment; natural logs) over all observations of the analysed subjects — the approach the EMA
questions-and-answers document on replicate designs calls method A (EMA 2010 §4.1.10 context;
from memory). Analysed subjects: those with at least one test and one reference value; every
other subject is listed with the reason.

Within-subject variability (EMA questions and answers, from memory): s²_wR is the residual mean
square of the model subject(within sequence) + period fitted to the reference observations
only; s²_wT likewise from the test observations when some subject has the test more than once.
All subjects' observations of that treatment enter; a subject with one of them is absorbed by
its own effect and adds nothing. CV = sqrt(exp(s²) − 1).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.stats.crossover_fit import fit_absorbed
from service.stats.designs import DesignRecognition, recognise_design
from service.stats.diagnostics import Diagnostic
from service.stats.equivalence import (
    AverageBioequivalence,
    average_bioequivalence_to_json,
    check_limits,
    cv_percent,
    fit_average_bioequivalence,
)
from service.stats.observations import CodedObservations, code_observations
from service.stats.phases import check_deadline

REPLICATE_METHOD = (
    "Replicate design, method A (EMA questions and answers on replicate designs): fixed-effects "
    "linear model on natural-log values, sequence + subject within sequence + period + treatment, "
    "over all observations of the subjects with at least one test and one reference value, "
    "least squares with the subject effects absorbed (Frisch–Waugh–Lovell); two-sided interval "
    "of the test − reference contrast on the residual degrees of freedom. Sequence effect: "
    "one-way analysis of variance of the per-subject sums of log values by sequence, over the "
    "subjects with a value in every period of their sequence."
)

VARIABILITY_METHOD = (
    "s²_wR: residual mean square of subject (within sequence) + period fitted to the reference "
    "observations only (EMA questions and answers); s²_wT likewise from the test observations "
    "when some subject has the test more than once. CV = 100·sqrt(exp(s²) − 1)."
)

_PHASES = 4


@dataclass(frozen=True)
class LeftOutSubject:
    subject: str
    reason: str


@dataclass(frozen=True)
class ReferenceVariability:
    s_wr: float | None
    cv_wr_percent: float | None
    df: int  # residual df of s²_wR
    s_wt: float | None  # None when no subject has the test twice
    cv_wt_percent: float | None
    df_wt: int | None
    diagnostics: tuple[Diagnostic, ...]
    method: str = VARIABILITY_METHOD


@dataclass(frozen=True)
class ReplicateAverageBioequivalence:
    description: str  # e.g. "full replicate, 2 sequences × 4 periods"
    average_bioequivalence: AverageBioequivalence
    reference_variability: ReferenceVariability
    left_out: tuple[LeftOutSubject, ...]
    design: str = "replicate"


def replicate_average_bioequivalence(
    *, subjects: Sequence[str], sequences: Sequence[str], periods: Sequence[int],
    treatments: Sequence[str], values: NDArray[np.float64], test: str, reference: str,
    confidence_level: float = 0.90, limits_percent: tuple[float, float] = (80.0, 125.0),
    deadline: float | None = None,
) -> ReplicateAverageBioequivalence:
    """ABE (method A) and reference variability of a replicate design, incomplete subjects kept.

    Raises ValueError naming the field when the table is not a supported replicate design or
    fails validation. ``deadline`` (time.monotonic()) is checked between phases."""
    recognition = recognise_design(subjects=subjects, sequences=sequences, periods=periods,
                                   treatments=treatments, test=test, reference=reference,
                                   deadline=deadline)
    if recognition.design != "replicate":
        why = (recognition.reason if recognition.design is None
               else f"the table is a {recognition.design} design ({recognition.reason})")
        raise ValueError(f"design: not a supported replicate design: {why}")
    coded = code_observations(subjects, sequences, periods, treatments, values, test, reference,
                              confidence_level, require_test_and_reference=False)
    check_limits(limits_percent)
    check_deadline(deadline, "the choice of analysed subjects", 1, _PHASES)

    n_subjects = len(coded.subject_labels)
    has = {label: np.bincount(coded.subject_codes[coded.treatment_codes
                                                  == coded.treatment_labels.index(label)],
                              minlength=n_subjects) > 0 for label in (test, reference)}
    analysed = has[test] & has[reference]
    left_out = tuple(
        LeftOutSubject(subject, f"no {'test' if not has[test][i] else 'reference'} value: left "
                       "out of the average-bioequivalence model (its values still count toward "
                       "the within-subject variability of their treatment)")
        for i, subject in enumerate(coded.subject_labels) if not analysed[i])
    if int(analysed.sum()) < 2:
        raise ValueError("subjects: fewer than two subjects have both a test and a reference value")
    analysed_obs = coded.subset(analysed[coded.subject_codes])

    incomplete = set(recognition.incomplete_subjects)
    complete = np.array([s not in incomplete for s in analysed_obs.subject_labels], dtype=bool)
    abe = fit_average_bioequivalence(
        analysed_obs, test=test, reference=reference, confidence_level=confidence_level,
        limits_percent=limits_percent, method=REPLICATE_METHOD, sequence_subjects=complete,
        sequence_unavailable=_sequence_unavailable(recognition, test),
        deadline=deadline)
    if not complete.all():
        abe = _with_diagnostic(abe, Diagnostic(
            "sequence_effect_complete_subjects", f"the sequence effect uses the "
            f"{int(complete.sum())} subjects with a value in every period of their sequence; "
            f"{int((~complete).sum())} incomplete subject(s) are in the fixed-effects model "
            "but not in the sequence test"))
    check_deadline(deadline, "the within-subject variability", 3, _PHASES)
    variability = _variability(coded, test, reference)
    return ReplicateAverageBioequivalence(recognition.description or "replicate", abe,
                                          variability, left_out)


def reference_variability(
    *, subjects: Sequence[str], sequences: Sequence[str], periods: Sequence[int],
    treatments: Sequence[str], values: NDArray[np.float64], test: str, reference: str,
    deadline: float | None = None,
) -> ReferenceVariability:
    """s_wR (and s_wT where the test is replicated) from a replicate table; see the module text."""
    coded = code_observations(subjects, sequences, periods, treatments, values, test, reference,
                              0.9, require_test_and_reference=False)
    check_deadline(deadline, "the within-subject variability", 1, 2)
    return _variability(coded, test, reference)


def _variability(coded: CodedObservations, test: str, reference: str) -> ReferenceVariability:
    diagnostics: list[Diagnostic] = []
    s2_r, df_r, _ = _within_subject_variance(coded, reference)
    if s2_r is None:
        diagnostics.append(Diagnostic("no_reference_replicates", "no residual degrees of freedom "
                                      "among the reference observations (no subject has two "
                                      "reference values beyond what the period effects use): "
                                      "s_wR cannot be computed"))
    s2_t, df_t, replicated = _within_subject_variance(coded, test)
    if not replicated:
        diagnostics.append(Diagnostic("test_not_replicated", "no subject has the test more than "
                                      "once: s_wT is not computed"))
        s2_t, df_t_out = None, None
    else:
        df_t_out = df_t
        if s2_t is None:
            diagnostics.append(Diagnostic("no_test_replicates", "no residual degrees of freedom "
                                          "among the test observations: s_wT cannot be computed"))
    return ReferenceVariability(
        s_wr=None if s2_r is None else math.sqrt(s2_r),
        cv_wr_percent=None if s2_r is None else cv_percent(s2_r), df=df_r,
        s_wt=None if s2_t is None else math.sqrt(s2_t),
        cv_wt_percent=None if s2_t is None else cv_percent(s2_t), df_wt=df_t_out,
        diagnostics=tuple(diagnostics))


def _within_subject_variance(coded: CodedObservations, treatment: str) -> tuple[float | None, int, bool]:
    """(s², residual df, replicated) of log values of one treatment ~ subject + period."""
    rows = coded.treatment_codes == coded.treatment_labels.index(treatment)
    one = coded.subset(rows)
    per_subject = np.bincount(one.subject_codes, minlength=len(one.subject_labels))
    fit = fit_absorbed(one.log_values, one.subject_codes, len(one.subject_labels),
                       [(one.period_codes, len(one.period_labels))])
    if fit.df <= 0:
        return None, max(fit.df, 0), bool(np.any(per_subject > 1))
    s2 = fit.sse / fit.df
    # An exact fit leaves only rounding noise in the residuals: report zero.
    if math.sqrt(s2) <= 1e-12 * max(1.0, float(np.max(np.abs(one.log_values)))):
        s2 = 0.0
    return s2, fit.df, bool(np.any(per_subject > 1))


def _sequence_unavailable(recognition: DesignRecognition, test: str) -> Diagnostic | None:
    if len({o.treatments.count(test) for o in recognition.orders}) > 1:
        return Diagnostic("sequence_effect_not_separable", "the sequences give the test a "
                          "different number of times, so the subject sums mix the sequence "
                          "effect with the treatment effect: no sequence effect is computed")
    return None


def _with_diagnostic(a: AverageBioequivalence, d: Diagnostic) -> AverageBioequivalence:
    return replace(a, diagnostics=(*a.diagnostics, d))


def reference_variability_to_json(v: ReferenceVariability) -> dict[str, Any]:
    return {"s_wr": v.s_wr, "cv_wr_percent": v.cv_wr_percent, "df": v.df, "s_wt": v.s_wt,
            "cv_wt_percent": v.cv_wt_percent, "df_wt": v.df_wt, "method": v.method}


def replicate_average_bioequivalence_to_json(r: ReplicateAverageBioequivalence) -> dict[str, Any]:
    """The ``average_bioequivalence`` block of a replicate study: the crossover block's keys plus
    design, design_description, reference_variability and subjects_left_out."""
    doc = average_bioequivalence_to_json(r.average_bioequivalence)
    doc["design"] = r.design
    doc["design_description"] = r.description
    doc["reference_variability"] = reference_variability_to_json(r.reference_variability)
    doc["subjects_left_out"] = [{"subject": s.subject, "reason": s.reason} for s in r.left_out]
    doc["warnings"] = [*doc["warnings"], *({"code": d.code, "message": d.message}
                                           for d in r.reference_variability.diagnostics)]
    return doc
