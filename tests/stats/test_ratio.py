from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.typing import NDArray
from scipy import stats

from service.stats.ratio import analyse_ratio, fieller_interval, ratio_analysis_to_json

FloatArray = NDArray[np.float64]


def _study(n: int, seed: int, centres: tuple[float, ...] = (53.0, 50.0, 20.0),
           spread: float = 5.0) -> FloatArray:
    return np.random.default_rng(seed).normal(centres, spread, size=(n, len(centres)))


def _analyse(values: FloatArray, **overrides: object) -> object:
    options: dict[str, object] = {"replicates": 2_000, "seed": 17, "confidence_level": 0.9,
                                  "interval": "bca", "limits": (-0.2, 0.2)}
    options.update(overrides)
    return analyse_ratio(values, **options)  # type: ignore[arg-type]


def _json(values: FloatArray, **overrides: object) -> dict[str, object]:
    analysis = _analyse(values, **overrides)
    names = [f"P{i:02d}" for i in range(values.shape[0])]
    out = ratio_analysis_to_json(analysis, names)  # type: ignore[arg-type]
    json.dumps(out, allow_nan=False)  # raises on NaN or infinity anywhere
    return out


def _brute_force_fieller(y: FloatArray, z: FloatArray, grid: FloatArray) -> NDArray[np.bool_]:
    """{θ : |t(θ)| ≤ t_crit} with t(θ) = mean(y − θz)/(sd(y − θz)/√n)."""
    n = y.size
    d = y[None, :] - grid[:, None] * z[None, :]
    t = d.mean(axis=1) / (d.std(axis=1, ddof=1) / math.sqrt(n))
    return np.asarray(np.abs(t) <= stats.t.ppf(0.95, n - 1))


@pytest.mark.parametrize(("kind", "y_mean", "z_mean"), [
    ("bounded", 2.0, 20.0), ("exclusive", 6.0, 0.4), ("unbounded", 0.1, 0.2)])
def test_fieller_matches_inverted_paired_t_test(kind: str, y_mean: float, z_mean: float) -> None:
    """Source: the Fieller set is the inversion of the paired t-test of mean(y − θz) = 0
    (Fieller 1954, JRSS-B 16:175–185); checked on a fine grid against scipy.stats.t."""
    rng = np.random.default_rng({"bounded": 1, "exclusive": 2, "unbounded": 3}[kind])
    y = rng.normal(y_mean, 3.0, 20)
    z = rng.normal(z_mean, 3.0, 20)
    z += z_mean - z.mean()  # pin the sample means so the case is the one named
    y += y_mean - y.mean()
    out = fieller_interval(y, z, 0.9)
    assert out.kind == kind
    grid = np.linspace(-60.0, 60.0, 240_001)
    inside = _brute_force_fieller(y, z, grid)
    if kind == "bounded":
        assert out.lower is not None and out.upper is not None
        claimed = (grid >= out.lower) & (grid <= out.upper)
    elif kind == "exclusive":
        assert out.lower is not None and out.upper is not None and out.lower < out.upper
        claimed = (grid <= out.lower) | (grid >= out.upper)
    else:
        assert out.lower is None and out.upper is None
        claimed = np.ones_like(grid, dtype=bool)
    step = grid[1] - grid[0]
    edges = [v for v in (out.lower, out.upper) if v is not None]
    far = np.ones_like(grid, dtype=bool)
    for e in edges:
        far &= np.abs(grid - e) > 2 * step
    np.testing.assert_array_equal(inside[far], claimed[far])


def test_theta_definition_without_and_with_baseline() -> None:
    """Worked formula (DESIGN.md): θ = (T̄ − R̄)/(R̄ − B̄), or (T̄ − R̄)/R̄ without a baseline."""
    v = _study(14, 4)
    m = v.mean(axis=0)
    with_b = _analyse(v).estimate.theta  # type: ignore[attr-defined]
    without = _analyse(v[:, :2]).estimate.theta  # type: ignore[attr-defined]
    assert with_b == pytest.approx((m[0] - m[1]) / (m[1] - m[2]), rel=1e-12)
    assert without == pytest.approx((m[0] - m[1]) / m[1], rel=1e-12)


@settings(max_examples=10, deadline=None)
@given(scale=st.floats(min_value=1e-3, max_value=1e3), seed=st.integers(0, 10_000))
def test_whole_analysis_is_scale_free(scale: float, seed: int) -> None:
    """Published property: θ is a ratio of differences of means, so multiplying every value by
    c > 0 changes no estimate, interval or verdict (resampled subjects do not depend on values)."""
    v = _study(13, seed)
    a = _json(v)
    b = _json(v * scale)
    for path in (("estimate", "theta"), ("jackknife", "standard_error"),
                 ("bootstrap", "standard_error"), ("fieller", "lower"), ("acceptance", "upper")):
        x, y = a[path[0]][path[1]], b[path[0]][path[1]]  # type: ignore[index]
        assert y == pytest.approx(x, rel=1e-8)
    assert a["acceptance"]["verdict"] == b["acceptance"]["verdict"]  # type: ignore[index]


@settings(max_examples=10, deadline=None)
@given(seed=st.integers(0, 10_000))
def test_row_order_leaves_theta_and_jackknife_se(seed: int) -> None:
    """Published property (Efron & Tibshirani 1993 §11.2): the plug-in estimate and jackknife SE
    are symmetric functions of the subjects."""
    v = _study(12, seed)
    shuffled = v[np.random.default_rng(seed).permutation(12)]
    a, b = _analyse(v, replicates=50), _analyse(shuffled, replicates=50)
    assert b.estimate.theta == pytest.approx(a.estimate.theta, rel=1e-12)  # type: ignore[attr-defined]
    assert b.jackknife.standard_error == pytest.approx(  # type: ignore[attr-defined]
        a.jackknife.standard_error, rel=1e-10)  # type: ignore[attr-defined]


def test_identical_subjects_fall_back_without_nan() -> None:
    """Common practice (Efron 1987 §6): the acceleration is 0/0 when every jackknife value is
    equal; the BCa interval falls back to a = 0 and the result says so."""
    v = np.tile([55.0, 50.0, 25.0], (14, 1))
    out = _json(v)
    codes = {d["code"] for d in out["diagnostics"]}  # type: ignore[union-attr, index]
    assert "acceleration_undefined" in codes
    assert out["bootstrap"]["acceleration"] == 0.0  # type: ignore[index]
    # (55 − 50)/(50 − 25) by the θ formula of DESIGN.md
    assert out["estimate"]["theta"] == pytest.approx(0.2)  # type: ignore[index]


def test_zero_denominator_mean_is_undetermined() -> None:
    """Common practice: θ is undefined when the denominator mean is exactly 0; no verdict."""
    r = np.array([-2.0, 2.0, -1.0, 1.0, -3.0, 3.0, -0.5, 0.5, -4.0, 4.0, -1.5, 1.5])
    v = np.column_stack([r + 1.0, r])
    out = _json(v)
    assert out["estimate"]["theta"] is None  # type: ignore[index]
    assert out["acceptance"]["verdict"] == "undetermined"  # type: ignore[index]
    codes = {d["code"] for d in out["diagnostics"]}  # type: ignore[union-attr, index]
    assert "theta_undefined" in codes


def test_two_subjects_finite_output() -> None:
    """Common practice: the smallest analysable table still gives finite JSON with warnings."""
    out = _json(_study(2, 9))
    codes = {d["code"] for d in out["diagnostics"]}  # type: ignore[union-attr, index]
    assert "few_subjects" in codes
    assert len(out["jackknife"]["values"]) == 2  # type: ignore[index, arg-type]


def test_acceptance_against_limits() -> None:
    """Worked rule (DESIGN.md, ±0.20 from memory): within_limits iff the chosen interval lies
    wholly inside the limits."""
    v = _study(30, 5, centres=(50.5, 50.0, 20.0), spread=2.0)
    ok = _json(v, interval="percentile")
    ci = ok["bootstrap"]["intervals"]["percentile"]  # type: ignore[index]
    assert ok["acceptance"]["verdict"] == "within_limits"  # type: ignore[index]
    assert -0.2 <= ci["lower"] and ci["upper"] <= 0.2
    narrow = _json(v, interval="percentile", limits=(ci["lower"] + 1e-9, 0.2))
    assert narrow["acceptance"]["verdict"] == "not_within_limits"  # type: ignore[index]


def test_bad_arguments_are_named() -> None:
    """Common practice: bad input gets one error naming every offending field."""
    with pytest.raises(ValueError, match="interval.*confidence_level|confidence_level.*interval"):
        _analyse(_study(12, 1), interval="median", confidence_level=1.5)
    bad = _study(12, 1)
    bad[3, 1] = np.nan
    with pytest.raises(ValueError, match=r"rows \[3\]"):
        _analyse(bad)


def test_nonfinite_replicates_are_counted() -> None:
    """Worked count: per-subject denominators (−1.25, −1, 1, 1); a replicate's denominator sum
    −1.25c0 − c1 + c2 + c3 is exactly 0 only for c0 = 0, c1 = 2, so with probability
    C(4,2)·2²/4⁴ = 3/32. Those replicates are left out and counted (binomial 5-sigma band)."""
    r = np.array([-1.0, -1.0, 1.0, 1.0])
    v = np.column_stack([r + 0.5, r, np.zeros(4)])
    v[0, 2] = 0.25  # subject 0 denominator −1.25; the full-sample mean is −0.0625
    out = _analyse(v, replicates=20_000)
    boot = out.bootstrap  # type: ignore[attr-defined]
    p = 3 / 32
    band = 5 * math.sqrt(p * (1 - p) / 20_000)
    assert boot.nonfinite_replicates / 20_000 == pytest.approx(p, abs=band)
    assert boot.finite_replicates + boot.nonfinite_replicates == 20_000
    codes = {d.code for d in out.diagnostics}  # type: ignore[attr-defined]
    assert "nonfinite_replicates" in codes


def test_json_carries_every_contract_path() -> None:
    """Source: DESIGN.md §Record, the public `ratio_of_mean_differences` paths (rename or move
    none); intervals are {lower, upper} objects and every number is a finite plain float."""
    out = _json(_study(16, 2), replicates=500)
    assert set(out["estimate"]) == {"theta", "numerator_mean", "denominator_mean"}  # type: ignore[arg-type]
    jack = out["jackknife"]
    assert {"bias", "standard_error", "bias_corrected", "values"} <= set(jack)  # type: ignore[arg-type]
    assert jack["values"][0]["subject"] == "P00"  # type: ignore[index]
    boot = out["bootstrap"]
    assert {"replicates", "seed", "bias", "standard_error", "intervals", "monte_carlo",
            "histogram"} <= set(boot)  # type: ignore[arg-type]
    assert set(boot["intervals"]) == {"percentile", "basic", "normal", "bca"}  # type: ignore[index]
    assert set(boot["intervals"]["bca"]) == {"lower", "upper"}  # type: ignore[index]
    assert {"standard_error_of_standard_error", "standard_error_of_bias"} <= set(
        boot["monte_carlo"])  # type: ignore[index]
    hist = boot["histogram"]  # type: ignore[index]
    assert sum(hist["counts"]) == 500 and len(hist["edges"]) == len(hist["counts"]) + 1
    assert set(out["fieller"]) == {"kind", "lower", "upper"}  # type: ignore[arg-type]
    assert {"limits", "interval", "confidence_level", "lower", "upper", "verdict",
            "reason"} <= set(out["acceptance"])  # type: ignore[arg-type]
    assert out["acceptance"]["limits"] == {"lower": -0.2, "upper": 0.2}  # type: ignore[index]
