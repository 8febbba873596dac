"""The ratio-of-mean-differences parameter θ, its Fieller interval and the acceptance check.

Columns: T = 0, R = 1, optional baseline B = 2.
θ = (mean_T − mean_R) / (mean_R − mean_B) with a baseline, θ = (mean_T − mean_R) / mean_R without.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy.special import stdtrit

from service.stats import intervals as iv
from service.stats import resampling as rs
from service.stats.diagnostics import Diagnostic

FloatArray = NDArray[np.float64]
INTERVAL_METHODS = ("percentile", "basic", "normal", "bca")
MINIMUM_SUBJECTS = 12  # ICH M13A (2024) minimum number of evaluable subjects


@dataclass(frozen=True)
class Estimate:
    theta: float | None
    numerator_mean: float
    denominator_mean: float


@dataclass(frozen=True)
class Fieller:
    kind: str  # "bounded" | "exclusive" | "unbounded"
    lower: float | None
    upper: float | None


@dataclass(frozen=True)
class Acceptance:
    limits: tuple[float, float]
    interval: str
    confidence_level: float
    lower: float | None
    upper: float | None
    verdict: str  # "within_limits" | "not_within_limits" | "undetermined"
    reason: str


@dataclass(frozen=True)
class RatioAnalysis:
    estimate: Estimate
    jackknife: rs.Jackknife
    bootstrap: rs.Bootstrap | None  # None when θ itself is undefined
    replicates: int
    seed: int
    fieller: Fieller
    acceptance: Acceptance
    numerator_differences: tuple[float, ...]  # y_i = T − R
    denominator_differences: tuple[float, ...]  # z_i = R − B, or R without a baseline
    diagnostics: tuple[Diagnostic, ...]


def theta_of_means(means: FloatArray) -> FloatArray:
    """θ from (..., 2|3) column means; a zero denominator gives a non-finite value."""
    numerator = means[..., 0] - means[..., 1]
    denominator = means[..., 1] - means[..., 2] if means.shape[-1] == 3 else means[..., 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.asarray(numerator / denominator, dtype=np.float64)


def _validate(
    values: FloatArray, replicates: int, seed: int, confidence_level: float, interval: str,
    limits: tuple[float, float], strata: NDArray[np.int64] | None, chunk_size: int | None,
    histogram_bins: int,
) -> None:
    problems: list[str] = []
    if values.ndim != 2 or values.shape[1] not in (2, 3):
        problems.append(f"values: expected shape (n, 2) or (n, 3), got {values.shape}")
    elif values.shape[0] < 2:
        problems.append(f"values: need at least 2 subjects, got {values.shape[0]}")
    elif not np.all(np.isfinite(values)):
        rows = sorted({int(r) for r in np.argwhere(~np.isfinite(values))[:, 0]})
        problems.append(f"values: rows {rows} hold a non-finite number")
    if not _is_integer(replicates) or replicates < 2:
        problems.append(f"replicates: must be an integer of at least 2, got {replicates!r}")
    if not _is_integer(seed) or seed < 0:
        problems.append(f"seed: must be a non-negative integer, got {seed!r}")
    if not 0.0 < confidence_level < 1.0:
        problems.append(
            f"confidence_level: must lie strictly between 0 and 1, got {confidence_level}")
    if interval not in INTERVAL_METHODS:
        problems.append(f"interval: must be one of {', '.join(INTERVAL_METHODS)}, got {interval!r}")
    if not (math.isfinite(limits[0]) and math.isfinite(limits[1]) and limits[0] < limits[1]):
        problems.append(f"limits: need finite lower < upper, got {limits}")
    if strata is not None and (strata.ndim != 1 or strata.shape[0] != values.shape[0]):
        problems.append(f"strata: need one code per subject, got shape {strata.shape}")
    if chunk_size is not None and chunk_size < 1:
        problems.append(f"chunk_size: must be positive, got {chunk_size}")
    if histogram_bins < 1:
        problems.append(f"histogram_bins: must be positive, got {histogram_bins}")
    if problems:
        raise ValueError("; ".join(problems))


def _is_integer(value: object) -> bool:
    return isinstance(value, int | np.integer) and not isinstance(value, bool)


def fieller_interval(y: FloatArray, z: FloatArray, confidence_level: float) -> Fieller:
    """Fieller 1954 (JRSS-B 16:175–185) set for θ = ȳ/z̄ from paired differences: all θ with
    (ȳ − θz̄)² ≤ t²(s_yy − 2θ s_yz + θ² s_zz)/n, t on n − 1 df, i.e. aθ² + bθ + c ≤ 0 with
    a = z̄² − q s_zz, b = −2(ȳz̄ − q s_yz), c = ȳ² − q s_yy, q = t²/n."""
    n = y.size
    t = float(stdtrit(n - 1, 1.0 - iv.tail_alpha(confidence_level)))
    q = t * t / n
    ybar, zbar = float(y.mean()), float(z.mean())
    s_yy, s_zz = float(y.var(ddof=1)), float(z.var(ddof=1))
    s_yz = float(np.sum((y - ybar) * (z - zbar))) / (n - 1)
    a = zbar * zbar - q * s_zz
    b = -2.0 * (ybar * zbar - q * s_yz)
    c = ybar * ybar - q * s_yy
    disc = b * b - 4.0 * a * c
    if a > 0.0:
        # The set always holds ȳ/z̄, so disc ≥ 0 up to rounding.
        root = math.sqrt(max(disc, 0.0))
        lo, hi = sorted(((-b - root) / (2.0 * a), (-b + root) / (2.0 * a)))
        return Fieller("bounded", lo, hi)
    if a < 0.0 and disc > 0.0:
        root = math.sqrt(disc)
        lo, hi = sorted(((-b - root) / (2.0 * a), (-b + root) / (2.0 * a)))
        return Fieller("exclusive", lo, hi)
    # a < 0 with disc ≤ 0: every θ qualifies. a == 0 exactly gives a half-line, reported as
    # unbounded too: no finite two-sided interval exists.
    return Fieller("unbounded", None, None)


def _acceptance(
    chosen: iv.Interval | None, theta: float | None, interval: str,
    confidence_level: float, limits: tuple[float, float], why_missing: str,
) -> Acceptance:
    if theta is None or chosen is None:
        reason = "theta is undefined (zero denominator mean)" if theta is None else why_missing
        return Acceptance(limits, interval, confidence_level, None, None, "undetermined", reason)
    inside = limits[0] <= chosen.lower and chosen.upper <= limits[1]
    level = f"{100 * confidence_level:g} % {interval} interval"
    if inside:
        reason = f"the {level} lies within [{limits[0]:g}, {limits[1]:g}]"
    else:
        reason = f"the {level} is not wholly within [{limits[0]:g}, {limits[1]:g}]"
    verdict = "within_limits" if inside else "not_within_limits"
    return Acceptance(limits, interval, confidence_level, chosen.lower, chosen.upper, verdict,
                      reason)


def analyse_ratio(
    values: FloatArray, *, replicates: int, seed: int, confidence_level: float, interval: str,
    limits: tuple[float, float], strata: NDArray[np.int64] | None = None,
    chunk_size: int | None = None, histogram_bins: int = 40, deadline: float | None = None,
    threads: int | None = None,
) -> RatioAnalysis:
    """Plug-in θ, jackknife, bootstrap with all intervals, Fieller and the acceptance check.
    Raises ValueError naming every bad argument; otherwise never returns NaN or infinity.
    ``deadline`` (time.monotonic()) is passed to the bootstrap loop: ComputeTimeExceeded.
    ``threads`` caps the bootstrap's threads (None: the cores this process may use); it never
    changes a number."""
    values = np.asarray(values, dtype=np.float64)
    _validate(values, replicates, seed, confidence_level, interval, limits, strata, chunk_size,
              histogram_bins)
    n = values.shape[0]
    diagnostics: list[Diagnostic] = []
    if n < MINIMUM_SUBJECTS:
        diagnostics.append(Diagnostic(
            "few_subjects", f"{n} subjects: fewer than the {MINIMUM_SUBJECTS} of ICH M13A"))
    y = values[:, 0] - values[:, 1]
    z = values[:, 1] - values[:, 2] if values.shape[1] == 3 else values[:, 1].copy()
    means = values.mean(axis=0)
    theta_raw = float(theta_of_means(means))
    theta = theta_raw if math.isfinite(theta_raw) else None
    estimate = Estimate(theta, float(y.mean()), float(z.mean()))
    fieller = fieller_interval(y, z, confidence_level)
    z_se = float(z.std(ddof=1)) / math.sqrt(n)
    if abs(estimate.denominator_mean) < 2.0 * z_se or fieller.kind != "bounded":
        diagnostics.append(Diagnostic(
            "unstable_denominator",
            f"denominator mean {estimate.denominator_mean:.4g} is within 2 standard errors "
            f"({z_se:.4g}) of zero, or the Fieller set is {fieller.kind}",
        ))
    boot: rs.Bootstrap | None = None
    if theta is None:
        diagnostics.append(Diagnostic("theta_undefined", "the denominator mean is exactly 0"))
        jack = rs.Jackknife(
            tuple(float(v) if math.isfinite(v) else None
                  for v in rs.leave_one_out_values(values, theta_of_means)),
            None, None, None, None,
        )
        chosen = None
    else:
        jack_values = rs.leave_one_out_values(values, theta_of_means)
        jack = rs.summarise_jackknife(jack_values, theta)
        boot = rs.bootstrap(
            values, theta_of_means, theta_hat=theta, jackknife_values=jack_values,
            replicates=replicates, seed=seed, confidence_level=confidence_level, strata=strata,
            chunk_size=chunk_size, histogram_bins=histogram_bins, deadline=deadline,
            threads=threads,
        )
        diagnostics.extend(boot.diagnostics)
        chosen = getattr(boot.intervals, interval)
        _check_agreement(jack, boot, theta, diagnostics)
        if chosen is not None and chosen.tail_counts is not None and min(chosen.tail_counts) < 10:
            diagnostics.append(Diagnostic(
                "too_few_replicates",
                f"only {min(chosen.tail_counts)} replicates lie beyond an endpoint of the "
                f"{interval} interval (want at least 10)",
            ))
    acceptance = _acceptance(chosen, theta, interval, confidence_level, limits,
                             f"the {interval} interval could not be computed")
    return RatioAnalysis(
        estimate, jack, boot, replicates, seed, fieller, acceptance,
        tuple(float(v) for v in y), tuple(float(v) for v in z), _unique(diagnostics),
    )


def _check_agreement(
    jack: rs.Jackknife, boot: rs.Bootstrap, theta: float, out: list[Diagnostic]
) -> None:
    se_se = boot.monte_carlo.standard_error_of_standard_error
    if jack.standard_error is None or boot.standard_error is None or se_se is None:
        return
    gap = abs(jack.standard_error - boot.standard_error)
    # The small absolute floor keeps rounding noise on (near-)constant data from raising it.
    if gap > 3.0 * se_se + 1e-10 * max(abs(theta), jack.standard_error, boot.standard_error):
        out.append(Diagnostic(
            "standard_errors_disagree",
            f"jackknife SE {jack.standard_error:.4g} and bootstrap SE {boot.standard_error:.4g} "
            f"differ by more than 3 × their Monte-Carlo error ({se_se:.3g})",
        ))


def _unique(diagnostics: list[Diagnostic]) -> tuple[Diagnostic, ...]:
    seen: dict[tuple[str, str], Diagnostic] = {}
    for d in diagnostics:
        seen.setdefault((d.code, d.message), d)
    return tuple(seen.values())


def _interval_json(value: iv.Interval | None) -> dict[str, float] | None:
    return None if value is None else {"lower": value.lower, "upper": value.upper}


def ratio_analysis_to_json(a: RatioAnalysis, subjects: Sequence[str]) -> dict[str, Any]:
    """The ``ratio_of_mean_differences`` object of DESIGN.md §Record, plus ``diagnostics``."""
    if len(subjects) != len(a.jackknife.values):
        raise ValueError(
            f"subjects: {len(subjects)} names for {len(a.jackknife.values)} analysed rows")
    b = a.bootstrap
    bootstrap: dict[str, Any] = {"replicates": a.replicates, "seed": a.seed}
    if b is None:
        bootstrap.update({
            "bias": None, "standard_error": None,
            "intervals": dict.fromkeys(INTERVAL_METHODS),
            "monte_carlo": {"standard_error_of_standard_error": None,
                            "standard_error_of_bias": None},
            "histogram": {"edges": [], "counts": []},
            "finite_replicates": 0, "nonfinite_replicates": 0, "z0": None, "acceleration": None,
        })
    else:
        bootstrap.update({
            "bias": b.bias, "standard_error": b.standard_error,
            "intervals": {m: _interval_json(getattr(b.intervals, m)) for m in INTERVAL_METHODS},
            "monte_carlo": {
                "standard_error_of_standard_error":
                    b.monte_carlo.standard_error_of_standard_error,
                "standard_error_of_bias": b.monte_carlo.standard_error_of_bias,
                "min_replicates_omitting_subject": b.monte_carlo.min_replicates_omitting_subject,
            },
            "histogram": {"edges": list(b.histogram.edges), "counts": list(b.histogram.counts)},
            "finite_replicates": b.finite_replicates,
            "nonfinite_replicates": b.nonfinite_replicates,
            "z0": b.z0, "acceleration": b.acceleration,
        })
    e, j, f, acc = a.estimate, a.jackknife, a.fieller, a.acceptance
    return {
        "estimate": {"theta": e.theta, "numerator_mean": e.numerator_mean,
                     "denominator_mean": e.denominator_mean},
        "jackknife": {
            "bias": j.bias, "standard_error": j.standard_error, "bias_corrected": j.bias_corrected,
            "values": [{"subject": s, "theta": v} for s, v in zip(subjects, j.values, strict=True)],
        },
        "bootstrap": bootstrap,
        "fieller": {"kind": f.kind, "lower": f.lower, "upper": f.upper},
        "acceptance": {
            "limits": {"lower": acc.limits[0], "upper": acc.limits[1]},
            "interval": acc.interval, "confidence_level": acc.confidence_level,
            "lower": acc.lower, "upper": acc.upper, "verdict": acc.verdict, "reason": acc.reason,
        },
        "per_subject": [
            {"subject": s, "numerator_difference": y, "denominator_difference": z}
            for s, y, z in zip(subjects, a.numerator_differences, a.denominator_differences,
                               strict=True)
        ],
        "diagnostics": [{"code": d.code, "message": d.message} for d in a.diagnostics],
    }
