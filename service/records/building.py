"""Assemble the archived record: normalized inputs, their RFC 8785 hash, and the result."""

from __future__ import annotations

import math
import platform
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import scipy

from service import __version__
from service.intake.tables import MetricTable, build_tables
from service.records.hashing import inputs_sha256
from service.records.profiles import derive_profile_metrics
from service.stats.equivalence import (
    average_bioequivalence,
    average_bioequivalence_to_json,
    tmax_summary,
)
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


def build_record(inputs: dict[str, Any], *, deadline: float | None = None) -> dict[str, Any]:
    """The record without `id`/`created_at` (the archive adds those)."""
    return {
        "inputs_sha256": inputs_sha256(inputs),
        "inputs": inputs,
        "result": compute_result(inputs, deadline=deadline),
    }


def compute_result(inputs: dict[str, Any], *, deadline: float | None = None) -> dict[str, Any]:
    """The result of `inputs`. `deadline` (time.monotonic()) stops the bootstrap with
    service.stats.deadlines.ComputeTimeExceeded once it has passed."""
    warnings: list[dict[str, Any]] = []
    derived = derive_profile_metrics(inputs)
    tables = build_tables(inputs, extra_records=derived.records)

    metrics: list[dict[str, Any]] = []
    for table in tables:
        metrics.append(_analyse_metric(table, inputs, warnings, deadline))
    if derived.tmax:
        summary = tmax_summary(derived.tmax)
        metrics.append({"metric": "tmax", "analysis": "summary_only", "summary": summary})
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
    found: list[str] = []
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
    return result


def _analyse_metric(
    table: MetricTable, inputs: dict[str, Any], warnings: list[dict[str, Any]],
    deadline: float | None = None,
) -> dict[str, Any]:
    settings = inputs["settings"]
    design = inputs["design"]
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
    entry["average_bioequivalence"] = _average_bioequivalence(
        table, design, settings["average_bioequivalence"], warnings
    )
    return entry


def _average_bioequivalence(
    table: MetricTable,
    design: Mapping[str, Any],
    abe_settings: Mapping[str, Any],
    warnings: list[dict[str, Any]],
) -> dict[str, Any] | None:
    if not np.all(table.values > 0):
        warnings.append(
            {
                "code": "nonpositive_values",
                "metric": table.metric,
                "message": "average bioequivalence needs positive values (it works on their "
                "logarithms); some values are zero or negative, so it was not computed",
            }
        )
        return None
    columns = 2 if abe_settings["treatments_in_model"] == "compared" else table.values.shape[1]
    n = len(table.subjects)
    subjects = [s for s in table.subjects for _ in range(columns)]
    sequences = [q for q in table.sequences for _ in range(columns)]
    periods = [int(p) for p in table.periods[:, :columns].reshape(-1)]
    treatments = [t for _ in range(n) for t in table.treatments[:columns]]
    values = table.values[:, :columns].reshape(-1)
    try:
        abe = average_bioequivalence(
            subjects=subjects,
            sequences=sequences,
            periods=periods,
            treatments=treatments,
            values=values,
            test=design["test"],
            reference=design["reference"],
            confidence_level=abe_settings["confidence_level"],
            limits_percent=(abe_settings["limits"]["lower"], abe_settings["limits"]["upper"]),
        )
    except ValueError as exc:
        # e.g. treatment confounded with period (every subject in one sequence of a 2×2)
        warnings.append(
            {
                "code": "average_bioequivalence_not_estimable",
                "metric": table.metric,
                "message": f"average bioequivalence could not be estimated: {exc}",
            }
        )
        return None
    abe_json = average_bioequivalence_to_json(abe)
    for diagnostic in abe_json.get("warnings", []):
        warnings.append({"metric": table.metric, **diagnostic})
    return abe_json


def _strata(sequences: Sequence[str]) -> np.ndarray[Any, np.dtype[np.int64]]:
    labels = sorted(set(sequences))
    code = {label: i for i, label in enumerate(labels)}
    return np.array([code[s] for s in sequences], dtype=np.int64)


def _treatment_summary(table: MetricTable) -> list[dict[str, Any]]:
    summary = []
    for j, (role, label) in enumerate(zip(ROLES, table.treatments, strict=False)):
        column = table.values[:, j]
        n = int(column.size)
        summary.append(
            {
                "treatment": label,
                "role": role,
                "n": n,
                "mean": float(column.mean()),
                "sd": float(column.std(ddof=1)) if n > 1 else None,
                "min": float(column.min()),
                "max": float(column.max()),
            }
        )
    return summary


def _per_subject(table: MetricTable, ratio_json: Mapping[str, Any]) -> list[dict[str, Any]]:
    jackknife = {v["subject"]: v["theta"] for v in ratio_json["jackknife"]["values"]}
    rows = []
    has_baseline = table.values.shape[1] == 3
    for i, subject in enumerate(table.subjects):
        t, r = float(table.values[i, 0]), float(table.values[i, 1])
        z = r - float(table.values[i, 2]) if has_baseline else r
        rows.append(
            {
                "subject": subject,
                "sequence": table.sequences[i],
                "values": {
                    label: float(table.values[i, j]) for j, label in enumerate(table.treatments)
                },
                "periods": {
                    label: int(table.periods[i, j]) for j, label in enumerate(table.treatments)
                },
                "numerator_difference": t - r,
                "denominator_difference": z,
                "jackknife_theta": jackknife.get(subject),
            }
        )
    return rows


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
