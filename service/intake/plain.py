"""The plain lane: a clean, records-only request read column by column, in a fraction of the time.

normalize_request_and_tables (tables.py) reads a request row by row: pydantic for each row, then
the row-to-row checks (checks.py), then the tables (build_tables). For the usual request, a table
of plain rows with nothing wrong in it, that is mostly Python-level work per row. This lane does
the same checks on whole columns at once (sets, min and max, and zip in C) and builds the tables
of a complete crossover directly.

It only ever says yes: the normalized records and tables it returns are the ones the row-by-row
reader returns for the same request (tests/intake/test_plain.py checks it on generated requests,
tests/intake/test_tables.py that it accepts no row pydantic refuses). As soon as anything is not
plain — a row that is not an exact dict of the same fields, a label that is not ASCII, a value
that is an int of 2**53 or more, a duplicate, a clash — it answers None, and the row-by-row
reader decides and names every problem as it always has. Tables that are not a complete
crossover (a replicate, an incomplete subject, parallel groups) are left to build_tables.
"""

from __future__ import annotations

import math
from collections import Counter
from operator import itemgetter
from typing import Any, NamedTuple

import numpy as np

from service.intake.models import JSON_SAFE_INTEGER_LIMIT, MAX_MAGNITUDE, Record

# Which of the tables' types a row becomes is tables.py's business; the lane builds the same.
_FIELDS = frozenset(Record.model_fields)
_REQUIRED = frozenset(name for name, field in Record.model_fields.items() if field.is_required())
_EXACT_INT = 2**53  # ints below this in magnitude are exactly the float of the same value
_DEFAULT_METRIC = Record.model_fields["metric"].default
_NONE_TYPE = type(None)


def _labels(column: tuple[Any, ...]) -> bool:
    """Every entry a label models.Record accepts for sure: an ASCII string, not blank."""
    if set(map(type, column)) != {str}:
        return False
    return all(text.isascii() and text.strip() for text in set(column))


class PlainRecords(NamedTuple):
    """What read_plain_records read: the normalized records, the same rows as sorted tuples
    (metric, subject, period, treatment, sequence, value), and whether no row has a label."""

    records: list[dict[str, Any]]
    rows: list[tuple[str, str, int, str, str | None, float]]
    unlabelled: bool


def read_plain_records(items: Any, treatments: tuple[str, ...]) -> PlainRecords | None:
    """The normalized records of `items` (the request's "records"), sorted as tables.py sorts
    them, if every row is plain and the rows agree with each other: no two values of one metric
    for a subject in one period, one treatment per subject and period, one sequence label per
    subject, subjects sharing a label treated in the same order, every treatment one of
    `treatments`. None otherwise (the row-by-row reader then decides)."""
    if type(items) is not list or not items or set(map(type, items)) != {dict}:
        return None
    names = tuple(items[0])
    if not _REQUIRED <= set(names) <= _FIELDS:
        return None
    try:
        rows = list(map(itemgetter(*names), items))
    except KeyError:
        return None
    if sum(map(len, items)) != len(items) * len(names):
        return None  # every row has the first row's fields, so some row has another field too
    columns = dict(zip(names, zip(*rows, strict=True), strict=True))
    count = len(items)
    subjects, periods = columns["subject"], columns["period"]
    treatment_column, values = columns["treatment"], columns["value"]
    metrics = columns.get("metric", (_DEFAULT_METRIC,) * count)
    sequences = columns.get("sequence", (None,) * count)
    if not (_labels(subjects) and _labels(treatment_column) and _labels(metrics)):
        return None
    if set(treatment_column) - set(treatments):
        return None
    labelled = set(map(type, sequences))
    if labelled != {_NONE_TYPE} and not _labels(sequences):
        return None  # a mix of labels and nulls goes row by row
    if set(map(type, periods)) != {int} or min(periods) < 1 or max(periods) >= JSON_SAFE_INTEGER_LIMIT:
        return None
    kinds = set(map(type, values))
    if kinds == {float, int} or kinds == {int}:
        if not all(-_EXACT_INT < value < _EXACT_INT for value in values if type(value) is int):
            return None
        values = tuple(map(float, values))  # float(x) of a float is x itself
    elif kinds != {float}:
        return None
    # Every value finite and within the magnitude limit: NaN or an infinity makes the sum
    # non-finite, whatever min and max make of it.
    if min(values) < -MAX_MAGNITUDE or max(values) > MAX_MAGNITUDE or not math.isfinite(
        sum(values)
    ):
        return None

    if len(set(zip(subjects, periods, metrics, strict=True))) != count:
        return None  # a duplicate: checks.check_records names it
    slots = dict(zip(zip(subjects, periods, strict=True), treatment_column, strict=True))
    if len(set(zip(subjects, periods, treatment_column, strict=True))) != len(slots):
        return None  # two treatments in one period: checks.check_consistency names it
    if labelled != {_NONE_TYPE} and not (
        # one label per subject, and in each period one treatment for all subjects of a label
        # (stricter than checks.check_consistency, which compares each subject with the first
        # of its label on the periods both have: where this says no, the row-by-row reader
        # decides)
        len(set(zip(subjects, sequences, strict=True))) == len(set(subjects))
        and len(set(zip(sequences, periods, treatment_column, strict=True)))
        == len(set(zip(sequences, periods, strict=True)))
    ):
        return None

    # Unique (metric, subject, period): the sort never compares past the period.
    ordered = sorted(zip(metrics, subjects, periods, treatment_column, sequences, values,
                         strict=True))
    records = [
        {"subject": subject, "period": period, "sequence": sequence, "treatment": treatment,
         "metric": metric, "value": value}
        for metric, subject, period, treatment, sequence, value in ordered
    ]
    return PlainRecords(records, ordered, labelled == {_NONE_TYPE})


def complete_crossover_tables(
    plain: PlainRecords, treatments: tuple[str, ...], table_type: Any, observation_type: Any,
) -> list[Any] | None:
    """build_tables of plain records (read_plain_records) where every metric is a complete
    crossover: each subject has each of `treatments` exactly once, at least 3 subjects. None
    for anything else (build_tables then builds, or refuses, the tables)."""
    width = len(treatments)
    column_of = {treatment: j for j, treatment in enumerate(treatments)}
    sequence_of = _sequences(plain)
    make = tuple.__new__  # a NamedTuple less the call of its generated __new__
    tables = []
    start = 0
    counts = Counter([row[0] for row in plain.rows])
    for metric in sorted(counts):
        rows = plain.rows[start : start + counts[metric]]  # rows are sorted by metric first
        start += len(rows)
        subjects = tuple(dict.fromkeys([row[1] for row in rows]))
        if len(subjects) < 3 or len(rows) != len(subjects) * width:
            return None
        placed = [column_of[row[3]] for row in rows]
        if len(set(zip([row[1] for row in rows], placed, strict=True))) != len(rows):
            return None  # a treatment twice for a subject (so another missing): build_tables
        at = (np.repeat(np.arange(len(subjects)), width), placed)
        values = np.empty((len(subjects), width), dtype=np.float64)
        values[at] = [row[5] for row in rows]
        periods = np.empty((len(subjects), width), dtype=np.int64)
        periods[at] = [row[2] for row in rows]
        tables.append(table_type(
            metric=metric, treatments=treatments, subjects=subjects, values=values,
            periods=periods, sequences=tuple([sequence_of[s] for s in subjects]), excluded=(),
            observations=tuple([make(observation_type, (s, sequence_of[s], p, t, v))
                                for _, s, p, t, _, v in rows]),
        ))
    return tables


def _sequences(plain: PlainRecords) -> dict[str, str]:
    """tables._sequences_of for plain records (one label per subject, one treatment per
    period): the label, or else the treatments in period order ("R-T-B")."""
    if not plain.unlabelled:
        return {row[1]: row[4] for row in plain.rows}  # type: ignore[misc]
    plan: dict[str, dict[int, str]] = {}
    for _, subject, period, treatment, _, _ in plain.rows:
        own = plan.get(subject)
        if own is None:
            plan[subject] = {period: treatment}
        else:
            own[period] = treatment
    return {subject: "-".join([t for _, t in sorted(own.items())]) for subject, own in plan.items()}
