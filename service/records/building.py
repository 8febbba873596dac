"""Assemble the archived record: normalized inputs, their RFC 8785 hash, and the result."""

from __future__ import annotations

import json
import math
import platform
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import scipy

from service import __version__
from service.intake.tables import MetricTable, build_tables
from service.records.bioequivalence import abe_block, design_of
from service.records.hashing import (
    CanonicalText,
    RecordTexts,
    canonical_json,
    canonical_plain_rows,
    sha256_hex,
)
from service.records.profiles import derive_profile_metrics
from service.records.tmax import tmax_comparison
from service.stats.designs import DesignRecognition
from service.stats.equivalence import tmax_summary
from service.stats.phases import check_deadline
from service.stats.ratio import analyse_ratio, ratio_analysis_to_json

ROLES = ("test", "reference", "baseline")


def engine_versions() -> dict[str, str]:
    return {
        "name": "bioparity",
        "version": __version__,
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "python": platform.python_version(),
    }


def build_record(
    inputs: dict[str, Any], *, deadline: float | None = None, threads: int | None = None,
    tables: Sequence[MetricTable] | None = None,
) -> dict[str, Any]:
    """The record without `id`/`created_at` (the archive adds those). `threads` caps the
    bootstrap's threads (None: every core this process may use); no number depends on it.
    `tables` as for build_record_and_texts."""
    return build_record_and_texts(inputs, deadline=deadline, threads=threads, tables=tables)[0]


def build_record_and_texts(
    inputs: dict[str, Any], *, deadline: float | None = None, threads: int | None = None,
    tables: Sequence[MetricTable] | None = None, plain_records: bool = False,
) -> tuple[dict[str, Any], RecordTexts | None]:
    """build_record, with the canonical JSON of its inputs and result (made once here: the
    inputs hash and the finiteness check need them anyway) for Archive.insert; None where the
    result has no canonical form (the archive then refuses it, naming the problem).

    `tables`: build_tables(inputs) made already, as read_request_and_tables hands them on with
    the very `inputs` it returned (unchanged since); used only for a request without profiles,
    where they are the tables the record is built from. `plain_records`: the plain lane read
    the records (intake.reading.read_for_record says so), so their canonical text is made from
    orjson's (hashing.canonical_plain_rows), not value by value."""
    if plain_records:
        records = CanonicalText(canonical_plain_rows(inputs["records"], "value").decode("utf-8"))
        inputs_text = canonical_json({**inputs, "records": records})
    else:
        inputs_text = canonical_json(inputs)
    result, result_text = _result_and_text(inputs, deadline, threads, tables)
    record = {"inputs_sha256": sha256_hex(inputs_text), "inputs": inputs, "result": result}
    return record, None if result_text is None else RecordTexts(inputs_text, result_text)


def compute_result(
    inputs: dict[str, Any], *, deadline: float | None = None, threads: int | None = None
) -> dict[str, Any]:
    """The result of `inputs`. `deadline` (time.monotonic()) stops the bootstrap with
    service.stats.deadlines.ComputeTimeExceeded once it has passed."""
    return _result_and_text(inputs, deadline, threads)[0]


def _result_and_text(
    inputs: dict[str, Any], deadline: float | None, threads: int | None,
    given_tables: Sequence[MetricTable] | None = None,
) -> tuple[dict[str, Any], bytes | None]:
    warnings: list[dict[str, Any]] = []
    # Every phase honours the compute-time cap, not only the bootstrap loop.
    check_deadline(deadline, "the concentration–time profiles", 0, 3)
    derived = derive_profile_metrics(inputs, deadline=deadline)
    check_deadline(deadline, "building the tables", 1, 3)
    if given_tables is not None and not derived.records:
        tables = list(given_tables)
    else:
        tables = build_tables(inputs, extra_records=derived.records)

    metrics: list[dict[str, Any]] = []
    for table in tables:
        check_deadline(deadline, f"the analysis of metric {table.metric!r}", 2, 3)
        metrics.append(_analyse_metric(table, inputs, warnings, deadline, threads))
    if derived.tmax:
        summary = tmax_summary(derived.tmax)
        entry = {"metric": "tmax", "analysis": "summary_only", "summary": summary}
        comparison = tmax_comparison(derived.profiles, inputs, warnings)
        if comparison is not None:
            entry["nonparametric"] = comparison
        metrics.append(entry)
    for flag in derived.warnings:
        warnings.append(flag)

    result: dict[str, Any] = {
        "metrics": metrics,
        "warnings": warnings,
        "engine": engine_versions(),
    }
    if inputs.get("profiles"):
        result["profiles"] = derived.profiles
        result["profile_rules"] = derived.rules
    try:  # RFC 8785 refuses NaN and ±Infinity: the usual case is checked by serialising once
        return result, canonical_json(result)
    except ValueError:
        pass
    found: list[str] = []
    if not _all_finite(result):
        result = _replace_nonfinite(result, ("result",), found)
    if found:
        result["warnings"].append(
            {
                "code": "figures_not_computable",
                "metric": None,
                "message": "these figures overflowed floating-point arithmetic and are null: "
                + ", ".join(found[:20])
                + (f" and {len(found) - 20} more" if len(found) > 20 else ""),
            }
        )
    try:
        return result, canonical_json(result)
    except ValueError:
        return result, None


def _analyse_metric(
    table: MetricTable, inputs: dict[str, Any], warnings: list[dict[str, Any]],
    deadline: float | None = None, threads: int | None = None,
) -> dict[str, Any]:
    settings = inputs["settings"]
    design = inputs["design"]
    recognition = design_of(table, design)
    if table.parallel:
        return _parallel_metric(table, recognition, inputs, warnings, deadline)
    strata = _strata(table.sequences) if settings["stratify_by_sequence"] else None
    ratio = analyse_ratio(
        table.values,
        replicates=settings["replicates"],
        seed=settings["seed"],
        confidence_level=settings["confidence_level"],
        interval=settings["interval"],
        limits=(settings["limits"]["lower"], settings["limits"]["upper"]),
        strata=strata,
        deadline=deadline,
        threads=threads,
    )
    ratio_json = ratio_analysis_to_json(ratio, table.subjects)
    for diagnostic in ratio_json.pop("diagnostics", []):
        warnings.append({"metric": table.metric, **diagnostic})
    if table.excluded:
        names = ", ".join(e.subject for e in table.excluded)
        warnings.append(
            {
                "code": "subjects_excluded",
                "metric": table.metric,
                "message": f"{len(table.excluded)} subject(s) excluded for lack of a value "
                f"for every treatment: {names}",
            }
        )

    entry: dict[str, Any] = {
        "metric": table.metric,
        "analysis": "full",
        "treatments": {
            role: label for role, label in zip(ROLES, table.treatments, strict=False)
        },
        "subjects": {
            "analysed": list(table.subjects),
            "excluded": [{"subject": e.subject, "reason": e.reason} for e in table.excluded],
        },
        "treatment_summary": _treatment_summary(table),
        "per_subject": _per_subject(table, ratio_json),
        "ratio_of_mean_differences": ratio_json,
    }
    entry["average_bioequivalence"] = abe_block(
        table, recognition, design, settings, warnings, deadline)
    return entry


def _parallel_metric(
    table: MetricTable, recognition: DesignRecognition, inputs: dict[str, Any],
    warnings: list[dict[str, Any]], deadline: float | None,
) -> dict[str, Any]:
    """Parallel groups: no subject has both products, so there is no within-subject θ; the
    log-scale comparison of the groups is the analysis."""
    design = inputs["design"]
    warnings.append({"code": "ratio_not_paired", "metric": table.metric,
                     "message": "parallel groups: each subject received one treatment, so the "
                     "ratio of mean differences (a within-subject statistic) is not computed"})
    groups: dict[str, list[float]] = {}
    for o in table.observations:
        groups.setdefault(o.treatment, []).append(o.value)
    return {
        "metric": table.metric,
        "analysis": "parallel",
        "treatments": {
            role: label for role, label in zip(ROLES, table.treatments, strict=False)
        },
        "subjects": {"analysed": sorted({o.subject for o in table.observations}), "excluded": []},
        "treatment_summary": [
            _summary_row(label, role, np.array(groups.get(label, []), dtype=np.float64))
            for role, label in zip(ROLES, table.treatments, strict=False)
        ],
        "per_subject": [],
        "ratio_of_mean_differences": None,
        "average_bioequivalence": abe_block(
            table, recognition, design, inputs["settings"], warnings, deadline),
    }


def _strata(sequences: Sequence[str]) -> np.ndarray[Any, np.dtype[np.int64]]:
    labels = sorted(set(sequences))
    code = {label: i for i, label in enumerate(labels)}
    return np.array([code[s] for s in sequences], dtype=np.int64)


def _treatment_summary(table: MetricTable) -> list[dict[str, Any]]:
    return [
        _summary_row(label, role, table.values[:, j])
        for j, (role, label) in enumerate(zip(ROLES, table.treatments, strict=False))
    ]


def _summary_row(label: str, role: str, column: np.ndarray[Any, np.dtype[np.float64]]) -> dict[str, Any]:
    n = int(column.size)
    mean = sd = low = high = None
    if n:
        # The ufuncs numpy's own mean and std(ddof=1) run, in the same order (numpy/_core/
        # _methods.py: _mean, _var, _std), less their Python-level argument handling: the same
        # floats (tests/records/test_pipeline.py compares them bit for bit).
        total = _ADD.reduce(column)
        mean = float(total / n)
        if n > 1:
            deviations = column - total / n
            sd = math.sqrt(float(_ADD.reduce(_SQUARE(deviations, out=deviations)) / (n - 1)))
        low, high = float(_MINIMUM.reduce(column)), float(_MAXIMUM.reduce(column))
    return {
        "treatment": label,
        "role": role,
        "n": n,
        "mean": mean,
        "sd": sd,
        "min": low,
        "max": high,
    }


_ADD, _SQUARE, _MINIMUM, _MAXIMUM = np.add, np.square, np.minimum, np.maximum


def _per_subject(table: MetricTable, ratio_json: Mapping[str, Any]) -> list[dict[str, Any]]:
    jackknife = {v["subject"]: v["theta"] for v in ratio_json["jackknife"]["values"]}
    treatments = table.treatments
    has_baseline = table.values.shape[1] == 3
    # tolist(): the same Python floats and ints as float()/int() of each element, made at once
    values, periods = table.values.tolist(), table.periods.tolist()
    return [
        {
            "subject": subject,
            "sequence": sequence,
            "values": dict(zip(treatments, own, strict=True)),
            "periods": dict(zip(treatments, own_periods, strict=True)),
            "numerator_difference": own[0] - own[1],
            "denominator_difference": own[1] - own[2] if has_baseline else own[1],
            "jackknife_theta": jackknife.get(subject),
        }
        for subject, sequence, own, own_periods in zip(table.subjects, table.sequences, values,
                                                       periods, strict=True)
    ]


def _all_finite(result: Any) -> bool:
    # The C encoder refuses NaN and ±Infinity anywhere: one fast pass in the usual case, the
    # path-naming walk below only when something did overflow.
    try:
        json.dumps(result, allow_nan=False)
    except ValueError:
        return False
    return True


def _replace_nonfinite(
    obj: Any, loc: tuple[str | int, ...], found: list[str]
) -> Any:
    """A last guard: the contract forbids NaN/Infinity anywhere in a record. Any figure that
    overflowed becomes null and is listed, so the record stays valid JSON and says so."""
    if isinstance(obj, float) and not math.isfinite(obj):
        found.append(".".join(str(part) for part in loc))
        return None
    if isinstance(obj, dict):
        return {key: _replace_nonfinite(value, (*loc, key), found) for key, value in obj.items()}
    if isinstance(obj, list):
        return [_replace_nonfinite(value, (*loc, i), found) for i, value in enumerate(obj)]
    return obj
