"""Tmax compared without a model: the Hodges–Lehmann shift of test minus reference."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from service.stats.nonparametric import hodges_lehmann_shift, shift_comparison_to_json


def tmax_comparison(
    profiles: Sequence[Mapping[str, Any]], inputs: Mapping[str, Any], warnings: list[dict[str, Any]]
) -> dict[str, Any] | None:
    """The `nonparametric` block of the tmax metric, from each subject's Tmax under test and
    reference (the mean of its replicates in a replicate design); None for parallel groups or
    when no subject has both."""
    design = inputs["design"]
    test, reference = design["test"], design["reference"]
    seen: dict[str, dict[str, list[float]]] = {}
    for row in profiles:
        if row.get("tmax") is not None and row["treatment"] in (test, reference):
            seen.setdefault(row["subject"], {}).setdefault(row["treatment"], []).append(
                float(row["tmax"]))
    pairs = [(sum(v[test]) / len(v[test]), sum(v[reference]) / len(v[reference]))
             for _, v in sorted(seen.items()) if test in v and reference in v]
    if not pairs:
        return None
    limits = inputs["settings"].get("tmax_limits")
    comparison = shift_comparison_to_json(hodges_lehmann_shift(
        [t for t, _ in pairs], [r for _, r in pairs],
        confidence_level=inputs["settings"]["average_bioequivalence"]["confidence_level"],
        limits=None if limits is None else (limits["lower"], limits["upper"]),
    ))
    for diagnostic in comparison.get("warnings", []):
        warnings.append({"metric": "tmax", **diagnostic})
    return comparison
