"""The average-bioequivalence block of a metric: the design read from the table, the model that
fits it, and the scaled limits the settings ask for."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import replace
from typing import Any

import numpy as np

from service.intake.problems import InvalidRequest, Problem
from service.intake.tables import MetricTable, Observation
from service.stats.designs import DesignRecognition, recognise_design
from service.stats.equivalence import average_bioequivalence, average_bioequivalence_to_json
from service.stats.parallel import (
    parallel_average_bioequivalence,
    parallel_average_bioequivalence_to_json,
)
from service.stats.replicate import (
    replicate_average_bioequivalence,
    replicate_average_bioequivalence_to_json,
)
from service.stats.scaling import (
    no_scaling,
    reference_scaled_acceptance,
    scaled_acceptance_to_json,
    widened_limits_acceptance,
)

Warnings = list[dict[str, Any]]


def design_of(table: MetricTable, design: Mapping[str, Any]) -> DesignRecognition:
    """The design of one metric's table, or InvalidRequest saying why it fits none."""
    rows = _compared_rows(table.observations, design)
    recognition = recognise_design(
        subjects=[o.subject for o in rows], sequences=[o.sequence for o in rows],
        periods=[o.period for o in rows], treatments=[o.treatment for o in rows],
        test=design["test"], reference=design["reference"],
    )
    if recognition.design is None:
        raise InvalidRequest([Problem(("records",), f"metric {table.metric!r}: the table fits no "
                                                    f"supported design: {recognition.reason}")])
    return recognition


def abe_block(
    table: MetricTable, recognition: DesignRecognition, design: Mapping[str, Any],
    settings: Mapping[str, Any], warnings: Warnings, deadline: float | None,
) -> dict[str, Any] | None:
    abe_settings = settings["average_bioequivalence"]
    compared = _compared_rows(table.observations, design)
    if not all(o.value > 0 for o in compared) or not np.all(table.values > 0):
        warnings.append(
            {
                "code": "nonpositive_values",
                "metric": table.metric,
                "message": "average bioequivalence needs positive values (it works on their "
                "logarithms); some values are zero or negative, so it was not computed",
            }
        )
        return None
    options: dict[str, Any] = {
        "test": design["test"], "reference": design["reference"],
        "confidence_level": abe_settings["confidence_level"],
        "limits_percent": (abe_settings["limits"]["lower"], abe_settings["limits"]["upper"]),
        "deadline": deadline,
    }
    try:
        if recognition.design == "crossover":
            block = _crossover(table, abe_settings, options)
        else:
            columns = _long_form(compared)
            if recognition.design == "parallel":
                block = parallel_average_bioequivalence_to_json(
                    parallel_average_bioequivalence(**columns, **options))
            else:
                block = replicate_average_bioequivalence_to_json(
                    replicate_average_bioequivalence(**columns, **options))
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
    block.setdefault("design", recognition.design)
    block.setdefault("design_description", recognition.description)
    block.setdefault("reference_variability", None)
    block["scaling"] = _scaling(table, compared, block, design, settings.get("scaling"), warnings)
    for diagnostic in block.get("warnings", []):
        warnings.append({"metric": table.metric, **diagnostic})
    return block


def _crossover(
    table: MetricTable, abe_settings: Mapping[str, Any], options: Mapping[str, Any]
) -> dict[str, Any]:
    columns = 2 if abe_settings["treatments_in_model"] == "compared" else table.values.shape[1]
    n = len(table.subjects)
    abe = average_bioequivalence(
        subjects=[s for s in table.subjects for _ in range(columns)],
        sequences=[q for q in table.sequences for _ in range(columns)],
        periods=table.periods[:, :columns].reshape(-1).tolist(),
        treatments=[t for _ in range(n) for t in table.treatments[:columns]],
        values=table.values[:, :columns].reshape(-1),
        **options,
    )
    return average_bioequivalence_to_json(abe)


def _scaling(
    table: MetricTable, compared: Sequence[Observation], block: dict[str, Any],
    design: Mapping[str, Any], scaling: Mapping[str, Any] | None, warnings: Warnings,
) -> dict[str, Any] | None:
    if scaling is None or scaling["approach"] == "none" or table.metric not in scaling["metrics"]:
        return None
    ratio = block["ratio_percent"]
    variability = block.get("reference_variability")
    if block["design"] != "replicate" or variability is None:
        reason = (f"scaled limits need a replicate design (the reference given twice); this is a "
                  f"{block['design']} design, so the unscaled analysis decides")
        warnings.append({"code": "scaling_needs_replicate_design", "metric": table.metric,
                         "message": reason})
        return scaled_acceptance_to_json(replace(
            no_scaling(), approach=scaling["approach"], reason=reason,
            point_estimate_percent=ratio["estimate"]))
    if scaling["approach"] == "widened_limits":
        outcome = widened_limits_acceptance(
            s_wr=variability.get("s_wr"), point_estimate_percent=ratio["estimate"],
            lower_percent=ratio["lower"], upper_percent=ratio["upper"])
    else:
        outcome = reference_scaled_acceptance(
            **_long_form(compared), test=design["test"], reference=design["reference"],
            unscaled_lower_percent=ratio["lower"], unscaled_upper_percent=ratio["upper"])
    scaled = scaled_acceptance_to_json(outcome)
    for diagnostic in scaled.get("warnings", []):
        warnings.append({"metric": table.metric, **diagnostic})
    if scaled["verdict"] is not None:
        # The verdict follows the approach the protocol chose, scaled or not.
        acceptance = block["acceptance"]
        acceptance["approach"] = scaled["approach"]
        acceptance["verdict"] = scaled["verdict"]
        acceptance["reason"] = scaled["reason"]
        if scaled["approach"] == "widened_limits" and scaled["limits_percent"]["lower"] is not None:
            acceptance["limits"] = dict(scaled["limits_percent"])
    return scaled


def _compared_rows(rows: Sequence[Observation], design: Mapping[str, Any]) -> list[Observation]:
    pair = (design["test"], design["reference"])
    return [o for o in rows if o.treatment in pair]


def _long_form(rows: Sequence[Observation]) -> dict[str, Any]:
    return {
        "subjects": [o.subject for o in rows], "sequences": [o.sequence for o in rows],
        "periods": [o.period for o in rows], "treatments": [o.treatment for o in rows],
        "values": np.array([o.value for o in rows], dtype=np.float64),
    }
