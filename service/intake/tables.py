"""Request validation and normalization, and the per-metric matrices handed to the stats engine.

Every problem in a request is collected before anything is raised, so a caller fixes a table in one
round trip. The normalized inputs are plain JSON values with every default filled in: they are what
gets hashed, so two requests that mean the same thing must normalize to the same dict.
"""

from __future__ import annotations

import secrets
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from operator import itemgetter
from typing import Any, NamedTuple

import numpy as np
from numpy.typing import NDArray
from pydantic import TypeAdapter, ValidationError

from service.intake import plain
from service.intake.checks import check_consistency, check_profiles, check_records
from service.intake.csvinput import parse_csv_body
from service.intake.models import (
    Design,
    Profile,
    Record,
    Settings,
    Study,
    describe_json_type,
    validate_part,
)
from service.intake.problems import InvalidRequest, Loc, Problem, format_loc, parse_json_body

__all__ = [
    "ExcludedSubject",
    "InvalidRequest",
    "Loc",
    "MetricTable",
    "Normalized",
    "Observation",
    "Problem",
    "build_tables",
    "format_loc",
    "normalize_for_record",
    "normalize_request",
    "normalize_request_and_tables",
    "parse_csv_body",
    "parse_json_body",
]

_TOP_LEVEL = ("study", "design", "records", "profiles", "settings")
# Metric names the profile analysis (service/profiles.py) gives its derived values; a record using
# one of them beside profiles would be merged with the derived values of the same name.
DERIVED_METRICS = ("auc_0_t", "auc_0_inf", "cmax", "tmax")


@dataclass(frozen=True)
class ExcludedSubject:
    subject: str
    reason: str


class Observation(NamedTuple):
    """One observation of a design treatment (a tuple: a table holds one per row, built fast)."""

    subject: str
    sequence: str
    period: int
    treatment: str
    value: float


@dataclass(frozen=True)
class MetricTable:
    """One metric's table. `values[i, j]` is subject i's mean over its observations of treatment j
    (the observation itself when there is one), `periods[i, j]` the first period of it; only
    subjects with every treatment are rows. `observations` holds every observation of the design's
    treatments, complete subjects or not, in (subject, period) order; `parallel` is true when each
    subject has exactly one observation (then there are no rows)."""

    metric: str
    treatments: tuple[str, ...]
    subjects: tuple[str, ...]
    values: NDArray[np.float64]
    periods: NDArray[np.int64]
    sequences: tuple[str, ...]
    excluded: tuple[ExcludedSubject, ...]
    observations: tuple[Observation, ...] = ()
    parallel: bool = False


# One call validates a whole list of valid rows (a third of the per-row calls' time); a list with
# a fault is validated again row by row, which names every problem as it always has.
_WHOLE_LISTS: dict[type[Record] | type[Profile], TypeAdapter[list[Any]]] = {
    Record: TypeAdapter(list[Record]),
    Profile: TypeAdapter(list[Profile]),
}


_RECORD_ORDER = itemgetter("metric", "subject", "period", "treatment")  # of normalized records


def _validate_list(
    raw: dict[Any, Any], key: str, model: type[Record] | type[Profile], problems: list[Problem]
) -> tuple[list[tuple[int, Any]], int]:
    """Validate every item of raw[key]; return the valid (index, model) pairs and the item count."""
    items = raw.get(key, [])
    if not isinstance(items, list):
        problems.append(Problem((key,), f"must be a list, got {describe_json_type(items)}"))
        return [], 0
    try:
        return list(enumerate(_WHOLE_LISTS[model].validate_python(items))), len(items)
    except ValidationError:
        pass
    valid: list[tuple[int, Any]] = []
    for index, item in enumerate(items):
        parsed, found = validate_part(model, item, (key, index))
        problems.extend(found)
        if parsed is not None:
            valid.append((index, parsed))
    return valid, len(items)


def normalize_request(raw: Any) -> dict[str, Any]:
    return normalize_request_and_tables(raw)[0]


class Normalized(NamedTuple):
    """A request read for its record: the normalized inputs; the tables the checks built (see
    normalize_request_and_tables); and whether the plain lane read the records (then they are
    exact dicts of the six fields, with ASCII labels, periods below 2**53 and finite float
    values: what records.hashing.canonical_plain_rows needs)."""

    inputs: dict[str, Any]
    tables: list[MetricTable] | None
    plain_records: bool


def normalize_request_and_tables(raw: Any) -> tuple[dict[str, Any], list[MetricTable] | None]:
    """normalize_request, with the metric tables its whole-table checks built: build_tables of
    the normalized inputs, handed on so that the record is not built from a second copy (None
    when the request has profiles, whose derived metrics join the tables later)."""
    inputs, tables, _ = normalize_for_record(raw)
    return inputs, tables


def normalize_for_record(raw: Any) -> Normalized:
    """normalize_request_and_tables, and whether the plain lane read the records."""
    if not isinstance(raw, dict):
        raise InvalidRequest([Problem(("body",), "the request must be a JSON object")])
    problems: list[Problem] = []
    for key in raw:
        if key not in _TOP_LEVEL:
            problems.append(Problem((str(key),), "unknown field"))

    study, found = validate_part(Study, raw.get("study", {}), ("study",))
    problems.extend(found)
    design: Design | None = None
    if "design" in raw:
        design, found = validate_part(Design, raw["design"], ("design",))
        problems.extend(found)
    else:
        problems.append(Problem(("design",), "field required"))
    settings, found = validate_part(Settings, raw.get("settings", {}), ("settings",))
    problems.extend(found)

    if not problems and study is not None and design is not None and settings is not None:
        plain = _plain_lane(raw, design, settings)
        if plain is not None:
            return Normalized(*_finished(study, design, settings, *plain), plain_records=True)

    records, n_records = _validate_list(raw, "records", Record, problems)
    profiles, n_profiles = _validate_list(raw, "profiles", Profile, problems)
    if n_records == 0 and n_profiles == 0 and "records" not in {p.loc[0] for p in problems}:
        problems.append(Problem(("records",), "at least one record is required"))
    items_valid = len(records) == n_records and len(profiles) == n_profiles

    distinct = False
    allowed: tuple[str, ...] = ()
    if design is not None:
        allowed = tuple(dict.fromkeys((design.test, design.reference) + (
            (design.baseline,) if design.baseline is not None else ()
        )))
        if design.reference == design.test:
            problems.append(Problem(("design", "reference"),
                                    f"must differ from test; both are {design.test!r}"))
        if design.baseline is not None and design.baseline in (design.test, design.reference):
            which = "test" if design.baseline == design.test else "reference"
            problems.append(Problem(("design", "baseline"),
                                    f"must differ from test and reference; equals {which} "
                                    f"{design.baseline!r}"))
        distinct = len(allowed) == 2 + (design.baseline is not None)
        if distinct:  # with clashing arm labels every row would be flagged: one fault, one problem
            problems.extend(_check_treatments(records, "records", allowed))
            problems.extend(_check_treatments(profiles, "profiles", allowed))
    if n_profiles:
        problems.extend(
            Problem(("records", index, "metric"),
                    f"metric name {r.metric!r} is reserved for the metrics derived from profiles "
                    f"({', '.join(DERIVED_METRICS)}); rename it")
            for index, r in records if r.metric in DERIVED_METRICS
        )
    problems.extend(check_records(records))
    problems.extend(check_profiles(profiles))
    if design is not None and distinct:
        # rows with an unknown arm are already reported; their periods would only echo that
        known = set(allowed)
        problems.extend(check_consistency([(i, r) for i, r in records if r.treatment in known],
                                          [(i, p) for i, p in profiles if p.treatment in known]))
    else:
        problems.extend(check_consistency(records, profiles))

    normalized_records = sorted(
        (
            {"subject": r.subject, "period": r.period, "sequence": r.sequence,
             "treatment": r.treatment, "metric": r.metric, "value": float(r.value)}
            for _, r in records
        ),
        key=_RECORD_ORDER,
    )
    normalized_profiles = sorted(
        (
            {"subject": p.subject, "period": p.period, "treatment": p.treatment,
             "sequence": p.sequence, "time": float(p.time),
             "concentration": None if p.concentration is None else float(p.concentration),
             "below_lloq": p.below_lloq}
            for _, p in profiles
        ),
        key=lambda p: (p["subject"], p["period"], p["treatment"], p["time"]),
    )

    # Whole-table checks need every row and a valid design, or they report ghosts of other faults;
    # faults in study or settings do not touch the table, so they do not hold these checks back.
    table_faults = any(p.loc[0] in ("records", "profiles", "design") for p in problems)
    tables: list[MetricTable] | None = None
    if design is not None and items_valid and not table_faults:
        incomplete = _incomplete_rule(raw, settings)
        inputs_so_far = {"design": design.model_dump(), "records": normalized_records,
                         "profiles": normalized_profiles,
                         "settings": {"incomplete_subjects": incomplete}}
        try:
            tables = build_tables(inputs_so_far)
        except InvalidRequest as exc:
            problems.extend(exc.problems)

    if problems or study is None or design is None or settings is None:
        raise InvalidRequest(problems)
    return Normalized(
        *_finished(study, design, settings, normalized_records, normalized_profiles, tables),
        plain_records=False,
    )


def _plain_lane(
    raw: dict[Any, Any], design: Design, settings: Settings
) -> tuple[list[dict[str, Any]], list[dict[str, Any]], list[MetricTable] | None] | None:
    """The normalized records, profiles and tables of a clean records-only request, read by
    the plain lane (service/intake/plain.py); None wherever the row-by-row reader must decide."""
    if raw.get("profiles", []) != [] or design.test == design.reference or (
        design.baseline is not None and design.baseline in (design.test, design.reference)
    ):
        return None
    treatments = (design.test, design.reference) + (
        (design.baseline,) if design.baseline is not None else ()
    )
    read = plain.read_plain_records(raw.get("records"), treatments)
    if read is None:
        return None
    tables = plain.complete_crossover_tables(read, treatments, MetricTable, Observation)
    if tables is None:
        try:
            tables = build_tables({"design": design.model_dump(), "records": read.records,
                                   "profiles": [],
                                   "settings": {"incomplete_subjects":
                                                settings.incomplete_subjects}})
        except InvalidRequest:
            return None
    return read.records, [], tables


def _finished(
    study: Study, design: Design, settings: Settings, normalized_records: list[dict[str, Any]],
    normalized_profiles: list[dict[str, Any]], tables: list[MetricTable] | None,
) -> tuple[dict[str, Any], list[MetricTable] | None]:
    settings_out = settings.model_dump()
    for added in ("scaling", "tmax_limits"):
        if settings_out[added] is None:
            del settings_out[added]
    if settings_out["seed"] is None:
        # The seed that was used is part of the inputs, so the analysis can be re-run exactly;
        # 53 bits keep it inside the integers RFC 8785 can hash.
        settings_out["seed"] = secrets.randbits(53)
    return {
        "study": study.model_dump(),
        "design": design.model_dump(),
        "records": normalized_records,
        "profiles": normalized_profiles,
        "settings": settings_out,
    }, None if normalized_profiles else tables


def _incomplete_rule(raw: dict[Any, Any], settings: Settings | None) -> str:
    if settings is not None:
        return settings.incomplete_subjects
    given = raw.get("settings")
    rule = given.get("incomplete_subjects") if isinstance(given, dict) else None
    return rule if rule in ("exclude", "reject") else "exclude"


def _check_treatments(
    items: list[tuple[int, Any]], key: str, allowed: tuple[str, ...]
) -> list[Problem]:
    shown = ", ".join(repr(label) for label in allowed)
    return [
        Problem((key, index, "treatment"),
                f"treatment {item.treatment!r} is not in the design; allowed: {shown}")
        for index, item in items
        if item.treatment not in allowed
    ]


def _sequences_of(rows: Iterable[dict[str, Any]]) -> dict[str, str]:
    """Per subject: the given sequence label, or else the treatment order by period ("R-T-B")."""
    labels: dict[str, str] = {}
    by_period: dict[str, dict[int, str]] = {}
    for row in rows:
        subject = row["subject"]
        if subject not in labels and (sequence := row.get("sequence")) is not None:
            labels[subject] = sequence
        plan = by_period.get(subject)
        if plan is None:
            by_period[subject] = {row["period"]: row["treatment"]}
        elif row["period"] not in plan:
            plan[row["period"]] = row["treatment"]
    return {
        subject: labels[subject] if subject in labels
        else "-".join(t for _, t in sorted(plan.items()))
        for subject, plan in by_period.items()
    }


def _observations(
    subjects: list[str], cells_of: dict[str, dict[str, list[tuple[int, float]]]],
    sequence_of: dict[str, str], treatments: tuple[str, ...],
) -> list[Observation]:
    """Each subject's observations of the design's treatments, in (period, treatment, value)
    order, subject after subject."""
    found: list[Observation] = []
    make = tuple.__new__  # Observation(...) less the call of its generated __new__
    for subject in subjects:
        sequence = sequence_of[subject]
        seen = sorted([(period, treatment, value)
                       for treatment, pairs in cells_of[subject].items() if treatment in treatments
                       for period, value in pairs])
        found += [make(Observation, (subject, sequence, period, treatment, value))
                  for period, treatment, value in seen]
    return found


def _missing_reason(missing: list[str]) -> str:
    if len(missing) == 1:
        return f"no value for treatment {missing[0]!r}"
    return "no values for treatments " + ", ".join(repr(t) for t in missing)


def _mean(seen: list[tuple[int, float]]) -> float:
    # One observation stays the very same float (a crossover's numbers never change).
    if len(seen) == 1:
        return seen[0][1]
    return float(np.mean([value for _, value in seen]))


def _is_parallel(cells_of: dict[str, dict[str, list[tuple[int, float]]]]) -> bool:
    """Each subject has exactly one observation: parallel groups (one treatment, one period)."""
    return len(cells_of) > 0 and all(
        len(cells) == 1 and len(next(iter(cells.values()))) == 1 for cells in cells_of.values()
    )


def _parallel_problems(
    metric: str, where: Loc, cells_of: dict[str, dict[str, list[tuple[int, float]]]],
    design: dict[str, Any],
) -> list[Problem]:
    group_sizes = {design["test"]: 0, design["reference"]: 0}
    for cells in cells_of.values():
        (treatment,) = cells
        if treatment in group_sizes:
            group_sizes[treatment] += 1
    return [
        Problem(where, f"metric {metric!r}: parallel groups (each subject one treatment, one "
                       f"period) need at least 2 subjects per group; treatment {label!r} has "
                       f"{size}")
        for label, size in group_sizes.items() if size < 2
    ]


def build_tables(
    inputs: dict[str, Any], extra_records: Sequence[dict[str, Any]] = ()
) -> list[MetricTable]:
    design = inputs["design"]
    treatments: tuple[str, ...] = (design["test"], design["reference"]) + (
        (design["baseline"],) if design.get("baseline") is not None else ()
    )
    reject = inputs.get("settings", {}).get("incomplete_subjects", "exclude") == "reject"
    records = list(inputs.get("records", []))
    extras = list(extra_records)
    sequence_of = _sequences_of([*records, *inputs.get("profiles", []), *extras])
    input_metrics = {r["metric"] for r in records}

    # metric -> subject -> treatment -> [(period, value)] in period order
    by_metric: dict[str, dict[str, dict[str, list[tuple[int, float]]]]] = {}
    for row in [*records, *extras]:
        of_metric = by_metric.get(row["metric"])
        if of_metric is None:
            of_metric = by_metric[row["metric"]] = {}
        cells = of_metric.get(row["subject"])
        if cells is None:
            cells = of_metric[row["subject"]] = {}
        seen = cells.get(row["treatment"])
        if seen is None:
            cells[row["treatment"]] = [(int(row["period"]), float(row["value"]))]
        else:
            seen.append((int(row["period"]), float(row["value"])))

    problems: list[Problem] = []
    tables: list[MetricTable] = []
    for metric in sorted(by_metric):
        where: Loc = ("records",) if metric in input_metrics else ("profiles",)
        cells_of = by_metric[metric]
        subjects = sorted(cells_of)
        observations = tuple(_observations(subjects, cells_of, sequence_of, treatments))
        if _is_parallel(cells_of):
            problems.extend(_parallel_problems(metric, where, cells_of, design))
            tables.append(MetricTable(
                metric=metric, treatments=treatments, subjects=(),
                values=np.empty((0, len(treatments))), periods=np.empty((0, len(treatments)),
                                                                         dtype=np.int64),
                sequences=(), excluded=(), observations=observations, parallel=True,
            ))
            continue
        analysed: list[str] = []
        excluded: list[ExcludedSubject] = []
        for subject in subjects:
            cells = cells_of[subject]
            missing = [t for t in treatments if t not in cells]
            if not missing:
                analysed.append(subject)
                continue
            reason = _missing_reason(missing)
            excluded.append(ExcludedSubject(subject, reason))
            if reject:
                problems.append(Problem(where, f"metric {metric!r}: subject {subject!r} has "
                                               f"{reason}, and incomplete subjects are rejected "
                                               f"(settings.incomplete_subjects is 'reject')"))
        if len(analysed) < 3:
            count = f"{len(analysed)} analysable subject" + ("" if len(analysed) == 1 else "s")
            problems.append(Problem(where, f"metric {metric!r}: only {count}; "
                                           f"at least 3 are needed"))
        table_cells = [[cells_of[s][t] for t in treatments] for s in analysed]
        values = np.array([[_mean(seen) for seen in row] for row in table_cells],
                          dtype=np.float64).reshape(len(analysed), len(treatments))
        periods = np.array([[seen[0][0] for seen in row] for row in table_cells],
                           dtype=np.int64).reshape(len(analysed), len(treatments))
        tables.append(MetricTable(
            metric=metric, treatments=treatments, subjects=tuple(analysed), values=values,
            periods=periods, sequences=tuple(sequence_of[s] for s in analysed),
            excluded=tuple(excluded), observations=observations,
        ))
    if problems:
        raise InvalidRequest(problems)
    return tables
