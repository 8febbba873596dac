from __future__ import annotations

import dataclasses
import json
import math
import threading
import time

import numpy as np
import pytest
from astropy.stats import jackknife_stats
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.typing import NDArray
from scipy import stats
from scipy.special import ndtri

from service.stats import intervals as iv
from service.stats import kernels, waves
from service.stats import resampling as rs
from service.stats.deadlines import ComputeTimeExceeded
from service.stats.ratio import theta_of_means
from tests.stats import bootstrap_cases as bc

FloatArray = NDArray[np.float64]


def _study(n: int, seed: int, baseline: bool = True) -> FloatArray:
    rng = np.random.default_rng(seed)
    centres = [52.0, 50.0, 20.0] if baseline else [52.0, 50.0]
    return rng.normal(centres, 6.0, size=(n, len(centres)))


def _run(data: FloatArray, replicates: int, seed: int, level: float = 0.9,
         strata: NDArray[np.int64] | None = None, chunk_size: int | None = None,
         threads: int | None = None, deadline: float | None = None) -> rs.Bootstrap:
    theta = float(theta_of_means(data.mean(axis=0)))
    jack = rs.leave_one_out_values(data, theta_of_means)
    return rs.bootstrap(data, theta_of_means, theta_hat=theta, jackknife_values=jack,
                        replicates=replicates, seed=seed, confidence_level=level,
                        strata=strata, chunk_size=chunk_size, threads=threads,
                        deadline=deadline)


def test_jackknife_matches_astropy() -> None:
    """Source: astropy.stats.jackknife_stats (bias, standard error, bias-corrected estimate) on
    the same statistic written over row subsets."""
    data = _study(17, 3)
    theta = float(theta_of_means(data.mean(axis=0)))
    ours = rs.jackknife(data, theta_of_means, theta)

    def statistic(rows: FloatArray) -> float:
        # astropy resamples a 1-D array, so it resamples row numbers and we look the rows up.
        return float(theta_of_means(data[rows.astype(np.intp)].mean(axis=0)))

    estimate, bias, se, _ = jackknife_stats(np.arange(17, dtype=np.float64), statistic, 0.9)
    assert ours.bias is not None and ours.standard_error is not None
    assert ours.bias_corrected is not None
    assert ours.bias == pytest.approx(bias, abs=1e-10)
    assert ours.standard_error == pytest.approx(se, abs=1e-10)
    assert ours.bias_corrected == pytest.approx(estimate, abs=1e-10)


def test_jackknife_of_the_mean_is_s_over_root_n() -> None:
    """Published identity (Efron & Tibshirani 1993 §11.2): for the sample mean the jackknife SE
    equals s/√n exactly and the jackknife bias is 0."""
    x = np.random.default_rng(11).gamma(2.0, 3.0, size=(23, 1))
    theta = float(x.mean())
    jack = rs.jackknife(x, lambda m: m[..., 0], theta)
    assert jack.standard_error == pytest.approx(float(x.std(ddof=1)) / math.sqrt(23), rel=1e-12)
    assert jack.bias == pytest.approx(0.0, abs=1e-12)


def test_jackknife_corrects_plug_in_variance_to_unbiased() -> None:
    """Published identity (Quenouille 1956; Efron & Tibshirani 1993 §11.5): the bias-corrected
    jackknife of the plug-in variance mean(x²) − mean(x)² is the unbiased sample variance."""
    x = np.random.default_rng(12).normal(4.0, 2.0, size=19)
    data = np.column_stack([x, x * x])
    theta = float(data[:, 1].mean() - data[:, 0].mean() ** 2)
    jack = rs.jackknife(data, lambda m: m[..., 1] - m[..., 0] ** 2, theta)
    assert jack.bias_corrected == pytest.approx(float(x.var(ddof=1)), rel=1e-10)


def test_bootstrap_agrees_with_scipy() -> None:
    """Source: scipy.stats.bootstrap (paired=True, vectorized=True), same data, independent draws.
    Tolerance: with B = 40,000 the Monte-Carlo SE of a 5 %/95 % quantile is about
    sqrt(α(1−α)/B)/f(q) ≈ 0.0011/0.103·SE ≈ 0.01·SE, of the bootstrap SE about SE/√(2B) ≈ 0.004·SE;
    for two independent runs we allow 6 % of SE on endpoints and 2.5 % on the SE."""
    data = _study(25, 21)
    replicates = 40_000
    ours = _run(data, replicates, seed=5)

    def statistic(t: FloatArray, r: FloatArray, b: FloatArray, axis: int = -1) -> FloatArray:
        return theta_of_means(np.stack([t.mean(axis), r.mean(axis), b.mean(axis)], axis=-1))

    columns = (data[:, 0], data[:, 1], data[:, 2])
    assert ours.standard_error is not None
    se = ours.standard_error
    for method, mine in (("percentile", ours.intervals.percentile),
                         ("basic", ours.intervals.basic), ("bca", ours.intervals.bca)):
        ref = stats.bootstrap(columns, statistic, paired=True, vectorized=True, method=method,
                              n_resamples=replicates, confidence_level=0.9,
                              rng=np.random.default_rng(99))
        assert mine is not None
        assert mine.lower == pytest.approx(ref.confidence_interval.low, abs=0.06 * se)
        assert mine.upper == pytest.approx(ref.confidence_interval.high, abs=0.06 * se)
        assert se == pytest.approx(ref.standard_error, rel=0.025)


def test_bca_with_zero_corrections_is_percentile() -> None:
    """Published identity (Efron 1987 §2): with a = 0 and z0 = 0 the BCa levels are α and 1 − α,
    so the interval equals the percentile interval."""
    dist = np.random.default_rng(4).standard_t(5, size=5_001)
    bca = iv.bca_from_parts(dist, 0.0, 0.0, 0.9)
    pct = iv.percentile_interval(dist, 0.9)
    assert bca is not None
    assert (bca.lower, bca.upper) == pytest.approx((pct.lower, pct.upper), rel=1e-12)


def test_normal_interval_closed_form() -> None:
    """Worked formula (Efron & Tibshirani 1993 eq. 13.2, bias-corrected centre): (θ̂ − bias) ±
    z_{0.95}·SE with z_{0.95} = 1.6448536 (standard normal table, from memory)."""
    out = iv.normal_interval(0.1, 0.02, 0.05, 0.9)
    assert out.lower == pytest.approx(0.08 - 1.6448536 * 0.05, abs=1e-6)
    assert out.upper == pytest.approx(0.08 + 1.6448536 * 0.05, abs=1e-6)


def test_bca_levels_formula() -> None:
    """Worked formula (Efron 1987 eq. 2.3): α1 = Φ(z0 + (z0 + z_α)/(1 − a(z0 + z_α)))."""
    z0, a = 0.1, 0.05
    z = float(ndtri(0.05))
    expected = stats.norm.cdf(z0 + (z0 + z) / (1 - a * (z0 + z)))
    levels = iv.bca_levels(z0, a, 0.9)
    assert levels is not None
    assert levels[0] == pytest.approx(expected, rel=1e-12)


def test_same_seed_same_numbers_other_seed_other_numbers() -> None:
    """Common practice: a seeded analysis is reproducible, and the seed is what drives it."""
    data = _study(15, 1)
    a, b, c = _run(data, 3_000, 7), _run(data, 3_000, 7), _run(data, 3_000, 8)
    np.testing.assert_array_equal(a.distribution, b.distribution)
    assert not np.array_equal(a.distribution, c.distribution)


@settings(max_examples=15, deadline=None)
@given(chunk=st.integers(min_value=1, max_value=900), seed=st.integers(0, 2**32 - 1),
       n=st.integers(min_value=2, max_value=31))
def test_chunk_size_changes_no_number(chunk: int, seed: int, n: int) -> None:
    """Common practice (scipy.stats.bootstrap checks batch invariance the same way): the chunk
    size is a memory knob and must not change any result, bit for bit."""
    data = _study(n, seed % 1000)
    whole = _run(data, 777, seed)
    parts = _run(data, 777, seed, chunk_size=chunk)
    np.testing.assert_array_equal(whole.distribution, parts.distribution)
    assert whole.monte_carlo == parts.monte_carlo


def test_stratified_resampling_keeps_stratum_sizes() -> None:
    """Common practice (stratified bootstrap, Efron & Tibshirani 1993 §6.5 — from memory): each
    replicate draws within each stratum as many subjects as the stratum has. A column holding
    the stratum indicator has the same mean in every replicate exactly."""
    rng = np.random.default_rng(2)
    strata = np.array([0] * 7 + [1] * 5 + [2] * 8 + [3], dtype=np.int64)
    indicator = (strata == 1).astype(np.float64)
    data = np.column_stack([indicator, rng.normal(size=21)])
    out = rs.bootstrap(data, lambda m: m[..., 0], theta_hat=5 / 21,
                       jackknife_values=rs.leave_one_out_values(data, lambda m: m[..., 0]),
                       replicates=2_000, seed=3, confidence_level=0.9, strata=strata)
    np.testing.assert_allclose(out.distribution, 5 / 21, rtol=1e-12)
    free = rs.bootstrap(data, lambda m: m[..., 0], theta_hat=5 / 21,
                        jackknife_values=rs.leave_one_out_values(data, lambda m: m[..., 0]),
                        replicates=2_000, seed=3, confidence_level=0.9)
    assert free.standard_error is not None and free.standard_error > 0.01


def test_jackknife_after_bootstrap_error_of_mean_se() -> None:
    """Published approximation (Efron & Tibshirani 1993 eq. 19.7 — from memory): for the sample
    mean of normal data the SE of the bootstrap SE is about SE/√(2(n−1)) from sampling; the
    jackknife-after-bootstrap estimate should be of that order (factor 3 either way)."""
    x = np.random.default_rng(8).normal(size=(40, 1))
    out = rs.bootstrap(x, lambda m: m[..., 0], theta_hat=float(x.mean()),
                       jackknife_values=rs.leave_one_out_values(x, lambda m: m[..., 0]),
                       replicates=20_000, seed=1, confidence_level=0.9)
    se_se = out.monte_carlo.standard_error_of_standard_error
    assert out.standard_error is not None and se_se is not None
    expected = out.standard_error / math.sqrt(2 * 39)
    assert expected / 3 < se_se < 3 * expected
    assert out.monte_carlo.min_replicates_omitting_subject > 20_000 * 0.3


# The pinned outputs: every case with 1, 2, 3 and 7 threads, at several chunk sizes.
_CHUNKS = [None, 7, 1000, 1]


def _chunk_for(number: int, case: bc.Case) -> int | None:
    chunk = _CHUNKS[number % len(_CHUNKS)]
    return 13 if chunk == 1 and case.replicates > 5000 else chunk


@pytest.mark.parametrize("number", range(len(bc.CASES)), ids=[c.name for c in bc.CASES])
def test_archived_outputs_reproduce_on_any_number_of_threads(
    number: int, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Source: the outputs of the one-thread engine of commit 57d5843, pinned in
    bootstrap_outputs.json (SHA-256 of θ* in replicate order and of the jackknife-after-bootstrap
    omission sums, and every number of the result), so that archived records still reproduce.
    Any number of threads and any chunk size must give them bit for bit; the threads are used
    even for small cases here."""
    monkeypatch.setattr(waves, "MIN_BLOCK_DRAWS", 1)
    monkeypatch.setattr(kernels, "use_compiled", lambda draws: True)  # threads draw compiled
    stored = json.loads(bc.OUTPUTS.read_text())
    case = bc.CASES[number]
    for offset, threads in enumerate((1, 2, 3, 7)):
        chunk = _chunk_for(number + offset, case)
        pinned, _ = bc.run_case(case, chunk_size=chunk, threads=threads)
        assert json.loads(json.dumps(pinned)) == stored[case.name], (threads, chunk)


@pytest.mark.parametrize("number", range(len(bc.CASES)), ids=[c.name for c in bc.CASES])
def test_archived_outputs_reproduce_with_the_plain_numpy_loops(
    number: int, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Source: bootstrap_outputs.json (the one-thread compiled engine of commit 57d5843): the
    plain-numpy loops that short runs use (kernels.py) must give every pinned number bit for
    bit, in one chunk or several (threads are asked for, and not used: only compiled loops run on
    several)."""
    monkeypatch.setattr(kernels, "use_compiled", lambda draws: False)
    stored = json.loads(bc.OUTPUTS.read_text())
    case = bc.CASES[number]
    for chunk in (None, 997):
        pinned, _ = bc.run_case(case, chunk_size=chunk, threads=3)
        assert json.loads(json.dumps(pinned)) == stored[case.name], chunk


def test_archived_outputs_reproduce_with_default_threads() -> None:
    """Source: bootstrap_outputs.json (the one-thread engine of commit 57d5843), with the default
    thread count (every core this process may use) and default chunks."""
    stored = json.loads(bc.OUTPUTS.read_text())
    for case in bc.CASES:
        pinned, _ = bc.run_case(case)
        assert json.loads(json.dumps(pinned)) == stored[case.name], case.name


def _assert_identical(one: rs.Bootstrap, other: rs.Bootstrap) -> None:
    """Every field equal, the replicate values bit for bit and the Monte-Carlo errors included."""
    np.testing.assert_array_equal(one.distribution, other.distribution)
    for field in dataclasses.fields(rs.Bootstrap):
        if field.name != "distribution":
            assert getattr(one, field.name) == getattr(other, field.name), field.name


def _rejected_lanes(data: FloatArray, seed: int, replicates: int) -> int:
    draws = kernels.SubjectDraws(seed, data)
    means, present, index = draws.buffers(replicates)
    misses = np.zeros(1, dtype=np.int64)
    draws.draw_from(draws.position(), means, present, index, misses)
    return int(misses[0])


@settings(max_examples=12, deadline=None)
@given(threads=st.sampled_from([2, 3, 7]), chunk=st.integers(min_value=1, max_value=40),
       seed=st.integers(0, 2**32 - 1))
def test_blocks_after_rejected_lanes_start_in_the_right_place(
    threads: int, chunk: int, seed: int
) -> None:
    """Common practice (a parallel run must equal the serial one, bit for bit): with 2¹⁷ − 1
    subjects, 2³² mod n = 2¹⁵, so Lemire's method (Lemire 2019) rejects about one lane per
    replicate; blocks of a few replicates on several threads must still give the replicates and
    the omission sums of one thread."""
    n = 131_071
    data = np.random.default_rng(seed % 1000).normal([52.0, 50.0, 20.0], 6.0, size=(n, 3))
    assert _rejected_lanes(data, seed, 30) > 0
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(waves, "MIN_BLOCK_DRAWS", 1)
        patch.setattr(kernels, "use_compiled", lambda draws: True)  # threads draw compiled
        one = _run(data, 30, seed, threads=1)
        many = _run(data, 30, seed, threads=threads, chunk_size=chunk)
    _assert_identical(one, many)


@settings(max_examples=15, deadline=None)
@given(threads=st.sampled_from([2, 3, 7]), chunk=st.integers(min_value=1, max_value=600),
       seed=st.integers(0, 2**32 - 1), n=st.integers(min_value=2, max_value=150),
       strata=st.integers(min_value=0, max_value=4))
def test_thread_count_changes_no_number(
    threads: int, chunk: int, seed: int, n: int, strata: int
) -> None:
    """Common practice (as for the chunk size, scipy.stats.bootstrap's batch invariance): the
    number of threads only divides the work and must not change any result, bit for bit,
    stratified or not."""
    data = _study(n, seed % 1000)
    codes = None if strata == 0 else np.arange(n, dtype=np.int64) % (strata + 1)
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(waves, "MIN_BLOCK_DRAWS", 1)
        patch.setattr(kernels, "use_compiled", lambda draws: True)  # threads draw compiled
        one = _run(data, 1500, seed, strata=codes, threads=1)
        many = _run(data, 1500, seed, strata=codes, threads=threads, chunk_size=chunk)
    _assert_identical(one, many)


def test_deadline_stops_every_thread() -> None:
    """Common practice (a compute-time cap, service/stats/deadlines.py): a bootstrap that would
    run for many seconds on two threads stops soon after its deadline, raises
    ComputeTimeExceeded after whole waves, and leaves no drawing thread behind."""
    data = _study(200, 4)
    started = time.monotonic()
    with pytest.raises(ComputeTimeExceeded) as stopped:
        _run(data, 20_000_000, 1, threads=2, deadline=started + 0.3)
    late = time.monotonic() - (started + 0.3)
    assert 0 < stopped.value.done < 20_000_000
    assert stopped.value.done % (2 * rs.default_chunk_size(200)) == 0
    assert late < 5.0  # generous on a shared machine: a wave lasts milliseconds
    assert not [t for t in threading.enumerate() if t.name.startswith("bootstrap")]
    with pytest.raises(ComputeTimeExceeded) as at_once:
        _run(data, 1_000_000, 1, threads=2, deadline=time.monotonic() - 1.0)
    assert at_once.value.done == 0


@pytest.mark.parametrize("threads", [0, -2, 1.5, True])
def test_threads_must_be_a_positive_integer(threads: object) -> None:
    """Common practice (validate at the edge, name the field): a bad thread count is refused."""
    with pytest.raises(ValueError, match="threads"):
        _run(_study(10, 1), 100, 1, threads=threads)  # type: ignore[arg-type]
