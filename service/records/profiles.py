"""Turn posted concentration–time profiles into per-subject metric records."""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from service.intake.tables import InvalidRequest, Problem
from service.stats.nca import profile_metrics, profile_metrics_to_json
from service.stats.phases import check_deadline

# Metrics that go through the full analysis; tmax is summarised only (a discrete sampling time).
ANALYSED_METRICS = ("auc_0_t", "auc_0_inf", "cmax")


@dataclass(frozen=True)
class DerivedMetrics:
    records: list[dict[str, Any]] = field(default_factory=list)
    tmax: dict[str, list[float]] = field(default_factory=dict)
    profiles: list[dict[str, Any]] = field(default_factory=list)
    warnings: list[dict[str, Any]] = field(default_factory=list)
    rules: list[str] = field(default_factory=list)


def describe_rules(settings: dict[str, Any]) -> list[str]:
    method = settings["auc_method"]
    rules = [
        "AUC from time 0 to the last measurable concentration by the "
        + (
            "linear trapezoid rule."
            if method == "linear"
            else "linear trapezoid while concentrations rise or stay level and the logarithmic "
            "trapezoid while they fall (linear-up / log-down; Yeh & Kwan 1978)."
        ),
        "Cmax is the highest observed concentration; Tmax the first time it was observed.",
        "λz by log-linear least squares on the last three or more measurable points after Cmax, "
        "the number of points chosen by the best adjusted R², preferring more points when within "
        "1e-4 of the best; half-life = ln 2 / λz.",
        "AUC to infinity adds the last observed measurable concentration divided by λz; "
        "an extrapolated share above 20 % is flagged.",
        "Concentrations below the limit of quantification count as 0 before the first measurable "
        "concentration and are "
        + (
            "excluded after it."
            if settings["below_lloq_after_first"] == "exclude"
            else "set to 0 after it."
        ),
        "A pre-dose concentration above 5 % of Cmax is flagged.",
    ]
    if settings["lloq"] is not None:
        rules.append(f"Lower limit of quantification: {settings['lloq']:g}.")
    if settings["baseline_correction"]:
        rules.append(
            "Baseline correction: the mean pre-dose concentration (time ≤ 0) of the same subject "
            "and period is subtracted; negative corrected values are set to 0."
        )
    return rules


def derive_profile_metrics(inputs: dict[str, Any], *, deadline: float | None = None) -> DerivedMetrics:
    points = inputs.get("profiles") or []
    if not points:
        return DerivedMetrics()
    settings = inputs["settings"]["profiles"]
    groups: dict[tuple[str, int, str], list[dict[str, Any]]] = defaultdict(list)
    first_index: dict[tuple[str, int, str], int] = {}
    for index, point in enumerate(points):
        key = (point["subject"], point["period"], point["treatment"])
        groups[key].append(point)
        first_index.setdefault(key, index)

    records: list[dict[str, Any]] = []
    tmax: dict[str, list[float]] = defaultdict(list)
    profiles: list[dict[str, Any]] = []
    warnings: list[dict[str, Any]] = []
    problems: list[Problem] = []
    for done, ((subject, period, treatment), group) in enumerate(sorted(groups.items())):
        if done % 256 == 0:
            check_deadline(deadline, "the concentration–time profiles", done, len(groups))
        group.sort(key=lambda p: p["time"])
        times = np.array([p["time"] for p in group], dtype=np.float64)
        below = np.array([bool(p["below_lloq"]) for p in group], dtype=np.bool_)
        concentrations = np.array(
            [0.0 if p["concentration"] is None else p["concentration"] for p in group],
            dtype=np.float64,
        )
        try:
            metrics = profile_metrics(
                times,
                concentrations,
                below,
                auc_method=settings["auc_method"],
                lloq=settings["lloq"],
                baseline_correction=settings["baseline_correction"],
                below_lloq_after_first=settings["below_lloq_after_first"],
            )
        except ValueError as exc:
            problems.append(
                Problem(
                    ("profiles", first_index[(subject, period, treatment)]),
                    f"profile of subject {subject}, period {period}, treatment {treatment}: {exc}",
                )
            )
            continue
        row = profile_metrics_to_json(metrics)
        profiles.append({"subject": subject, "period": period, "treatment": treatment, **row})
        sequence = group[0]["sequence"]
        for name in ANALYSED_METRICS:
            value = row.get(name)
            if value is not None:
                records.append(
                    {
                        "subject": subject,
                        "period": period,
                        "sequence": sequence,
                        "treatment": treatment,
                        "metric": name,
                        "value": float(value),
                    }
                )
        if row.get("tmax") is not None:
            tmax[treatment].append(float(row["tmax"]))
        for flag in row.get("flags", []):
            warnings.append(
                {
                    "code": f"profile_{flag}",
                    "metric": None,
                    "message": f"subject {subject}, period {period}, treatment {treatment}: "
                    + flag.replace("_", " "),
                }
            )

    if problems:
        raise InvalidRequest(problems)
    records, dropped = _drop_sparse_metrics(records, inputs["design"])
    for name in dropped:
        warnings.append(
            {
                "code": "metric_not_analysed",
                "metric": name,
                "message": f"fewer than 3 subjects have {name} for every treatment, "
                "so it was not analysed",
            }
        )
    return DerivedMetrics(
        records=records,
        tmax=dict(tmax),
        profiles=profiles,
        warnings=warnings,
        rules=describe_rules(settings),
    )


def _drop_sparse_metrics(
    records: list[dict[str, Any]], design: dict[str, Any]
) -> tuple[list[dict[str, Any]], list[str]]:
    needed = {design["test"], design["reference"]}
    if design.get("baseline"):
        needed.add(design["baseline"])
    have: dict[str, dict[str, set[str]]] = defaultdict(lambda: defaultdict(set))
    for record in records:
        have[record["metric"]][record["subject"]].add(record["treatment"])
    dropped = [
        name
        for name in ANALYSED_METRICS
        if sum(needed <= treatments for treatments in have[name].values()) < 3
    ]
    return [r for r in records if r["metric"] not in dropped], dropped
