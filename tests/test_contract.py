"""docs/contract.md, the contract clients read, held against what the service produces.

Records are built from every JSON demo in sample_requests/ and from seeded, constructed requests
that reach the optional parts of a record (an excluded subject, an undefined θ, a skipped
average-bioequivalence analysis, profile flags, ...), plus records archived through the HTTP API
for the archive's own fields. A path, warning code, request field, problem type or route that
the service produces and the document does not list fails a test, and so does one the document
lists and nothing produces.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Callable, Iterator
from functools import cache
from http import HTTPStatus
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.api.app import create_app
from service.api.problems import problem_response
from service.api.settings import ServiceSettings
from service.intake.csvinput import SETTING_FIELDS
from service.intake.tables import normalize_request, parse_csv_body
from service.records.building import build_record
from tests.api.conftest import ApiClient, json_request

ROOT = Path(__file__).resolve().parents[1]
CONTRACT = ROOT / "docs" / "contract.md"
NOT_REACHED = "(not reached by the demo tests)"
MAY_BE_NULL = "may be null"
TREATMENT_KEY = "{treatment}"
JSON_KINDS = {"string", "number", "integer", "boolean", "object", "array"}

# ---------------------------------------------------------------------------------------------
# docs/contract_paths: reading the tables of the contract


def contract_section(heading: str) -> str:
    """The text under `## heading` up to the next second-level heading."""
    text = CONTRACT.read_text(encoding="utf-8")
    match = re.search(rf"^## {re.escape(heading)}[ \t]*\n(.*?)(?=^## |\Z)", text, re.M | re.S)
    assert match is not None, f"docs/contract.md has no section '## {heading}'"
    return match.group(1)


def table_rows(heading: str) -> dict[str, list[str]]:
    """Rows of the table(s) in a section whose first cell is `code`: first cell -> other cells."""
    rows: dict[str, list[str]] = {}
    for line in contract_section(heading).splitlines():
        if not line.lstrip().startswith("|"):
            continue
        cells = [cell.strip() for cell in line.strip().strip("|").split("|")]
        key = re.fullmatch(r"`([^`]+)`", cells[0])
        if key is None:
            continue
        assert key.group(1) not in rows, f"{heading}: `{key.group(1)}` is listed twice"
        rows[key.group(1)] = cells[1:]
    assert rows, f"docs/contract.md: no rows found under '## {heading}'"
    return rows


def ancestors(path: str) -> Iterator[str]:
    """'a.b[].c' -> 'a', 'a.b', 'a.b[]': every shorter path that leads to it."""
    for index in range(1, len(path)):
        if path[index] == "." or path.startswith("[]", index):
            yield path[:index]


def within_listed(listed: set[str]) -> set[str]:
    return listed | {parent for path in listed for parent in ancestors(path)}


# ---------------------------------------------------------------------------------------------
# Flattening a record into its paths


def flatten(value: Any, labels: set[str], path: str = "",
            out: dict[str, set[str]] | None = None) -> dict[str, set[str]]:
    """Every path in `value` -> the JSON kinds seen there ("null", "integer", ...). Dict keys are
    joined by '.', list items are '[]', and keys of an object whose keys are all treatment labels
    of the request become '{treatment}'."""
    out = {} if out is None else out
    if path:
        out.setdefault(path, set()).add(json_kind(value))
    if isinstance(value, dict):
        by_label = bool(value) and set(value) <= labels
        for key, item in value.items():
            name = TREATMENT_KEY if by_label else str(key)
            flatten(item, labels, f"{path}.{name}" if path else name, out)
    elif isinstance(value, list):
        for item in value:
            flatten(item, labels, path + "[]", out)
    return out


def json_kind(value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "boolean"
    if isinstance(value, int):
        return "integer"
    if isinstance(value, float):
        return "number"
    if isinstance(value, str):
        return "string"
    return "object" if isinstance(value, dict) else "array"


def treatment_labels(record: dict[str, Any]) -> set[str]:
    design = record["inputs"]["design"]
    return {design[role] for role in ("test", "reference", "baseline") if design.get(role)}


def warning_codes(value: Any, under_profiles: bool = False) -> set[str]:
    """Every `code` in a result, and each profile flag; codes found under result.profiles
    carry the prefix `profile_` they have in result.warnings."""
    codes: set[str] = set()
    if isinstance(value, dict):
        for key, item in value.items():
            inside = under_profiles or key == "profiles"
            if key == "code" and isinstance(item, str):
                codes.add(("profile_" if under_profiles else "") + item)
            elif key == "flags" and isinstance(item, list):
                codes.update(f"profile_{flag}" for flag in item)
            else:
                codes.update(warning_codes(item, inside))
    elif isinstance(value, list):
        for item in value:
            codes.update(warning_codes(item, under_profiles))
    return codes


# ---------------------------------------------------------------------------------------------
# Constructed requests (seeded, invented) that reach the optional paths

ORDERS = (("T", "R", "B"), ("R", "B", "T"), ("B", "T", "R"))
ARMS = {"test": "T", "reference": "R", "baseline": "B"}


def crossover(tables: dict[str, list[list[float]]], orders: tuple[tuple[str, ...], ...] = ORDERS,
              labels: Callable[[int], str | None] = lambda i: None, arms: str = "TRB",
              **settings: Any) -> dict[str, Any]:
    """Records of metric -> rows of values (in `arms` order); subject i follows orders[i % len]."""
    rows = []
    for metric, values in tables.items():
        for i, row in enumerate(values):
            by_arm = dict(zip(arms, row, strict=True))
            for period, arm in enumerate(orders[i % len(orders)], start=1):
                if arm in by_arm and not math.isnan(by_arm[arm]):
                    record = {"subject": f"S{i + 1:02d}", "period": period, "treatment": arm,
                              "metric": metric, "value": by_arm[arm]}
                    if labels(i) is not None:
                        record["sequence"] = labels(i)
                    rows.append(record)
    design = {role: label for role, label in ARMS.items() if label in arms}
    return {"design": design, "records": rows,
            "settings": {"replicates": 200, "seed": 8, **settings}}


def seeded_table(rng: np.random.Generator, n: int, means: tuple[float, ...], sd: float) -> list[list[float]]:
    levels = rng.normal(0.0, 5.0, n)
    return [[round(float(m + levels[i] + rng.normal(0.0, sd)), 3) for m in means] for i in range(n)]


def small_table_with_gaps() -> dict[str, Any]:
    """8 subjects (few), one without a baseline value (excluded), a metric around zero."""
    rng = np.random.default_rng(11)
    auc = seeded_table(rng, 8, (81.0, 80.0, 50.0), 2.0)
    auc[7][2] = math.nan
    change = seeded_table(rng, 8, (6.0, 1.0, -4.0), 3.0)
    change[0][1] = -abs(change[0][1]) - 1.0
    return crossover({"AUC": auc, "change": change}, labels=lambda i: "-".join(ORDERS[i % 3]),
                     replicates=100, seed=5, stratify_by_sequence=True)


def unstable_denominators() -> dict[str, Any]:
    """A table whose R − B mean is exactly 0 (θ undefined), and one where leaving a subject out
    leaves a zero denominator (small integer differences of both signs)."""
    undefined = [[100.0 + z + y, 100.0 + z, 100.0] for z, y in
                 zip((1, -1, 2, -2, 3, -3), (2, 1, 0, 3, 1, 2), strict=True)]
    leave_one_out = [[110.0, 97.0, 100.0], [121.0, 101.0, 100.0], [98.0, 103.0, 100.0],
                     [107.0, 99.0, 100.0], [118.0, 100.0, 100.0], [111.0, 105.0, 100.0]]
    return crossover({"undefined": undefined, "leave_one_out": leave_one_out}, seed=3)


def disagreeing_standard_errors() -> dict[str, Any]:
    """Four subjects with mixed-sign values: jackknife and bootstrap SE far apart."""
    values = [[10.0, 5.0, -10.0], [-10.0, -5.0, 10.0], [9.0, 1.0, 2.0], [-8.0, 1.0, 3.0]]
    return crossover({"response": values}, seed=8)


def two_by_two(kind: str) -> dict[str, Any]:
    """2×2 tables whose average-bioequivalence fit carries a warning (the first also asks for
    scaled limits, which a crossover cannot give)."""
    if kind == "swapped":  # subject sums equal within each sequence
        values = [[90.0, 110.0], [95.0, 105.0], [110.0, 90.0], [105.0, 95.0]]
        return crossover({"AUC": values}, orders=(("T", "R"), ("R", "T")), arms="TR",
                         labels=lambda i: "TR" if i % 2 == 0 else "RT",
                         scaling={"approach": "widened_limits", "metrics": ["AUC"]})
    if kind == "exact":  # log y = subject + period + treatment with no residual
        values = [[100.0 * 2.0 ** (i % 3) * 1.25 * (1.5 if i % 2 else 1.0),
                   100.0 * 2.0 ** (i % 3) * (1.0 if i % 2 else 1.5)] for i in range(6)]
        return crossover({"AUC": values}, orders=(("T", "R"), ("R", "T")), arms="TR")
    values = [[105.0, 101.0], [104.0, 105.0], [111.0, 107.0]]  # one sequence label per subject
    return crossover({"AUC": values}, orders=(("T", "R"), ("R", "T")), arms="TR",
                     labels=lambda i: f"group {i}")


def one_sequence() -> dict[str, Any]:
    """Every subject in one order: test and reference are confounded with period."""
    values = [[81.0 + i, 80.0 + i * 1.5, 50.0 + i] for i in range(4)]
    return crossover({"AUC": values}, orders=(("T", "R", "B"),), labels=lambda i: "TRB")


TIMES = (0.0, 0.5, 1.0, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 24.0)


def oral(time: float, amount: float) -> float:
    return amount * (math.exp(-0.15 * time) - math.exp(-1.5 * time))


def profile_point(subject: str, period: int, order: str, time: float,
                  concentration: float | None) -> dict[str, Any]:
    point: dict[str, Any] = {"subject": subject, "period": period, "sequence": order,
                             "treatment": order[period - 1], "time": time,
                             "concentration": None if concentration is None else round(concentration, 4)}
    if concentration is None:
        point["below_lloq"] = True
    return point


def flagged_profiles() -> dict[str, Any]:
    """Six 2×2 subjects; in period 1 each subject's profile breaks one rule of the analysis."""
    rng = np.random.default_rng(4)
    points = []
    for i in range(6):
        order = "TR" if i % 2 == 0 else "RT"
        for period in (1, 2):
            amount = 100.0 * math.exp(rng.normal(0.0, 0.2))
            for time in TIMES:
                c: float | None = oral(time, amount) * math.exp(rng.normal(0.0, 0.03))
                case = i if period == 1 else None
                if (case == 2 and time == 0.0) or (case == 3 and time > 6.0) or (
                        case == 5 and time > 4.0):
                    continue  # no sample at dose time; sampling stops early; 2 points after Tmax
                if case == 0 or (c is not None and time > 0 and c < 0.5):
                    c = None  # nothing measurable at all; below the limit of quantification
                elif case == 1 and time == 0.0:
                    c = 30.0  # pre-dose level above 5 % of Cmax
                elif case == 4 and time >= 3.0:
                    c = 20.0 + time  # rises again after Tmax: no falling log-linear fit
                points.append(profile_point(f"P{i}", period, order, time, c))
    return {"design": {"test": "T", "reference": "R"}, "profiles": points,
            "settings": {"replicates": 200, "seed": 2, "profiles": {"lloq": 0.5}}}


def corrected_profiles() -> dict[str, Any]:
    """Baseline-corrected linear AUCs; one of three subjects has no λz (AUC∞ not analysed), and
    three Tmax pairs are too few for an interval."""
    rng = np.random.default_rng(6)
    points = []
    for i in range(3):
        order = "TR" if i % 2 == 0 else "RT"
        for period in (1, 2):
            amount = 80.0 * math.exp(rng.normal(0.0, 0.2))
            for time in (0.0, 1.0, 2.0, 4.0, 8.0, 12.0):
                c = 5.0 + oral(time, amount) * math.exp(rng.normal(0.0, 0.03))
                points.append(profile_point(f"C{i}", period, order, time,
                                            100.0 if i == 2 and time == 12.0 else c))
    profiles = {"auc_method": "linear", "baseline_correction": True,
                "below_lloq_after_first": "zero"}
    return {"design": {"test": "T", "reference": "R"}, "profiles": points,
            "settings": {"replicates": 200, "seed": 2, "profiles": profiles,
                         "tmax_limits": {"lower": -0.5, "upper": 0.5}}}


def replicate_rows(metric: str, prefix: str, plan: list[tuple[str, int]], rng: np.random.Generator,
                   sd: dict[str, float], drop: dict[int, set[int]] | None = None) -> list[dict[str, Any]]:
    """Seeded log-normal records; plan: (sequence in T/R letters, subjects); drop: subject number
    -> periods without a value."""
    rows = []
    number = 0
    for letters, count in plan:
        for _ in range(count):
            number += 1
            level = rng.normal(0.0, 0.3)
            for period, arm in enumerate(letters, start=1):
                if period in (drop or {}).get(number, set()):
                    continue
                log_value = level + 0.02 * period + (0.05 if arm == "T" else 0.0) + rng.normal(0.0, sd[arm])
                rows.append({"subject": f"{prefix}{number:02d}", "period": period, "sequence": letters,
                             "treatment": arm, "metric": metric,
                             "value": round(100.0 * math.exp(log_value), 4)})
    return rows


def four_sequences() -> list[dict[str, Any]]:
    """Four sequences, one subject with both products in each (the test − reference difference
    has no degrees of freedom) and two with the reference only; s_wR = 0.5 by construction."""
    logs = {"F1": ("TRTR", (4.60, 4.60, 4.62, 4.60)), "F2": ("RTRT", (4.60, 4.70, 4.60, 4.68)),
            "F3": ("TRRT", (4.65, 4.60, 4.90, 4.61)), "F4": ("RTTR", (4.90, 4.66, 4.63, 4.60)),
            "G1": ("TRTR", (None, 4.60, None, 5.60)), "G2": ("RTRT", (5.60, None, 4.60, None))}
    return long_rows("four", {subject: (letters, {period: math.exp(v) for period, v in
                                                  enumerate(values, start=1) if v is not None})
                              for subject, (letters, values) in logs.items()})


def thin_table() -> list[dict[str, Any]]:
    """Two values per subject, placed so that the model fits them exactly (no residual df)."""
    return long_rows("thin", {"N1": ("TRTR", {1: 100.0, 2: 104.0}), "N2": ("TRTR", {3: 98.0, 4: 97.0}),
                              "N3": ("RTRT", {1: 101.0, 4: 99.0}), "N4": ("RTRT", {2: 103.0, 3: 105.0})})


def long_rows(metric: str, plan: dict[str, tuple[str, dict[int, float]]]) -> list[dict[str, Any]]:
    return [{"subject": subject, "period": period, "sequence": letters, "treatment": letters[period - 1],
             "metric": metric, "value": round(value, 6)}
            for subject, (letters, values) in plan.items() for period, value in values.items()]


def replicate_study(approach: str) -> dict[str, Any]:
    """Replicate designs with scaled limits: a variable and a steady metric (one subject without
    its last period, one without the test), sparse tables, and a sequence with no complete subject."""
    rng = np.random.default_rng(21)
    full = [("TRTR", 6), ("RTRT", 6)]
    gaps = {2: {4}, 8: {1, 3}}
    rows = (replicate_rows("high", "H", full, rng, {"T": 0.35, "R": 0.40}, gaps)
            + replicate_rows("low", "H", full, rng, {"T": 0.08, "R": 0.08}, gaps)
            + replicate_rows("sparse", "S", [("TRT", 2), ("RTR", 1)], rng, {"T": 0.1, "R": 0.1})
            + replicate_rows("sparse_test", "U", [("TRT", 1), ("RTR", 2)], rng, {"T": 0.1, "R": 0.1})
            + replicate_rows("lopsided", "L", [("TRTR", 3), ("RTRT", 2)], rng, {"T": 0.2, "R": 0.2},
                             {4: {4}, 5: {2}})
            + four_sequences() + thin_table())
    scaling = {"approach": approach, "metrics": ["high", "low", "sparse", "four"]}
    return {"design": {"test": "T", "reference": "R"}, "records": rows,
            "settings": {"replicates": 200, "seed": 4, "scaling": scaling}}


def three_period_replicates() -> dict[str, Any]:
    """A full replicate TRT/RTR and a partial replicate TRR/RTR/RRT."""
    rng = np.random.default_rng(22)
    rows = (replicate_rows("AUC", "A", [("TRT", 4), ("RTR", 4)], rng, {"T": 0.1, "R": 0.1})
            + replicate_rows("Cmax", "B", [("TRR", 2), ("RTR", 2), ("RRT", 2)], rng, {"T": 0.1, "R": 0.1}))
    return {"design": {"test": "T", "reference": "R"}, "records": rows,
            "settings": {"replicates": 200, "seed": 4}}


def parallel_groups() -> dict[str, Any]:
    """One observation per subject: parallel groups (one metric has no baseline group)."""
    rng = np.random.default_rng(23)
    rows = []
    for metric, groups in (("AUC", {"T": 4, "R": 4, "B": 3}), ("Cmax", {"T": 3, "R": 3})):
        number = 0
        for arm, count in groups.items():
            for _ in range(count):
                number += 1
                rows.append({"subject": f"{metric[0]}{number:02d}", "period": 1, "treatment": arm,
                             "metric": metric, "value": round(100.0 * math.exp(rng.normal(0.0, 0.2)), 3)})
    return {"design": dict(ARMS), "records": rows, "settings": {"replicates": 200, "seed": 4}}


CONSTRUCTED: dict[str, Callable[[], dict[str, Any]]] = {
    "small table with gaps": small_table_with_gaps,
    "unstable denominators": unstable_denominators,
    "disagreeing standard errors": disagreeing_standard_errors,
    "swapped 2x2": lambda: two_by_two("swapped"),
    "exact 2x2": lambda: two_by_two("exact"),
    "one label per subject": lambda: two_by_two("labels"),
    "one sequence": one_sequence,
    "flagged profiles": flagged_profiles,
    "corrected profiles": corrected_profiles,
    "replicate, widened limits": lambda: replicate_study("widened_limits"),
    "replicate, reference-scaled": lambda: replicate_study("reference_scaled"),
    "three-period replicates": three_period_replicates,
    "parallel groups": parallel_groups,
}


@cache
def built_records() -> dict[str, dict[str, Any]]:
    """name -> record, for every JSON demo and every constructed request."""
    requests = {path.name: json.loads(path.read_text(encoding="utf-8"))
                for path in sorted((ROOT / "sample_requests").glob("*.json"))}
    assert requests, "no JSON requests in sample_requests/"
    requests.update({name: make() for name, make in CONSTRUCTED.items()})
    return {name: build_record(normalize_request(raw)) for name, raw in requests.items()}


@pytest.fixture(scope="module")
def archived_records(tmp_path_factory: pytest.TempPathFactory) -> list[dict[str, Any]]:
    """Two records posted through the HTTP API (the second links to the first), read back."""
    folder = tmp_path_factory.mktemp("contract")
    settings = ServiceSettings(database_url=f"sqlite:///{folder / 'archive.sqlite3'}")
    client = ApiClient(create_app(settings))
    try:
        records = []
        for _ in range(2):
            posted = client.post("/v1/analyses", json=json_request())
            assert posted.status_code == 201, posted.text
            records.append(posted.json())
            fetched = client.get(posted.headers["location"])
            assert fetched.status_code == 200, fetched.text
            records.append(fetched.json())
        listed = client.get("/v1/analyses")
        assert listed.status_code == 200, listed.text
        return records + list(listed.json()["items"])
    finally:
        client.close()


@pytest.fixture(scope="module")
def carried(archived_records: list[dict[str, Any]]) -> dict[str, set[str]]:
    """Path -> JSON kinds, over every record built or archived."""
    out: dict[str, set[str]] = {}
    for record in [*built_records().values(), *archived_records]:
        flatten(record, treatment_labels(record), out=out)
    return out


# ---------------------------------------------------------------------------------------------
# Record paths


def test_every_carried_path_is_listed(carried: dict[str, set[str]]) -> None:
    """Each path a record carries is listed under '## Record paths' of docs/contract.md, the
    contract clients read (a path may also be the parent of a listed one)."""
    allowed = within_listed(set(table_rows("Record paths")))
    missing = sorted(set(carried) - allowed)
    assert not missing, "records carry paths docs/contract.md does not list:\n  " + "\n  ".join(missing)


def test_every_listed_path_is_carried(carried: dict[str, set[str]]) -> None:
    """Each path docs/contract.md, the contract clients read, lists is carried by some record
    built from the demos, the constructed requests or the archive."""
    unseen = sorted(set(table_rows("Record paths")) - set(carried))
    assert not unseen, "docs/contract.md lists paths no record carries:\n  " + "\n  ".join(unseen)


def test_listed_types_and_nulls_match(carried: dict[str, set[str]]) -> None:
    """The type column of docs/contract.md, the contract clients read, names the JSON type a path
    carries (an integer is a number too), and a path seen as null says 'may be null'."""
    wrong = []
    for path, cells in table_rows("Record paths").items():
        kind = cells[0].strip("`").lower() if cells else ""
        assert kind in JSON_KINDS, f"`{path}`: type {kind!r} is not one of {sorted(JSON_KINDS)}"
        seen = carried.get(path, set())
        allowed = {kind, "null"} | ({"integer"} if kind == "number" else set())
        if seen - allowed:
            wrong.append(f"{path}: listed as {kind}, carries {sorted(seen - {'null'})}")
        if "null" in seen and MAY_BE_NULL not in " ".join(cells).lower():
            wrong.append(f"{path}: carries null, but the contract does not say '{MAY_BE_NULL}'")
    assert not wrong, "docs/contract.md disagrees with the records:\n  " + "\n  ".join(wrong)


# ---------------------------------------------------------------------------------------------
# Warning codes


def test_warning_codes_match_the_contract(archived_records: list[dict[str, Any]]) -> None:
    """Every warning code a record carries is listed under '## Warning codes' of docs/contract.md,
    the contract clients read; every listed code is produced by some constructed case, unless
    its row says it is not reached by the demo tests (and then it must indeed not be)."""
    seen: set[str] = set()
    for record in [*built_records().values(), *archived_records]:
        seen |= warning_codes(record["result"])
    rows = table_rows("Warning codes")
    marked = {code for code, cells in rows.items() if NOT_REACHED in " ".join(cells)}
    unlisted = sorted(seen - set(rows))
    unproduced = sorted(set(rows) - seen - marked)
    stale = sorted(marked & seen)
    problems = ([f"carried but not listed: {code}" for code in unlisted]
                + [f"listed but produced by no case: {code}" for code in unproduced]
                + [f"marked {NOT_REACHED} but produced: {code}" for code in stale])
    assert not problems, "warning codes vs docs/contract.md:\n  " + "\n  ".join(problems)


# ---------------------------------------------------------------------------------------------
# Request fields


def test_request_fields_and_defaults_match_normalization() -> None:
    """'## Request fields' of docs/contract.md, the contract clients read, lists every field of
    the normalized request; a default written as JSON is what normalization fills in for a request
    that leaves the field out, and a field said to be absent unless given is absent then."""
    bare_request: dict[str, Any] = {
        "design": {"test": "T", "reference": "R"},
        "records": [{"subject": f"S{i}", "period": p, "treatment": t, "value": 1.0 + i + p}
                    for i in range(3) for p, t in ((1, "T"), (2, "R"))],
        "profiles": [{"subject": "S0", "period": 1, "treatment": "T", "time": time,
                      "concentration": 1.0} for time in (0.0, 1.0, 2.0)],
    }
    blocks = {"scaling": {}, "tmax_limits": {"lower": -1.0, "upper": 1.0}}
    bare = normalize_request(bare_request)
    full = normalize_request({**bare_request, "settings": blocks})
    rows = table_rows("Request fields")
    bare_fields, fields = set(flatten(bare, set())), set(flatten(full, set()))
    missing = sorted(fields - within_listed(set(rows)))
    extra = sorted(set(rows) - fields)
    assert not missing and not extra, (
        f"request fields not listed: {missing}; listed but not in the normalized inputs: {extra}")
    wrong = []
    for field, cells in rows.items():
        default_cell = cells[1] if len(cells) > 1 else ""
        if "absent" in default_cell.lower() and field in bare_fields:
            wrong.append(f"{field}: said to be absent unless given, but normalization fills it in")
        default = re.fullmatch(r"`(.+)`", default_cell)
        if default is None:
            continue  # 'required', 'absent unless given', or not a constant (the seed)
        value: Any = bare if field in bare_fields else full
        for part in field.split("."):
            value = value[part[:-2]][0] if part.endswith("[]") else value[part]
        if json.loads(default.group(1)) != value:
            wrong.append(f"{field}: contract says {default.group(1)}, normalization gives {value!r}")
    assert not wrong, "defaults in docs/contract.md:\n  " + "\n  ".join(wrong)


def test_csv_settings_match_the_parser() -> None:
    """'## CSV form' of docs/contract.md, the contract clients read, lists every flat setting of a
    CSV upload and the request field it fills; parsing a CSV body with that setting puts the
    value at that field."""
    rows = table_rows("CSV form")
    assert set(rows) == set(SETTING_FIELDS), (
        f"flat settings not listed: {sorted(set(SETTING_FIELDS) - set(rows))}; "
        f"listed but unknown: {sorted(set(rows) - set(SETTING_FIELDS))}")
    body = b"subject,period,treatment,value\nS1,1,T,1.5\n"
    samples = {"integer": "7", "number": "0.5", "boolean": "true", "string": "a,b"}
    wrong = []
    for name, cells in rows.items():
        target = cells[0].strip("`")
        raw: Any = parse_csv_body(body, {name: samples[SETTING_FIELDS[name][0]]})
        for part in target.split("."):
            raw = raw.get(part) if isinstance(raw, dict) else None
        if raw is None:
            wrong.append(f"{name}: the parser puts nothing at {target}")
    assert not wrong, "CSV settings vs docs/contract.md:\n  " + "\n  ".join(wrong)


# ---------------------------------------------------------------------------------------------
# Problem types and routes


def test_problem_types_match_the_service() -> None:
    """'## Problem types' of docs/contract.md, the contract clients read, names the RFC 9457
    `type` the service sends with each status, and lists every status that has a type of its own."""
    rows = {cells[0]: cells[1].strip("`") for cells in
            ([cell.strip() for cell in line.strip().strip("|").split("|")]
             for line in contract_section("Problem types").splitlines()
             if re.match(r"\|\s*\d{3}\s*\|", line))}
    typed = {}
    for status in HTTPStatus:
        if status.value >= 400:
            body = json.loads(bytes(problem_response(status.value, "contract check").body))
            if not body["type"].endswith(":http-error"):
                typed[str(status.value)] = body["type"]
    wrong = sorted(f"{status}: contract {rows.get(status)!r}, service {typed.get(status)!r}"
                   for status in set(rows) | set(typed) if rows.get(status) != typed.get(status))
    assert not wrong, "problem types vs docs/contract.md:\n  " + "\n  ".join(wrong)


def test_routes_match_the_app(tmp_path: Path) -> None:
    """'## HTTP routes' of docs/contract.md, the contract clients read, lists every operation of
    the app's OpenAPI schema (method and path) and no other."""
    app = create_app(ServiceSettings(database_url=f"sqlite:///{tmp_path / 'routes.sqlite3'}"))
    try:
        routes = {f"{method.upper()} {path}" for path, operations in app.openapi()["paths"].items()
                  for method in operations}
    finally:
        app.state.archive.close()
    listed = set(table_rows("HTTP routes"))
    assert listed == routes, (f"routes not listed: {sorted(routes - listed)}; "
                              f"listed but not served: {sorted(listed - routes)}")
