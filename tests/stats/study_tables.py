"""Seeded long-form study tables for the ABE tests (constructed from a lognormal model; no
published data set)."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

TREATMENT_EFFECT = {"R": 0.0, "P": -1.0}


def simulate_table(
    seed: int, orders: dict[str, int], *, log_ratio: float = -0.05, cv_wr: float = 0.35,
    cv_wt: float = 0.25, sd_between: float = 0.4, drop_fraction: float = 0.0,
) -> pd.DataFrame:
    """One row per observation: subject, sequence, period, treatment, y.

    ``orders`` maps a sequence label, whose letters are the treatments by period (T, R, P), to
    its number of subjects. T and R have their own within-subject CVs (replicate designs);
    ``drop_fraction`` of the rows is then removed at random (missing observations)."""
    rng = np.random.default_rng(seed)
    sigma = {"T": math.sqrt(math.log1p(cv_wt**2)), "R": math.sqrt(math.log1p(cv_wr**2)),
             "P": math.sqrt(math.log1p(cv_wr**2))}
    effect = {**TREATMENT_EFFECT, "T": log_ratio}
    rows: list[dict[str, Any]] = []
    number = 0
    period_effects = rng.normal(0.0, 0.05, size=max(len(s) for s in orders))
    for sequence, n in orders.items():
        for _ in range(n):
            number += 1
            subject_effect = rng.normal(0.0, sd_between)
            for period, treatment in enumerate(sequence, start=1):
                log_y = (4.0 + subject_effect + period_effects[period - 1] + effect[treatment]
                         + rng.normal(0.0, sigma[treatment]))
                rows.append({"subject": f"S{number:03d}", "sequence": sequence, "period": period,
                             "treatment": treatment, "y": math.exp(log_y)})
    df = pd.DataFrame(rows)
    if drop_fraction > 0.0:
        keep = rng.random(len(df)) >= drop_fraction
        df = df[keep].reset_index(drop=True)
    return df


def columns(df: pd.DataFrame) -> dict[str, Any]:
    """The long-form keyword arguments of the stats functions."""
    return {"subjects": list(df["subject"]), "sequences": list(df["sequence"]),
            "periods": [int(p) for p in df["period"]], "treatments": list(df["treatment"]),
            "values": df["y"].to_numpy(dtype=np.float64)}


def layout(df: pd.DataFrame) -> dict[str, Any]:
    """Like :func:`columns` without values (design recognition)."""
    out = columns(df)
    del out["values"]
    return out
