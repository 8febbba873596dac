"""The plain lane (service/intake/plain.py) against the row-by-row reader it stands in for.

The reference is the row-by-row reader of the same module: pydantic for every row, the row-to-row
checks and build_tables (themselves tested against pandas and by hand in test_tables.py). The
lane must give the very same normalized inputs and tables wherever it answers, and leave every
request with a problem to the reference, so that the problems named are the same.
"""

from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any
from unittest import mock

import numpy as np
import pytest
import rfc8785
from hypothesis import given, settings
from hypothesis import strategies as st

from service.intake import plain
from service.intake import tables as module
from service.intake.tables import InvalidRequest, MetricTable
from service.records.hashing import canonical_plain_rows
from tests.intake.test_tables import _same_json

SAMPLES = Path(__file__).resolve().parents[2] / "sample_requests"


def _read(raw: Any, lane: bool) -> tuple[str, Any]:
    """("ok", (inputs, tables)) or ("invalid", problems), with the lane or without it."""
    try:
        if lane:
            return "ok", module.normalize_request_and_tables(copy.deepcopy(raw))
        with mock.patch.object(module, "_plain_lane", return_value=None):
            return "ok", module.normalize_request_and_tables(copy.deepcopy(raw))
    except InvalidRequest as exc:
        return "invalid", [(p.loc, p.msg) for p in exc.problems]


def _same_tables(fast: list[MetricTable] | None, reference: list[MetricTable] | None) -> None:
    assert (fast is None) == (reference is None)
    for a, b in zip(fast or [], reference or [], strict=True):
        assert (a.metric, a.treatments, a.subjects, a.sequences, a.excluded, a.parallel) == (
            b.metric, b.treatments, b.subjects, b.sequences, b.excluded, b.parallel)
        assert a.observations == b.observations
        assert all(type(x) is type(y) for x, y in zip(a.observations, b.observations,
                                                      strict=True))
        assert a.values.dtype == b.values.dtype and a.periods.dtype == b.periods.dtype
        np.testing.assert_array_equal(a.values, b.values)
        np.testing.assert_array_equal(a.periods, b.periods)


def _assert_same_reading(raw: dict[str, Any]) -> tuple[str, Any]:
    fast, reference = _read(raw, lane=True), _read(raw, lane=False)
    assert fast[0] == reference[0], (fast, reference)
    if fast[0] == "invalid":
        assert fast[1] == reference[1]
    else:
        assert _same_json(fast[1][0], reference[1][0])
        _same_tables(fast[1][1], reference[1][1])
        normalized = module.normalize_for_record(copy.deepcopy(raw))
        if normalized.plain_records:
            # what the lane vouches for is what hashing.canonical_plain_rows needs: the rfc8785
            # package (the reference of RFC 8785) writes the records the same
            records = normalized.inputs["records"]
            assert canonical_plain_rows(records, "value") == rfc8785.dumps(records)
    return fast


hostile_values = st.one_of(
    st.floats(), st.integers(-(2**60), 2**60), st.sampled_from(
        [1e100, -1e100, 1e101, 5e-324, -0.0, 0, 2**53, -(2**53) + 1, True, "3.5", None]),
)
hostile_labels = st.sampled_from(["", " ", "Ä", "x\ty", 7, None, True, "S1", "T", "R"])


@st.composite
def crossover_requests(draw: st.DrawFn) -> dict[str, Any]:
    """A crossover of a few subjects, most often clean, often with one thing done to it: a row
    dropped, repeated, moved or changed; a label given to some rows only; a hostile value."""
    baseline = draw(st.booleans())
    treatments = ["T", "R"] + (["B"] if baseline else [])
    design: dict[str, Any] = {"test": "T", "reference": "R"}
    if baseline:
        design["baseline"] = draw(st.sampled_from(["B", "B", "B", "R"]))  # "R": a clash
    metrics = draw(st.sampled_from([None, ["AUC"], ["AUC", "CMAX"]]))
    labelled = draw(st.sampled_from(["none", "all", "all", "some"]))
    rows: list[dict[str, Any]] = []
    for number in range(draw(st.integers(2, 6))):
        order = draw(st.permutations(treatments))
        if draw(st.integers(0, 9)) == 0:
            order = [*order, order[0]]  # a replicate period
        for metric in metrics or [None]:
            for period, treatment in enumerate(order, start=1):
                row: dict[str, Any] = {"subject": f"S{number}", "period": period,
                                       "treatment": treatment,
                                       "value": draw(st.floats(0.5, 5000.0) | st.integers(1, 99))}
                if metric is not None:
                    row["metric"] = metric
                if labelled == "all" or labelled == "some" and number % 2:
                    row["sequence"] = "".join(order)
                rows.append(row)
    if draw(st.booleans()):
        draw(st.randoms()).shuffle(rows)
    change = draw(st.sampled_from(["none"] * 6 + [
        "drop", "repeat", "period", "treatment", "value", "label", "subject", "field", "missing",
        "sequence", "order", "metric"]))
    at = draw(st.integers(0, len(rows) - 1))
    if change == "drop":
        del rows[at]
    elif change == "repeat":
        rows.append(dict(rows[at]))
    elif change == "period":
        rows[at]["period"] = draw(st.sampled_from([0, 1, 2, 9, 2**53, -1, 1.0, "2"]))
    elif change == "treatment":
        rows[at]["treatment"] = draw(st.sampled_from(["T", "R", "B", "X"]) | hostile_labels)
    elif change == "value":
        rows[at]["value"] = draw(hostile_values)
    elif change == "label":
        rows[at]["sequence"] = draw(st.sampled_from(["TR", "RT", None, "Z"]) | hostile_labels)
    elif change == "subject":
        rows[at]["subject"] = draw(st.sampled_from(["S0", "S1", "S9"]) | hostile_labels)
    elif change == "field":
        rows[at]["dose"] = 1
    elif change == "missing":
        del rows[at][draw(st.sampled_from(["subject", "period", "treatment", "value"]))]
    elif change == "sequence":
        rows[at] = {**rows[at], "sequence": "TRB"}
    elif change == "order":  # the first row of a dict written with its fields in another order
        rows[at] = dict(reversed(list(rows[at].items())))
    elif change == "metric":
        rows[at]["metric"] = draw(st.sampled_from(["AUC", "OTHER"]) | hostile_labels)
    request: dict[str, Any] = {"design": design, "records": rows,
                               "settings": {"seed": 5, "incomplete_subjects":
                                            draw(st.sampled_from(["exclude", "reject"]))}}
    if draw(st.integers(0, 19)) == 0:
        request["profiles"] = []
    return request


@settings(max_examples=600, deadline=None)
@given(crossover_requests())
def test_the_plain_lane_reads_as_the_row_by_row_reader_does(raw: dict[str, Any]) -> None:
    """Same inputs (value and type, key order too) and the same tables wherever the request is
    valid; the same problems, in the same order, wherever it is not."""
    _assert_same_reading(raw)


def _clean(n: int = 5, labelled: bool = True) -> dict[str, Any]:
    rows = []
    for number in range(n):
        order = ["T", "R", "B"] if number % 2 else ["R", "B", "T"]
        for period, treatment in enumerate(order, start=1):
            row = {"subject": f"S{number}", "period": period, "treatment": treatment,
                   "value": 10.0 + number + period / 8}
            if labelled:
                row["sequence"] = "-".join(order)
            rows.append(row)
    return {"design": {"test": "T", "reference": "R", "baseline": "B"}, "records": rows,
            "settings": {"seed": 3}}


def test_the_lane_answers_for_a_clean_crossover_and_declines_the_rest() -> None:
    """The lane is used (so the comparison above compares something) and builds the tables
    itself for a complete crossover; a replicate period or an incomplete subject leaves the
    tables to build_tables, and anything doubtful leaves the whole request to the reference."""
    treatments = ("T", "R", "B")
    for labelled in (True, False):
        read = plain.read_plain_records(_clean(labelled=labelled)["records"], treatments)
        assert read is not None
        assert plain.complete_crossover_tables(read, treatments, MetricTable,
                                               module.Observation) is not None
    rows = _clean()["records"]
    replicate = [*rows, {**rows[0], "period": 4}]
    read = plain.read_plain_records(replicate, treatments)
    assert read is not None
    assert plain.complete_crossover_tables(read, treatments, MetricTable,
                                           module.Observation) is None
    assert plain.complete_crossover_tables(plain.read_plain_records(rows[1:], treatments),
                                           treatments, MetricTable, module.Observation) is None
    for changed in ({"subject": "Ä1"}, {"value": 2**53}, {"value": float("nan")},
                    {"value": float("inf")}, {"dose": 1}, {"period": True}, {"sequence": None},
                    {"sequence": ""}, {"treatment": "X"}, {"period": 2}, {"sequence": "B-T-R"}):
        assert plain.read_plain_records([{**rows[0], **changed}, *rows[1:]], treatments) is None, (
            changed)
    assert plain.read_plain_records([{**rows[0], "value": 3}, *rows[1:]], treatments) is not None


@pytest.mark.parametrize("request_file", sorted(SAMPLES.glob("*.json")), ids=lambda p: p.stem)
def test_every_sample_request_reads_the_same_with_the_lane(request_file: Path) -> None:
    raw = json.loads(request_file.read_bytes())
    raw.setdefault("settings", {})["seed"] = 7
    assert _assert_same_reading(raw)[0] == "ok"
