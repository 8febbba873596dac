from __future__ import annotations

import itertools
import json

import numpy as np
import pytest
from numpy.typing import NDArray
from scipy import stats as sps

from service.stats.nonparametric import (
    hodges_lehmann_shift,
    shift_comparison_to_json,
    walsh_order_statistics,
)

FloatArray = NDArray[np.float64]


def brute_force_walsh(d: FloatArray) -> FloatArray:
    """All (d_i + d_j)/2 with i ≤ j, by enumeration, sorted."""
    return np.sort(np.array([(a + b) / 2.0 for a, b in
                             itertools.combinations_with_replacement(d.tolist(), 2)]))


def brute_force_signed_rank_cdf(n: int) -> FloatArray:
    """P(T+ ≤ t) by enumerating all 2^n sign patterns of the ranks 1..n (Wilcoxon 1945)."""
    ranks = np.arange(1, n + 1)
    signs = np.array(list(itertools.product((0, 1), repeat=n)))
    totals = signs @ ranks
    counts = np.bincount(totals, minlength=n * (n + 1) // 2 + 1)
    return np.cumsum(counts) / 2.0**n


def tmax_pairs(seed: int, n: int) -> tuple[FloatArray, FloatArray]:
    """Tmax-like values on a grid of sampling times (seeded, constructed): many ties and zeros."""
    rng = np.random.default_rng(seed)
    grid = np.array([0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 6.0])
    return grid[rng.integers(1, 7, n)], grid[rng.integers(0, 6, n)]


def gaps_around(walsh: FloatArray, value: float) -> tuple[float, float]:
    """Midpoints between ``value`` and the nearest distinct Walsh averages below and above it."""
    below = walsh[walsh < value].max()
    above = walsh[walsh > value].min()
    return (below + value) / 2.0, (value + above) / 2.0


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_shift_is_the_median_of_all_walsh_averages(seed: int) -> None:
    """Expected: the Hodges–Lehmann estimator's definition (Hodges & Lehmann 1963), the median of
    every pairwise Walsh average, enumerated directly; ties and zeros kept."""
    rng = np.random.default_rng(seed)
    n = 10 + seed                                               # odd and even counts of averages
    test, reference = rng.normal(2.0, 1.0, n), rng.normal(1.5, 1.0, n)
    d = test - reference
    assert hodges_lehmann_shift(test, reference).shift == pytest.approx(
        float(np.median(brute_force_walsh(d))), rel=1e-13)
    t_tied, r_tied = tmax_pairs(seed, 17)
    assert hodges_lehmann_shift(t_tied, r_tied).shift == pytest.approx(
        float(np.median(brute_force_walsh(t_tied - r_tied))), rel=1e-13)


@pytest.mark.parametrize(("n", "confidence"), [(7, 0.90), (10, 0.90), (12, 0.95)])
def test_exact_interval_matches_enumeration_and_scipy_wilcoxon(n: int, confidence: float) -> None:
    """Expected: the ranks from the signed-rank distribution enumerated over all 2^n sign patterns,
    and the interval equal to the shifts not rejected by scipy.stats.wilcoxon(method="exact")
    at α = 1 − confidence (test inversion; Hollander & Wolfe §3.3)."""
    rng = np.random.default_rng(100 + n)
    test, reference = rng.normal(3.0, 1.0, n), rng.normal(2.0, 1.0, n)
    d = test - reference
    c = hodges_lehmann_shift(test, reference, confidence_level=confidence)
    assert c.interval_method == "exact_signed_rank"
    cdf = brute_force_signed_rank_cdf(n)
    alpha = 1.0 - confidence
    k = int(np.sum(cdf <= alpha / 2.0))                          # largest k: P(T+ ≤ k − 1) ≤ α/2
    walsh = brute_force_walsh(d)
    assert (c.lower, c.upper) == (walsh[k - 1], walsh[walsh.size - k])
    assert c.achieved_confidence_level == pytest.approx(1.0 - 2.0 * cdf[k - 1], rel=1e-12)
    assert c.lower is not None and c.upper is not None
    for endpoint, outside_first in ((c.lower, True), (c.upper, False)):
        left, right = gaps_around(walsh, endpoint)
        outside, inside = (left, right) if outside_first else (right, left)
        assert sps.wilcoxon(d - outside, method="exact").pvalue <= alpha
        assert sps.wilcoxon(d - inside, method="exact").pvalue > alpha


@pytest.mark.parametrize(("seed", "n"), [(4, 24), (5, 40)])
def test_tied_interval_matches_scipy_normal_approximation(seed: int, n: int) -> None:
    """Expected: with tied differences, the interval equals the shifts not rejected by
    scipy.stats.wilcoxon(method="asymptotic", correction=True), which applies the same tie
    correction (test inversion, Hollander & Wolfe §3.3)."""
    test, reference = tmax_pairs(seed, n)
    d = test - reference
    c = hodges_lehmann_shift(test, reference, confidence_level=0.90)
    assert c.interval_method == "normal_signed_rank_tie_corrected"
    assert c.tied_differences and c.zero_differences == int(np.sum(d == 0))
    assert c.lower is not None and c.upper is not None and c.lower < c.upper
    walsh = brute_force_walsh(d)
    for endpoint, outside_first in ((c.lower, True), (c.upper, False)):
        left, right = gaps_around(walsh, endpoint)
        outside, inside = (left, right) if outside_first else (right, left)
        assert sps.wilcoxon(d - outside, method="asymptotic", correction=True).pvalue <= 0.10
        assert sps.wilcoxon(d - inside, method="asymptotic", correction=True).pvalue > 0.10


def test_large_samples_use_the_normal_approximation_consistently_with_scipy() -> None:
    """Expected: scipy.stats.wilcoxon(method="asymptotic", correction=True) inversion at n = 80,
    beyond the exact range (scipy's own switch is at n = 50); continuity-corrected, as here."""
    rng = np.random.default_rng(8)
    test, reference = rng.normal(1.0, 1.0, 80), rng.normal(0.8, 1.0, 80)
    d = test - reference
    c = hodges_lehmann_shift(test, reference)
    assert c.interval_method == "normal_signed_rank_tie_corrected" and not c.tied_differences
    assert c.lower is not None and c.upper is not None
    walsh = brute_force_walsh(d)
    for endpoint, outside_first in ((c.lower, True), (c.upper, False)):
        left, right = gaps_around(walsh, endpoint)
        outside, inside = (left, right) if outside_first else (right, left)
        assert sps.wilcoxon(d - outside, method="asymptotic", correction=True).pvalue <= 0.10
        assert sps.wilcoxon(d - inside, method="asymptotic", correction=True).pvalue > 0.10


@pytest.mark.parametrize("tied", [False, True])
def test_walsh_order_statistics_without_forming_all_averages(tied: bool) -> None:
    """Expected: brute-force enumeration and sorting of all Walsh averages; the selection path
    (forced with materialise_limit=0) must return the same order statistics exactly."""
    rng = np.random.default_rng(9)
    for n in (1, 2, 3, 17, 150):
        x = rng.integers(-4, 5, n) * 0.5 if tied else rng.normal(0.0, 2.0, n)
        walsh = brute_force_walsh(x)
        ranks = np.arange(1, walsh.size + 1)
        if walsh.size > 200:                                   # ends, middle and a seeded sample
            ranks = np.unique(np.concatenate([ranks[:3], ranks[-3:], ranks[walsh.size // 2 - 1:][:2],
                                              rng.choice(ranks, 60, replace=False)]))
        assert np.array_equal(walsh_order_statistics(x, ranks, materialise_limit=0), walsh[ranks - 1])
        assert np.array_equal(walsh_order_statistics(x, ranks), walsh[ranks - 1])


def test_limits_give_a_verdict_only_when_set() -> None:
    """Expected: the interval-inclusion rule (common practice): within when both bounds lie inside."""
    test, reference = tmax_pairs(6, 30)
    plain = hodges_lehmann_shift(test, reference)
    assert plain.verdict is None and plain.lower is not None and plain.upper is not None
    wide = hodges_lehmann_shift(test, reference, limits=(plain.lower, plain.upper))
    assert wide.verdict == "within_limits"
    narrow = hodges_lehmann_shift(test, reference, limits=(plain.lower + 0.01, plain.upper + 1.0))
    assert narrow.verdict == "not_within_limits"
    block = shift_comparison_to_json(wide)
    assert block["method"] == "hodges_lehmann" and block["pairs"] == 30
    assert block["limits"] == {"lower": plain.lower, "upper": plain.upper}


def test_too_few_pairs_give_null_interval_and_warning() -> None:
    """Expected: P(T+ = 0) = 2^-n (signed-rank distribution), so at 90 % no interval exists for
    n ≤ 4 (2^-4 > 0.05) and one exists for n = 5; no pairs at all gives a null shift."""
    rng = np.random.default_rng(10)
    four = hodges_lehmann_shift(rng.normal(size=4), rng.normal(size=4), limits=(-1.0, 1.0))
    assert four.lower is None and four.upper is None and four.shift is not None
    assert four.verdict == "undetermined"
    assert [d.code for d in four.diagnostics] == ["too_few_pairs_for_interval"]
    five = hodges_lehmann_shift(rng.normal(size=5), rng.normal(size=5))
    assert five.lower is not None and five.achieved_confidence_level == pytest.approx(1 - 2 / 32)
    none = hodges_lehmann_shift([], [])
    assert none.shift is None and [d.code for d in none.diagnostics] == ["no_pairs"]
    for c in (four, five, none):
        json.dumps(shift_comparison_to_json(c), allow_nan=False)


def test_bad_input_names_the_field() -> None:
    """Project rule: errors name the field and the problem."""
    with pytest.raises(ValueError, match=r"test: entries \[1\]"):
        hodges_lehmann_shift([1.0, float("nan")], [1.0, 2.0])
    with pytest.raises(ValueError, match="reference: has 1 entries"):
        hodges_lehmann_shift([1.0, 2.0], [1.0])
    with pytest.raises(ValueError, match="limits"):
        hodges_lehmann_shift([1.0, 2.0], [1.0, 2.0], limits=(1.0, -1.0))
    with pytest.raises(ValueError, match="confidence_level"):
        hodges_lehmann_shift([1.0, 2.0], [1.0, 2.0], confidence_level=1.5)
