"""Validation, normalization and per-metric matrices (service/tables.py)."""

from __future__ import annotations

import copy
import json
import math
from typing import Any

import numpy as np
import pandas as pd
import pytest
import rfc8785
from hypothesis import given, settings
from hypothesis import strategies as st

from service.intake.tables import (
    ExcludedSubject,
    InvalidRequest,
    Problem,
    build_tables,
    format_loc,
    normalize_request,
    parse_json_body,
)

# Williams-style orders for three treatments: each treatment once in each period.
ORDERS = {"TRB": ("T", "R", "B"), "RBT": ("R", "B", "T"), "BTR": ("B", "T", "R")}


def make_request(n: int = 6, seed: int = 11, metrics: tuple[str, ...] = ("AUC",)) -> dict[str, Any]:
    rng = np.random.default_rng(seed)
    labels = list(ORDERS)
    records = []
    for i in range(n):
        subject = f"S{i + 1:02d}"
        label = labels[i % 3]
        for metric in metrics:
            for period, treatment in enumerate(ORDERS[label], start=1):
                records.append({"subject": subject, "period": period, "sequence": label,
                                "treatment": treatment, "metric": metric,
                                "value": float(np.round(rng.lognormal(3.0, 0.3), 4))})
    return {"design": {"test": "T", "reference": "R", "baseline": "B"}, "records": records,
            "settings": {"seed": 20261202, "replicates": 2000}}


def make_profiles(subjects: tuple[str, ...] = ("S01", "S02", "S03")) -> list[dict[str, Any]]:
    rows = []
    for s_index, subject in enumerate(subjects):
        order = list(ORDERS)[s_index % 3]
        for period, treatment in enumerate(ORDERS[order], start=1):
            for time in (0.0, 1.0, 2.0, 4.0):
                rows.append({"subject": subject, "period": period, "treatment": treatment,
                             "time": time, "concentration": round(5.0 * time * math.exp(-time), 4)})
    return rows


def problems_of(raw: Any) -> list[Problem]:
    with pytest.raises(InvalidRequest) as info:
        normalize_request(raw)
    assert info.value.problems, "InvalidRequest must carry at least one problem"
    return info.value.problems


def find(problems: list[Problem], loc: tuple[str | int, ...], fragment: str) -> Problem:
    hits = [p for p in problems if p.loc == loc and fragment in p.msg]
    assert hits, f"no problem at {loc} containing {fragment!r}; got {problems}"
    return hits[0]


# --- locations and the JSON reader ---

def test_format_loc() -> None:
    """Bracket/dot path notation as in the shorthand of JSONPath (RFC 9535); line/column wording is
    common practice for text files."""
    assert format_loc(("records", 12, "value")) == "records[12].value"
    assert format_loc(("line", 7, "value")) == "line 7, column value"
    assert format_loc(("settings", "limits", "lower")) == "settings.limits.lower"
    assert format_loc(("line", 3)) == "line 3"


def test_json_malformed_names_line_and_column() -> None:
    """Line and column agree with the Python standard library's json.JSONDecodeError."""
    body = b'{\n  "design": {"test": "T",,}\n}'
    try:
        json.loads(body)
    except json.JSONDecodeError as exc:
        expected = f"line {exc.lineno} column {exc.colno}"
    with pytest.raises(InvalidRequest) as info:
        parse_json_body(body)
    (problem,) = info.value.problems
    assert problem.loc == ("body",) and expected in problem.msg and "malformed JSON" in problem.msg


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity"])
def test_json_non_finite_literals_rejected(literal: str) -> None:
    """RFC 8259 section 6: Infinity and NaN are not permitted as JSON numbers."""
    with pytest.raises(InvalidRequest) as info:
        parse_json_body(('{"value": ' + literal + "}").encode())
    (problem,) = info.value.problems
    assert problem.loc == ("body",) and literal in problem.msg and "not allowed" in problem.msg


def test_json_bom_tolerated_and_bad_utf8_named() -> None:
    """RFC 8259 section 8.1 lets a parser ignore a leading BOM; the failing byte offset agrees with
    Python's UTF-8 codec (RFC 3629)."""
    assert parse_json_body(b'\xef\xbb\xbf{"a": 1}') == {"a": 1}
    body = b'{"a": "\xff"}'
    try:
        body.decode("utf-8")
    except UnicodeDecodeError as exc:
        offset = exc.start
    with pytest.raises(InvalidRequest) as info:
        parse_json_body(body)
    (problem,) = info.value.problems
    assert problem.loc == ("body",) and "UTF-8" in problem.msg and f"byte {offset}" in problem.msg


# --- normalization ---

def test_defaults_filled_and_records_sorted() -> None:
    """Defaults from the data contract (DESIGN.md settings block); order checked against Python's
    own sort of the (metric, subject, period, treatment) keys."""
    raw = make_request(metrics=("Cmax", "AUC"))
    raw.pop("settings")
    inputs = normalize_request(raw)
    keys = [(r["metric"], r["subject"], r["period"], r["treatment"]) for r in inputs["records"]]
    assert keys == sorted((r["metric"], r["subject"], r["period"], r["treatment"])
                          for r in raw["records"])
    s = inputs["settings"]
    assert (s["replicates"], s["confidence_level"], s["interval"]) == (10000, 0.90, "bca")
    assert s["limits"] == {"lower": -0.20, "upper": 0.20}
    assert s["average_bioequivalence"] == {"confidence_level": 0.90,
                                           "limits": {"lower": 80.0, "upper": 125.0},
                                           "treatments_in_model": "compared"}
    assert s["profiles"] == {"auc_method": "linear_up_log_down", "lloq": None,
                             "baseline_correction": False, "below_lloq_after_first": "exclude"}
    assert inputs["study"] == {"title": "", "analyte": "", "unit": "", "description": ""}
    assert inputs["profiles"] == []
    assert isinstance(s["seed"], int) and 0 <= s["seed"] < 2**53
    # RFC 8785 canonicalization accepts only plain JSON values, so this also checks the types.
    assert rfc8785.dumps(inputs)


def test_seed_from_entropy_when_absent_or_null() -> None:
    """Two draws of 53 random bits coincide with probability 2**-53 (Python `secrets`); 53 bits is
    the exact-integer range of RFC 8785 / I-JSON (RFC 7493 section 2.2), checked by hashing."""
    raw = make_request()
    raw["settings"]["seed"] = None
    first = normalize_request(raw)["settings"]["seed"]
    del raw["settings"]["seed"]
    second = normalize_request(raw)["settings"]["seed"]
    assert first != second and 0 <= min(first, second) and max(first, second) < 2**53
    raw["settings"]["seed"] = 2**53 - 1
    assert rfc8785.dumps(normalize_request(raw))
    raw["settings"]["seed"] = 2**53
    find(problems_of(raw), ("settings", "seed"), "less than 9007199254740992")


def test_row_order_invariance() -> None:
    """Sorting makes the normalized inputs a function of the set of rows (common practice for
    content hashes); the RFC 8785 hash must agree too."""
    raw = make_request(metrics=("AUC", "Cmax"))
    shuffled = copy.deepcopy(raw)
    np.random.default_rng(3).shuffle(shuffled["records"])
    assert shuffled["records"] != raw["records"]
    a, b = normalize_request(raw), normalize_request(shuffled)
    assert a == b and rfc8785.dumps(a) == rfc8785.dumps(b)


def test_int_value_equals_float_value() -> None:
    """JSON does not distinguish 3 from 3.0 (RFC 8259 section 6); the canonical form must not
    either."""
    raw = make_request()
    raw["records"][0]["value"] = 3
    as_int = normalize_request(raw)
    raw["records"][0]["value"] = 3.0
    as_float = normalize_request(raw)
    assert as_int == as_float and rfc8785.dumps(as_int) == rfc8785.dumps(as_float)
    assert any(type(r["value"]) is float and r["value"] == 3.0 for r in as_int["records"])


def test_labels_kept_exactly() -> None:
    """Labels are data: the hash must reflect them byte for byte (common practice)."""
    raw = make_request()
    for record in raw["records"]:
        if record["subject"] == "S01":
            record["subject"] = " S01 "
    subjects = {r["subject"] for r in normalize_request(raw)["records"]}
    assert " S01 " in subjects


# --- one message per fault ---

def test_field_level_problems() -> None:
    """Required fields, unknown fields and strict JSON types follow the data contract; "NaN is not
    a number value" is RFC 8259 section 6."""
    raw = make_request()
    raw["records"][0].pop("value")
    raw["records"][1]["colour"] = "red"
    raw["records"][2]["subject"] = 7
    raw["records"][3]["value"] = "3.1"
    raw["records"][4]["value"] = True
    raw["records"][5]["value"] = float("nan")
    raw["records"][6]["value"] = float("-inf")
    raw["records"][7]["period"] = 0
    raw["records"][8]["treatment"] = "   "
    raw["records"][9]["period"] = 2.0
    raw["extra"] = 1
    problems = problems_of(raw)
    find(problems, ("records", 0, "value"), "field required")
    find(problems, ("records", 1, "colour"), "unknown field")
    find(problems, ("records", 2, "subject"), "must be a string")
    find(problems, ("records", 3, "value"), "must be a number, got a string")
    find(problems, ("records", 4, "value"), "must be a number, got a boolean")
    find(problems, ("records", 5, "value"), "must be a finite number, got NaN")
    find(problems, ("records", 6, "value"), "must be a finite number, got -Infinity")
    find(problems, ("records", 7, "period"), "at least 1")
    find(problems, ("records", 8, "treatment"), "only whitespace")
    find(problems, ("records", 9, "period"), "must be an integer")
    find(problems, ("extra",), "unknown field")
    assert len(problems) == 11


def test_body_and_design_shape() -> None:
    """The request is a JSON object with a design (data contract in DESIGN.md)."""
    find(problems_of([1, 2]), ("body",), "JSON object")
    raw = make_request()
    del raw["design"]
    find(problems_of(raw), ("design",), "field required")
    raw = make_request()
    raw["design"] = {"test": "T"}
    find(problems_of(raw), ("design", "reference"), "field required")


def test_no_records_and_no_profiles() -> None:
    """An analysis needs data (common practice)."""
    raw = make_request()
    raw["records"] = []
    find(problems_of(raw), ("records",), "at least one record is required")
    del raw["records"]
    find(problems_of(raw), ("records",), "at least one record is required")
    raw["records"] = None
    find(problems_of(raw), ("records",), "must be a list, got null")


def test_design_labels_must_differ() -> None:
    """In a comparative crossover the arms are distinct treatments (ICH E9 section 3.3; common
    practice)."""
    raw = make_request()
    raw["design"] = {"test": "T", "reference": "T", "baseline": "B"}
    find(problems_of(raw), ("design", "reference"), "must differ from test")
    raw["design"] = {"test": "T", "reference": "R", "baseline": "R"}
    find(problems_of(raw), ("design", "baseline"), "equals reference 'R'")


def test_treatment_not_in_design() -> None:
    """Every record belongs to one of the design's arms (data contract)."""
    raw = make_request()
    raw["records"][4]["treatment"] = "X"
    problem = find(problems_of(raw), ("records", 4, "treatment"), "not in the design")
    assert "'T', 'R', 'B'" in problem.msg


def test_duplicates() -> None:
    """A subject has one measurement of a metric per period (common practice). A treatment that
    recurs in another period is a replicate design (EMA 2010 §4.1.10 and its Q&A), not a duplicate:
    it is read, and the design is judged later from the whole table."""
    raw = make_request()
    extra = dict(raw["records"][0])
    extra["treatment"] = "B"  # same subject, metric and period as records[0]
    raw["records"].append(extra)
    index = len(raw["records"]) - 1
    problems = problems_of(raw)
    find(problems, ("records", index, "period"), "records[0]")
    assert not [p for p in problems if p.loc == ("records", index, "treatment")]


def test_a_treatment_in_a_fourth_period_is_kept_as_a_replicate() -> None:
    """Replicate designs give a subject the same treatment in two periods (EMA 2010 §4.1.10): every
    observation is kept, and the subject's value for θ is the mean of its replicates."""
    raw = make_request()
    first = raw["records"][0]
    extra = {**first, "period": 4, "value": first["value"] + 1.0}
    raw["records"].append(extra)
    inputs = normalize_request(raw)
    (table,) = build_tables(inputs)
    i = table.subjects.index(first["subject"])
    j = table.treatments.index(first["treatment"])
    assert table.values[i, j] == (first["value"] + extra["value"]) / 2
    assert table.periods[i, j] == first["period"]
    assert sum(o.subject == first["subject"] for o in table.observations) == 4


def test_mapping_disagrees_between_metrics_and_with_profiles() -> None:
    """One subject's period -> treatment assignment is a fact of the study, the same for all
    metrics (common practice for crossover data)."""
    raw = make_request(metrics=("AUC", "Cmax"))
    cmax = [i for i, r in enumerate(raw["records"]) if r["metric"] == "Cmax"
            and r["subject"] == "S01"]
    p1, p2 = cmax[0], cmax[1]
    raw["records"][p1]["treatment"], raw["records"][p2]["treatment"] = "R", "T"
    problems = problems_of(raw)
    find(problems, ("records", p1, "treatment"), "received 'T' in period 1")

    raw = make_request()
    raw["profiles"] = make_profiles()
    raw["profiles"][0]["treatment"] = "R"  # S01 period 1 is 'T' in the records
    raw["profiles"][0]["time"] = 9.0
    find(problems_of(raw), ("profiles", 0, "treatment"), "received 'T' in period 1")


def test_two_sequence_labels_for_one_subject() -> None:
    """A subject belongs to one sequence group (common practice)."""
    raw = make_request()
    raw["records"][1]["sequence"] = "OTHER"
    find(problems_of(raw), ("records", 1, "sequence"), "has sequence label 'TRB'")


def test_shared_label_different_order() -> None:
    """All subjects of a sequence group receive the same treatment order (definition of a sequence
    in a crossover; ICH E9 section 2.3.2)."""
    raw = make_request()
    for r in raw["records"]:
        if r["subject"] == "S04":  # S04 is in 'TRB'; give it the 'RBT' order but keep the label
            r["treatment"] = ORDERS["RBT"][r["period"] - 1]
    first = next(i for i, r in enumerate(raw["records"]) if r["subject"] == "S04")
    problem = find(problems_of(raw), ("records", first, "sequence"),
                   "subjects S01 and S04 share sequence label 'TRB'")
    assert "T-R-B" in problem.msg and "R-B-T" in problem.msg


@pytest.mark.parametrize(
    ("path", "value", "fragment"),
    [
        (("replicates",), 99, "at least 100"),
        (("replicates",), 1_000_001, "at most 1000000"),
        (("seed",), -1, "at least 0"),
        (("seed",), 2**63, "less than"),
        (("seed",), True, "must be an integer, got a boolean"),
        (("confidence_level",), 0.5, "greater than 0.5"),
        (("confidence_level",), 0.999, "less than 0.999"),
        (("interval",), "bc", "'percentile', 'basic', 'normal' or 'bca'"),
        (("limits",), {"lower": 0.2, "upper": 0.2}, "must be less than upper"),
        (("stratify_by_sequence",), "yes", "true or false"),
        (("incomplete_subjects",), "drop", "'exclude' or 'reject'"),
        (("average_bioequivalence", "confidence_level"), 1.0, "less than 0.999"),
        (("average_bioequivalence", "limits", "lower"), 100.0, "less than 100"),
        (("average_bioequivalence", "limits", "upper"), 99.0, "greater than 100"),
        (("average_bioequivalence", "treatments_in_model"), "some", "'compared' or 'all'"),
        (("profiles", "auc_method"), "cubic", "'linear_up_log_down' or 'linear'"),
        (("profiles", "lloq"), 0.0, "greater than 0"),
        (("profiles", "below_lloq_after_first"), "half", "'exclude' or 'zero'"),
    ],
)
def test_settings_ranges(path: tuple[str, ...], value: Any, fragment: str) -> None:
    """Ranges from the data contract; 80-125 % ABE limits: FDA 2001 guidance and EMA
    CPMP/EWP/QWP/1401/98 Rev.1 section 4.1.8."""
    raw = make_request()
    target = raw["settings"]
    for part in path[:-1]:
        target = target.setdefault(part, {})
    target[path[-1]] = value
    loc = ("settings", *path)
    find(problems_of(raw), loc, fragment)


def test_incomplete_subject_excluded_or_rejected() -> None:
    """Subjects without a value under every compared arm cannot enter a within-subject contrast
    (EMA CPMP/EWP/QWP/1401/98 Rev.1 section 4.1.8; common practice)."""
    raw = make_request(n=6)
    raw["records"] = [r for r in raw["records"] if not (r["subject"] == "S02" and
                                                         r["treatment"] == "B")]
    (table,) = build_tables(normalize_request(raw))
    assert table.excluded == (ExcludedSubject("S02", "no value for treatment 'B'"),)
    assert "S02" not in table.subjects and len(table.subjects) == 5
    raw["settings"]["incomplete_subjects"] = "reject"
    problem = find(problems_of(raw), ("records",), "metric 'AUC': subject 'S02'")
    assert "no value for treatment 'B'" in problem.msg


def test_too_few_subjects() -> None:
    """A jackknife standard error needs at least a few subjects; three is the floor set by the data
    contract (common practice)."""
    raw = make_request(n=3)
    raw["records"] = [r for r in raw["records"] if not (r["subject"] == "S03" and
                                                         r["treatment"] == "R")]
    find(problems_of(raw), ("records",), "metric 'AUC': only 2 analysable subjects; at least 3")


def test_table_checks_run_beside_settings_faults() -> None:
    """Every problem at once (RFC 9457 `errors` list): a settings fault does not hide a table
    fault, and the reject rule applies even when another setting is wrong."""
    raw = make_request(n=3)
    raw["records"] = [r for r in raw["records"] if not (r["subject"] == "S03" and
                                                         r["treatment"] == "R")]
    raw["settings"]["replicates"] = 1
    raw["settings"]["incomplete_subjects"] = "reject"
    problems = problems_of(raw)
    find(problems, ("settings", "replicates"), "at least 100")
    find(problems, ("records",), "only 2 analysable subjects")
    find(problems, ("records",), "subject 'S03' has no value for treatment 'R'")
    assert len(problems) == 3


def test_profile_problems() -> None:
    """A concentration-time profile has distinct sampling times and at least three of them to form
    an area (Yeh & Kwan 1978 trapezoids need points; common practice); concentrations and times
    are non-negative."""
    raw = make_request()
    raw["profiles"] = make_profiles()
    raw["profiles"][1]["time"] = 0.0                      # duplicate time in S01 period 1
    raw["profiles"][5]["concentration"] = None           # null without below_lloq
    raw["profiles"][6]["concentration"] = -1.0
    raw["profiles"][7]["time"] = -0.5
    raw["profiles"][8]["time"] = float("inf")
    problems = problems_of(raw)
    find(problems, ("profiles", 1, "time"), "already has a sample at time 0.0 (profiles[0])")
    find(problems, ("profiles", 5, "concentration"), "only when below_lloq is true")
    find(problems, ("profiles", 6, "concentration"), "at least 0")
    find(problems, ("profiles", 7, "time"), "at least 0")
    find(problems, ("profiles", 8, "time"), "finite number, got Infinity")

    raw = make_request()
    raw["profiles"] = [p for p in make_profiles() if not (p["subject"] == "S02" and
                                                          p["period"] == 1 and p["time"] > 1)]
    first = next(i for i, p in enumerate(raw["profiles"]) if p["subject"] == "S02")
    find(problems_of(raw), ("profiles", first, "time"), "has only 2 time points")


def test_below_lloq_null_concentration_accepted_and_profiles_sorted() -> None:
    """Null is the JSON way to say "no number" (RFC 8259); order checked against Python's sort."""
    raw = make_request()
    profiles = make_profiles()
    profiles[0]["concentration"] = None
    profiles[0]["below_lloq"] = True
    raw["profiles"] = list(reversed(profiles))
    out = normalize_request(raw)["profiles"]
    keys = [(p["subject"], p["period"], p["treatment"], p["time"]) for p in out]
    assert keys == sorted(keys) and len(out) == len(profiles)
    assert out[0]["concentration"] is None and out[0]["below_lloq"] is True


def test_record_metric_named_like_a_derived_metric() -> None:
    """Derived metric names come from the data contract (DESIGN.md, profiles section); a record
    under one of them beside profiles would be mixed with the derived values."""
    raw = make_request()
    raw["records"][3]["metric"] = "cmax"
    raw["profiles"] = make_profiles()
    find(problems_of(raw), ("records", 3, "metric"), "reserved for the metrics derived")


def test_profiles_alone_are_enough() -> None:
    """The data contract allows profiles instead of records."""
    raw = make_request()
    raw["records"] = []
    raw["profiles"] = make_profiles()
    assert normalize_request(raw)["records"] == []


def test_all_problems_at_once() -> None:
    """Collecting every fault before answering follows RFC 9457's `errors` extension use; five
    faults give five problems."""
    raw = make_request()
    raw["records"][0]["value"] = float("nan")
    raw["records"][1]["treatment"] = "X"
    raw["study"] = {"title": 5}
    raw["settings"]["replicates"] = 5
    raw["settings"]["interval"] = "student"
    problems = problems_of(raw)
    assert len(problems) == 5, problems
    assert {p.loc for p in problems} == {("records", 0, "value"), ("records", 1, "treatment"),
                                         ("study", "title"), ("settings", "replicates"),
                                         ("settings", "interval")}


# --- per-metric matrices ---

def test_build_tables_against_pandas_pivot() -> None:
    """Values and periods agree with pandas.pivot_table of the same long table (reference
    library); default sequences are the treatment order by period."""
    raw = make_request(n=7, metrics=("AUC", "Cmax"))
    for r in raw["records"]:
        r.pop("sequence")
    inputs = normalize_request(raw)
    tables = build_tables(inputs)
    assert [t.metric for t in tables] == ["AUC", "Cmax"]
    frame = pd.DataFrame(raw["records"])
    for table in tables:
        part = frame[frame["metric"] == table.metric]
        wide = part.pivot_table(index="subject", columns="treatment", values="value")
        when = part.pivot_table(index="subject", columns="treatment", values="period")
        assert table.treatments == ("T", "R", "B")
        assert table.subjects == tuple(sorted(wide.index))
        np.testing.assert_array_equal(table.values, wide.loc[list(table.subjects),
                                                             list(table.treatments)].to_numpy())
        np.testing.assert_array_equal(table.periods, when.loc[list(table.subjects),
                                                              list(table.treatments)].to_numpy())
        assert table.values.dtype == np.float64 and table.periods.dtype == np.int64
        assert table.sequences[0] == "T-R-B" and table.sequences[1] == "R-B-T"


def test_build_tables_two_arms_labels_and_extra_records() -> None:
    """Without a baseline the matrix has the (test, reference) columns (data contract); derived
    records join as their own metric."""
    raw = make_request()
    raw["design"] = {"test": "T", "reference": "R"}
    raw["records"] = [r for r in raw["records"] if r["treatment"] != "B"]
    inputs = normalize_request(raw)
    extra = [{"subject": r["subject"], "period": r["period"], "sequence": None,
              "treatment": r["treatment"], "metric": "auc_0_t", "value": 2.0 * r["value"]}
             for r in inputs["records"]]
    response, auc = build_tables(inputs, extra)
    assert response.treatments == ("T", "R") and response.values.shape == (6, 2)
    assert response.sequences[:3] == ("TRB", "RBT", "BTR")
    np.testing.assert_allclose(auc.values, 2.0 * response.values, rtol=0, atol=0)
    assert auc.sequences == response.sequences  # labels given elsewhere for the subject apply
    with pytest.raises(InvalidRequest) as info:
        build_tables(inputs, [e for e in extra if e["subject"] in ("S01", "S02")])
    find(info.value.problems, ("profiles",), "metric 'auc_0_t': only 2 analysable subjects")


# --- robustness ---

json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=8),
    lambda inner: st.lists(inner, max_size=4)
    | st.dictionaries(st.sampled_from(["design", "records", "settings", "subject", "period",
                                       "value", "treatment", "test", "reference", "profiles",
                                       "limits", "x"]) | st.text(max_size=4), inner, max_size=5),
    max_leaves=25,
)


json_like_text = st.text(alphabet='{}[]":,0123456789.eE-+ nulltrfasNIiy\n\\', max_size=60)


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=200) | json_like_text.map(str.encode))
def test_parse_json_body_raises_only_invalid_request(body: bytes) -> None:
    """Bad input gets a problem list, never another exception (RFC 9457 problem details)."""
    try:
        parse_json_body(body)
    except InvalidRequest as exc:
        assert exc.problems and all(p.msg for p in exc.problems)


@settings(max_examples=200, deadline=None)
@given(json_values)
def test_normalize_raises_only_invalid_request(raw: Any) -> None:
    """Bad input gets a problem list, never another exception (RFC 9457 problem details)."""
    try:
        inputs = normalize_request(raw)
    except InvalidRequest as exc:
        assert exc.problems and all(p.msg for p in exc.problems)
    else:
        assert rfc8785.dumps(inputs)  # anything accepted can be hashed (RFC 8785)


@settings(max_examples=150, deadline=None)
@given(st.data())
def test_normalize_mutated_valid_request(data: st.DataObject) -> None:
    """Near-valid requests with one field replaced by arbitrary JSON still give only problem
    lists (RFC 9457 problem details); a request that passes yields finite numbers only."""
    raw = make_request(n=4)
    record = data.draw(st.integers(0, len(raw["records"]) - 1))
    field = data.draw(st.sampled_from(["subject", "period", "treatment", "value", "sequence",
                                       "metric"]))
    raw["records"][record][field] = data.draw(json_values)
    try:
        inputs = normalize_request(raw)
    except InvalidRequest as exc:
        assert exc.problems
    else:
        assert all(math.isfinite(r["value"]) for r in inputs["records"])
        assert rfc8785.dumps(inputs)  # anything accepted can be hashed (RFC 8785)


# --- the fast readers: whatever they accept, the reference readers accept alike ---

def _same_json(a: Any, b: Any) -> bool:
    """Equal values of equal types all the way down (int is not float, -0.0 is not 0.0)."""
    if type(a) is not type(b):
        return False
    if isinstance(a, dict):
        return list(a) == list(b) and all(_same_json(a[k], b[k]) for k in a)
    if isinstance(a, list):
        return len(a) == len(b) and all(_same_json(x, y) for x, y in zip(a, b, strict=True))
    if isinstance(a, float):
        return a.hex() == b.hex()
    return bool(a == b)


json_documents = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**70), 2**70)
    | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=6),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=4), inner,
                                                                max_size=4),
    max_leaves=20,
)


@settings(max_examples=400, deadline=None)
@given(json_documents, st.booleans())
def test_json_bodies_read_as_the_standard_decoder_reads_them(value: Any, spaced: bool) -> None:
    """parse_json_body (orjson where it is safe) gives the value of Python's json.loads, type for
    type, on generated documents: integers far beyond 64 bits, floats of every size, nesting."""
    body = json.dumps(value, indent=1 if spaced else None).encode()
    assert _same_json(parse_json_body(body), json.loads(body))


@pytest.mark.parametrize("text", [
    "18446744073709551615", "18446744073709551616", "-9223372036854775808",
    "-9223372036854775809", "123456789012345678901234567890", "1e400", "-1e400", "1e-400",
    "2.4703282292062328e-324", "0.1e1", "-0", "-0.0", "1E5", '{"a": 1, "b": 2, "a": 3}',
    '"\\ud83d\\ude00"', '"\\u00e9\\n"', '[1.7976931348623157e308, 5e-324]',
    '{"v": 0.30000000000000004, "w": 123456789.12345679}',
])
def test_json_edge_literals_read_as_the_standard_decoder_reads_them(text: str) -> None:
    """Integers at and past the 64-bit edges (orjson's own limit), overflow and underflow,
    duplicate keys (RFC 8259 section 4 leaves them to the reader: Python keeps the last at the
    first one's place), escapes: the value of json.loads, type for type."""
    assert _same_json(parse_json_body(text.encode()), json.loads(text))


def test_json_the_fast_reader_refuses_is_read_by_the_standard_decoder() -> None:
    """orjson refuses a lone surrogate escape, which Python's json.loads reads (RFC 8259
    section 8.2 allows it): the value is the standard decoder's, and the request checks name
    it (models._encodable)."""
    assert parse_json_body(b'["\\ud800"]') == ["\ud800"]
    deep = b"[" * 100_000 + b"]" * 100_000
    with pytest.raises(InvalidRequest) as info:
        parse_json_body(deep)
    assert "nested too deeply" in info.value.problems[0].msg


row_values = st.one_of(
    st.sampled_from(["S1", "T", " R ", "", " ", "\t", "é", "Ä1", "\u2028", "\x1c", "\ud800", "AUC"]),
    st.text(max_size=3), st.none(), st.booleans(),
    st.integers(-3, 3), st.integers(2**53 - 2, 2**53 + 2), st.integers(-(2**53) - 2, -(2**53) + 2),
    st.integers(2**63, 2**80),
    st.floats(), st.sampled_from([1e100, -1e100, 1e101, 5e-324, -0.0, 2.5]),
    st.lists(st.integers(), max_size=1),
)


def _mostly(valid: st.SearchStrategy[Any]) -> st.SearchStrategy[Any]:
    return st.one_of(valid, valid, valid, row_values)  # three times in four a valid value


_ARMS = ("S1", "T", "R", "AUC", "a b", "x\ty")  # every valid label of the rows below
_labels = st.sampled_from(_ARMS)
record_rows = st.tuples(
    st.fixed_dictionaries(
        {"subject": _mostly(_labels), "period": _mostly(st.integers(1, 2**53 - 1)),
         "treatment": _mostly(_labels),
         "value": _mostly(st.floats(-1e100, 1e100) | st.integers(-(2**53) + 1, 2**53 - 1))},
        optional={"sequence": _mostly(_labels | st.none()), "metric": _mostly(_labels)},
    ),
    st.sampled_from([False] * 7 + [True]),
).map(lambda row_extra: {**row_extra[0], "dose": 1} if row_extra[1] else row_extra[0])




@st.composite
def _mostly_plain_lists(draw: st.DrawFn) -> list[dict[str, Any]]:
    """Lists of rows of one shape that the plain lane could take, half of them with one field
    made hostile (a value of row_values) or one field added."""
    optional = draw(st.sets(st.sampled_from(["sequence", "metric"])))
    rows: list[dict[str, Any]] = []
    for i in range(draw(st.integers(1, 4))):
        row: dict[str, Any] = {
            "subject": f"S{i}", "period": draw(st.integers(1, 2**53 - 1)),
            "treatment": draw(st.sampled_from(_ARMS)),
            "value": draw(st.floats(-1e100, 1e100) | st.integers(-(2**53) + 1, 2**53 - 1)),
        }
        if "sequence" in optional:
            row["sequence"] = f"Q{i}"
        if "metric" in optional:
            row["metric"] = "AUC"
        rows.append(row)
    if draw(st.booleans()):
        row = draw(st.sampled_from(rows))
        field = draw(st.sampled_from([*row, "dose"]))
        row[field] = draw(row_values)
    return rows


@settings(max_examples=800, deadline=None)
@given(st.lists(record_rows, min_size=1, max_size=4) | _mostly_plain_lists())
def test_rows_the_plain_lane_accepts_pydantic_accepts_with_the_same_values(
    items: list[Any],
) -> None:
    """intake.plain.read_plain_records only ever says yes where the pydantic models (the
    reference) say yes, with the same value and type in every field, for rows drawn from valid
    and hostile values (booleans, surrogates, blank and non-ASCII labels, ints past 2**53, NaN,
    1e101, extra fields); where it says no, pydantic decides."""
    from pydantic import TypeAdapter, ValidationError

    from service.intake.models import Record
    from service.intake.plain import read_plain_records

    read = read_plain_records(items, _ARMS)
    if read is None:
        return
    try:
        models = TypeAdapter(list[Record]).validate_python(items)
    except ValidationError as exc:
        raise AssertionError(f"the plain lane accepted what pydantic refuses: {exc}") from None
    reference = sorted(
        ({"subject": m.subject, "period": m.period, "sequence": m.sequence,
          "treatment": m.treatment, "metric": m.metric, "value": m.value} for m in models),
        key=lambda r: (r["metric"], r["subject"], r["period"]),
    )
    assert _same_json(read.records, reference)
