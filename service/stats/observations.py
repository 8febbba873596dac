"""Long-form observations of a crossover or replicate study: validation and integer codes.

One entry per observation: subject, sequence, period, treatment, value. Every problem is
collected before any is reported; the message names the field and the entry.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]
IndexArray = NDArray[np.intp]
MAX_LISTED_PROBLEMS = 20


@dataclass(frozen=True)
class CodedObservations:
    """Natural-log values with each factor coded 0..levels−1 in the sorted order of its labels."""

    log_values: FloatArray
    subject_codes: IndexArray
    sequence_codes: IndexArray
    period_codes: IndexArray
    treatment_codes: IndexArray
    subject_labels: tuple[str, ...]
    sequence_labels: tuple[str, ...]
    period_labels: tuple[int, ...]
    treatment_labels: tuple[str, ...]

    def subset(self, rows: NDArray[np.bool_]) -> CodedObservations:
        """The observations where ``rows`` is true, with levels that no longer occur dropped."""
        columns = []
        for codes, labels in ((self.subject_codes, self.subject_labels),
                              (self.sequence_codes, self.sequence_labels),
                              (self.period_codes, self.period_labels),
                              (self.treatment_codes, self.treatment_labels)):
            kept, recoded = np.unique(codes[rows], return_inverse=True)
            columns.append((recoded.astype(np.intp), tuple(labels[i] for i in kept)))
        (subj, subj_l), (seq, seq_l), (per, per_l), (trt, trt_l) = columns
        return CodedObservations(self.log_values[rows], subj, seq, per, trt,
                                 subj_l, seq_l, per_l, trt_l)

    def sequence_of_subject(self) -> IndexArray:
        out = np.zeros(len(self.subject_labels), dtype=np.intp)
        out[self.subject_codes] = self.sequence_codes
        return out


def code_observations(
    subjects: Sequence[str], sequences: Sequence[str], periods: Sequence[int],
    treatments: Sequence[str], values: NDArray[np.float64], test: str, reference: str,
    confidence_level: float, *, require_test_and_reference: bool = True,
) -> CodedObservations:
    """Check the table and code it; raise ValueError listing every problem found.

    With ``require_test_and_reference`` every subject must have a value for both treatments
    (a crossover analysed on complete subjects)."""
    y = np.asarray(values, dtype=np.float64)
    problems: list[str] = []
    if y.ndim != 1:
        raise ValueError(f"values: expected a one-dimensional array, got shape {y.shape}")
    n = y.size
    for name, column in (("subjects", subjects), ("sequences", sequences), ("periods", periods),
                         ("treatments", treatments)):
        if len(column) != n:
            problems.append(f"{name}: has {len(column)} entries, values has {n}")
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
    if require_test_and_reference and test in trt_set and reference in trt_set:
        for s, trts in treated.items():
            missing = {test, reference} - trts
            if missing:
                problems.append(f"subjects: {s!r} has no value for {sorted(missing)}")
    if n < 3:
        problems.append(f"values: {n} observations are too few")
    if problems:
        raise ValueError("; ".join(problems[:MAX_LISTED_PROBLEMS]))

    subject_labels = sorted(seq_of)
    sequence_labels = sorted(set(sequences))
    period_labels = sorted(set(periods))
    treatment_labels = sorted(trt_set)
    return CodedObservations(
        np.log(y), _codes(subjects, subject_labels), _codes(sequences, sequence_labels),
        _codes(periods, period_labels), _codes(treatments, treatment_labels),
        tuple(subject_labels), tuple(sequence_labels), tuple(period_labels),
        tuple(treatment_labels))


def _codes(column: Sequence[Any], levels: Sequence[Any]) -> IndexArray:
    index = {v: i for i, v in enumerate(levels)}
    return np.fromiter((index[v] for v in column), dtype=np.intp, count=len(column))
