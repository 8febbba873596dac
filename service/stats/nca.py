"""Exposure metrics from one concentration–time profile (no compartment model).

Rules, in the order they are applied:

1. Below quantification: a point is below the limit when ``below_lloq`` is true for it, or when
   ``lloq`` is given and its concentration is below ``lloq``. Its reported concentration is then
   ignored (it may be any number, NaN included). Before the first measurable concentration
   (not below the limit and > 0) such points count as 0; after it they are left out
   (``below_lloq_after_first="exclude"``, the default) or count as 0 (``"zero"``).
2. Baseline correction (optional, for substances the body makes itself): the mean of the pre-dose
   points (time <= 0) is subtracted from every concentration and negative results become 0.
3. Pre-dose check: a pre-dose concentration (time <= 0, after steps 1–2) above 5 % of Cmax is
   flagged ``predose_above_5_percent``.
4. Cmax and Tmax (the first time of the maximum) over the points at time >= 0; Clast and Tlast
   are the last concentration > 0 and its time.
5. AUC from time 0 to Tlast: linear trapezoids, or linear-up/log-down (a log trapezoid on an
   interval where the concentration falls and both ends are > 0). When there is no sample at
   time 0, the last pre-dose concentration stands for time 0, or 0 when there is none (flag
   ``concentration_at_dose_imputed``).
6. λz: log-linear least squares on the last k points after Tmax (Tmax itself excluded) with
   concentration > 0, k >= 3; k is the one with the best adjusted R², the largest k among those
   within 1e-4 of the best; only fits with a negative slope count. λz = −slope,
   half-life = ln 2 / λz, AUC0–∞ = AUC0–tlast + Clast / λz, and the extrapolated share
   100·(Clast/λz)/AUC0–∞ is flagged above 20 %.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.stats.diagnostics import Diagnostic

AUC_METHODS = ("linear_up_log_down", "linear")
BELOW_LLOQ_RULES = ("exclude", "zero")
_ADJ_R2_TOLERANCE = 1e-4  # prefer more points when this close to the best fit (common practice)


@dataclass(frozen=True)
class ProfilePoint:
    time: float
    concentration: float | None  # after the rules; None when the point was left out
    used: bool  # part of AUC0–tlast (time 0 to Tlast, not left out)


@dataclass(frozen=True)
class ProfileMetrics:
    cmax: float | None
    tmax: float | None
    clast: float | None
    tlast: float | None
    auc_0_t: float | None
    auc_0_inf: float | None
    auc_extrapolated_percent: float | None
    lambda_z: float | None
    lambda_z_intercept: float | None  # intercept of ln C = intercept − λz·t
    half_life: float | None
    r2_adjusted: float | None
    lambda_z_times: tuple[float, ...]
    points: tuple[ProfilePoint, ...]
    auc_method: str
    baseline: float | None  # the pre-dose mean subtracted, when corrected
    flags: tuple[str, ...]
    diagnostics: tuple[Diagnostic, ...]


def profile_metrics(
    times: NDArray[np.float64], concentrations: NDArray[np.float64],
    below_lloq: NDArray[np.bool_], *, auc_method: str = "linear_up_log_down",
    lloq: float | None = None, baseline_correction: bool = False,
    below_lloq_after_first: str = "exclude",
) -> ProfileMetrics:
    """Cmax, Tmax, AUC0–tlast, λz, half-life and AUC0–∞ of one profile (rules in the module doc)."""
    t, c_raw, blq = _validate(times, concentrations, below_lloq, auc_method, lloq,
                              below_lloq_after_first)
    diagnostics: list[Diagnostic] = []
    if lloq is not None:
        blq = blq | (~np.isnan(c_raw) & (c_raw < lloq))

    # Rule 1: below-quantification points.
    measurable = ~blq & (np.nan_to_num(c_raw, nan=0.0) > 0)
    first = int(np.argmax(measurable)) if measurable.any() else t.size
    c = np.where(blq, 0.0, c_raw)
    used = np.ones(t.size, dtype=bool)
    after_first = np.arange(t.size) > first
    if below_lloq_after_first == "exclude":
        used &= ~(blq & after_first)

    # Rule 2: baseline correction on the pre-dose mean.
    predose = used & (t <= 0)
    baseline: float | None = None
    if baseline_correction:
        if not predose.any():
            raise ValueError("baseline_correction: the profile has no pre-dose sample (time <= 0)")
        baseline = float(c[predose].mean())
        c = np.maximum(c - baseline, 0.0)

    post = used & (t >= 0)
    cmax = tmax = clast = tlast = None
    if post.any() and np.any(c[post] > 0):
        idx_post = np.flatnonzero(post)
        i_max = idx_post[int(np.argmax(c[idx_post]))]  # argmax takes the first maximum
        cmax, tmax = float(c[i_max]), float(t[i_max])
        i_last = idx_post[np.flatnonzero(c[idx_post] > 0)[-1]]
        clast, tlast = float(c[i_last]), float(t[i_last])
    else:
        diagnostics.append(Diagnostic("no_measurable_concentration",
                                      "no concentration above zero after the dose"))
        if post.any():
            cmax = 0.0

    # Rule 3: pre-dose level against Cmax (EMA 2010, from memory).
    if cmax is not None and cmax > 0 and np.any(c[predose] > 0.05 * cmax):
        diagnostics.append(Diagnostic("predose_above_5_percent",
                                      "a pre-dose concentration exceeds 5 % of Cmax"))

    auc_0_t: float | None = 0.0 if cmax is not None else None
    lambda_z = intercept = half_life = r2_adj = auc_inf = extrapolated = None
    lz_times: tuple[float, ...] = ()
    if tlast is not None and tmax is not None and clast is not None:
        seg_t, seg_c = _segment_from_dose(t, c, used, tlast, diagnostics)
        auc_0_t = _auc(seg_t, seg_c, auc_method)
        fit = _terminal_fit(t, c, used, tmax, tlast, diagnostics)
        if fit is not None:
            lambda_z, intercept, r2_adj, lz_times = fit
            half_life = math.log(2.0) / lambda_z
            auc_inf = auc_0_t + clast / lambda_z
            extrapolated = 100.0 * (clast / lambda_z) / auc_inf if auc_inf > 0 else None
            if extrapolated is not None and extrapolated > 20.0:
                diagnostics.append(Diagnostic(
                    "extrapolated_above_20_percent",
                    f"{extrapolated:.1f} % of AUC0–∞ is extrapolated beyond Tlast"))

    in_auc = used & (t >= 0) & (t <= (tlast if tlast is not None else -math.inf))
    points = tuple(ProfilePoint(float(ti), float(ci) if ui else None, bool(ai))
                   for ti, ci, ui, ai in zip(t, c, used, in_auc, strict=True))
    return ProfileMetrics(
        cmax=cmax, tmax=tmax, clast=clast, tlast=tlast, auc_0_t=_finite(auc_0_t),
        auc_0_inf=_finite(auc_inf), auc_extrapolated_percent=_finite(extrapolated),
        lambda_z=lambda_z, lambda_z_intercept=intercept, half_life=_finite(half_life),
        r2_adjusted=r2_adj, lambda_z_times=lz_times, points=points, auc_method=auc_method,
        baseline=baseline,
        flags=tuple(d.code for d in diagnostics), diagnostics=tuple(diagnostics))


def _segment_from_dose(
    t: NDArray[np.float64], c: NDArray[np.float64], used: NDArray[np.bool_], tlast: float,
    diagnostics: list[Diagnostic],
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    keep = used & (t >= 0) & (t <= tlast)
    seg_t, seg_c = t[keep], c[keep]
    if seg_t.size == 0 or seg_t[0] > 0:
        before = np.flatnonzero(used & (t < 0))
        c0 = float(c[before[-1]]) if before.size else 0.0
        seg_t = np.concatenate(([0.0], seg_t))
        seg_c = np.concatenate(([c0], seg_c))
        diagnostics.append(Diagnostic(
            "concentration_at_dose_imputed",
            f"no sample at time 0: {c0:.6g} taken as the concentration at dosing"))
    return seg_t, seg_c


def _auc(t: NDArray[np.float64], c: NDArray[np.float64], method: str) -> float:
    dt = np.diff(t)
    c1, c2 = c[:-1], c[1:]
    linear = dt * (c1 + c2) / 2.0
    if method == "linear":
        return float(linear.sum())
    # Log trapezoid where the concentration falls, Yeh & Kwan 1978: dt·(C1 − C2)/ln(C1/C2).
    down = (c2 < c1) & (c1 > 0) & (c2 > 0)
    log_part = np.zeros_like(linear)
    log_part[down] = dt[down] * (c1[down] - c2[down]) / np.log(c1[down] / c2[down])
    return float(np.where(down, log_part, linear).sum())


def _terminal_fit(
    t: NDArray[np.float64], c: NDArray[np.float64], used: NDArray[np.bool_], tmax: float,
    tlast: float, diagnostics: list[Diagnostic],
) -> tuple[float, float, float, tuple[float, ...]] | None:
    keep = used & (t > tmax) & (t <= tlast) & (c > 0)
    tt, lc = t[keep], np.log(c[keep])
    if tt.size < 3:
        diagnostics.append(Diagnostic("lambda_z_too_few_points",
                                      f"{tt.size} positive points after Tmax; λz needs 3"))
        return None
    # All candidate fits at once: sums over the last k points, centred on the last point so the
    # running sums do not cancel (simple linear regression, normal equations).
    x = (tt - tt[-1])[::-1]
    y = (lc - lc[-1])[::-1]
    k = np.arange(1, tt.size + 1, dtype=np.float64)
    sx, sy = np.cumsum(x), np.cumsum(y)
    sxx = np.cumsum(x * x) - sx * sx / k
    syy = np.cumsum(y * y) - sy * sy / k
    sxy = np.cumsum(x * y) - sx * sy / k
    fits: list[tuple[float, float, float, int]] = []  # (r2_adj, slope, intercept, k)
    for j in range(2, tt.size):
        n_pts = j + 1
        if not (sxx[j] > 0 and syy[j] > 0):
            continue
        slope = float(sxy[j] / sxx[j])
        if not slope < 0:
            continue
        r2 = 1.0 - max(float(syy[j] - slope * sxy[j]), 0.0) / float(syy[j])
        r2_adj = 1.0 - (1.0 - r2) * (n_pts - 1) / (n_pts - 2)  # adjusted R², n − 2 df
        # Back to the original axes: ln C = intercept + slope·t.
        intercept = float(lc[-1] + sy[j] / n_pts - slope * (sx[j] / n_pts + tt[-1]))
        fits.append((r2_adj, slope, intercept, n_pts))
    if not fits:
        diagnostics.append(Diagnostic("lambda_z_not_positive",
                                      "no terminal fit with a falling log concentration"))
        return None
    top = max(f[0] for f in fits)
    best = max((f for f in fits if f[0] >= top - _ADJ_R2_TOLERANCE), key=lambda f: f[3])
    r2_adj, slope, intercept, n_best = best
    return -slope, intercept, r2_adj, tuple(float(v) for v in tt[-n_best:])


def _validate(
    times: NDArray[np.float64], concentrations: NDArray[np.float64],
    below_lloq: NDArray[np.bool_], auc_method: str, lloq: float | None,
    below_lloq_after_first: str,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.bool_]]:
    t = np.asarray(times, dtype=np.float64)
    c = np.asarray(concentrations, dtype=np.float64)
    blq = np.asarray(below_lloq, dtype=bool)
    problems: list[str] = []
    if t.ndim != 1 or c.shape != t.shape or blq.shape != t.shape:
        raise ValueError(f"times, concentrations, below_lloq: need equal one-dimensional shapes, "
                         f"got {t.shape}, {c.shape}, {blq.shape}")
    if t.size == 0:
        problems.append("times: the profile has no points")
    if not np.all(np.isfinite(t)):
        problems.append(f"times: entries {np.flatnonzero(~np.isfinite(t))[:10].tolist()} "
                        "are not finite")
    elif t.size > 1 and np.any(np.diff(t) <= 0):
        problems.append("times: must be strictly increasing")
    bad = np.flatnonzero(~blq & ~(np.isfinite(c) & (c >= 0)))
    if bad.size:
        problems.append(f"concentrations: entries {bad[:10].tolist()} are not finite numbers "
                        ">= 0 and are not marked below_lloq")
    if auc_method not in AUC_METHODS:
        problems.append(f"auc_method: {auc_method!r} is not one of {list(AUC_METHODS)}")
    if below_lloq_after_first not in BELOW_LLOQ_RULES:
        problems.append(f"below_lloq_after_first: {below_lloq_after_first!r} is not one of "
                        f"{list(BELOW_LLOQ_RULES)}")
    if lloq is not None and not (math.isfinite(lloq) and lloq > 0):
        problems.append(f"lloq: {lloq!r} is not a finite number > 0")
    if problems:
        raise ValueError("; ".join(problems))
    return t, c, blq


def _finite(value: float | None) -> float | None:
    return value if value is not None and math.isfinite(value) else None


def profile_metrics_to_json(m: ProfileMetrics) -> dict[str, Any]:
    """JSON form of one profile's metrics; every figure traceable to its points."""
    return {
        "cmax": m.cmax, "tmax": m.tmax, "clast": m.clast, "tlast": m.tlast,
        "auc_0_t": m.auc_0_t, "auc_0_inf": m.auc_0_inf,
        "auc_extrapolated_percent": m.auc_extrapolated_percent,
        "lambda_z": m.lambda_z, "lambda_z_intercept": m.lambda_z_intercept,
        "half_life": m.half_life, "r2_adjusted": m.r2_adjusted,
        "lambda_z_times": list(m.lambda_z_times), "auc_method": m.auc_method,
        "baseline": m.baseline,
        "flags": list(m.flags),
        "warnings": [{"code": d.code, "message": d.message} for d in m.diagnostics],
        "points": [{"time": p.time, "concentration": p.concentration, "used": p.used}
                   for p in m.points],
    }
