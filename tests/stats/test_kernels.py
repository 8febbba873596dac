"""The compiled bootstrap loops against plain numpy computations of the same definitions."""

from __future__ import annotations

import numpy as np
import pytest

from service.stats import kernels


@pytest.mark.parametrize(("n", "k"), [(1, 1), (7, 2), (24, 3), (25, 3), (40, 5), (64, 3), (130, 4)])
def test_resampled_means_equal_numpy_gather(n: int, k: int) -> None:
    """Definition of a bootstrap sample mean (Efron & Tibshirani 1993 ch. 6): the column means of
    the drawn rows, here by numpy fancy indexing of the draws the kernel reports."""
    data = np.random.default_rng(n * 10 + k).normal(size=(n, k))
    means, _, index = kernels.SubjectDraws(n + k, data).draw(50, keep_index=True)
    np.testing.assert_allclose(means, data[index].mean(axis=1), rtol=1e-13, atol=1e-13)


def test_stratified_draws_stay_in_their_strata_and_are_uniform() -> None:
    """Stratified bootstrap (Efron & Tibshirani 1993 §6.5 — from memory): each replicate draws, per
    stratum, as many of its members as it has; within a stratum the draws fit the uniform
    distribution (Pearson's chi-square, scipy.stats.chisquare)."""
    from scipy import stats

    strata = np.array([2, 0, 1, 0, 2, 2, 1, 0, 0, 2, 1], dtype=np.int64)
    data = np.zeros((strata.size, 1))
    _, _, index = kernels.SubjectDraws(9, data, strata).draw(20_000, keep_index=True)
    start = 0
    for code in (0, 1, 2):
        members = np.flatnonzero(strata == code)
        block = index[:, start : start + members.size]
        assert set(np.unique(block)) == set(members.tolist())
        counts = np.bincount(block.ravel(), minlength=strata.size)[members]
        assert stats.chisquare(counts).pvalue > 1e-3
        start += members.size


def _xoshiro256ss_reference(state: list[int], count: int) -> list[int]:
    """xoshiro256** written from the published algorithm (Blackman & Vigna 2021, ACM TOMS 47:36,
    reference C code `xoshiro256starstar.c`), in plain Python integers."""
    mask = (1 << 64) - 1

    def rotl(x: int, k: int) -> int:
        return ((x << k) | (x >> (64 - k))) & mask

    s = list(state)
    out = []
    for _ in range(count):
        out.append(rotl((s[1] * 5) & mask, 7) * 9 & mask)
        t = (s[1] << 17) & mask
        s[2] ^= s[0]
        s[3] ^= s[1]
        s[1] ^= s[2]
        s[0] ^= s[3]
        s[2] ^= t
        s[3] = rotl(s[3], 45)
    return out


@pytest.mark.parametrize("n", [3, 24, 200])
def test_subject_draws_follow_xoshiro_and_lemire_exactly(n: int) -> None:
    """The draws equal an independent Python rendering of xoshiro256** (two 32-bit lanes per output,
    low first) mapped by Lemire's method (Lemire 2019, ACM TOMACS 29:3): high word of x·n, rejecting
    lanes whose low word is below 2³² mod n; means equal numpy's mean of the drawn rows."""
    child = np.random.SeedSequence(77).spawn(1)[0]
    state = [int(v) for v in child.generate_state(4, dtype=np.uint64)]
    data = np.random.default_rng(1).normal(size=(n, 3))
    means, _, index = kernels.SubjectDraws(77, data).draw(5, keep_index=True)
    lanes = []
    for word in _xoshiro256ss_reference(state, 5 * n + 10):
        lanes += [word & 0xFFFFFFFF, word >> 32]
    threshold = (1 << 32) % n
    expected = [(x * n) >> 32 for x in lanes if (x * n) & 0xFFFFFFFF >= threshold][: 5 * n]
    assert index.ravel().tolist() == expected
    np.testing.assert_allclose(means, data[index].mean(axis=1), rtol=1e-13, atol=1e-13)


def test_subject_draws_do_not_depend_on_chunking() -> None:
    """Chunk invariance (DESIGN.md: chunk size must not change any number): 7 + 10 + 1 replicates
    drawn in pieces equal 18 drawn at once, bit for bit."""
    data = np.random.default_rng(2).normal(size=(13, 3))
    whole = kernels.SubjectDraws(5, data).draw(18, keep_index=True)
    draws = kernels.SubjectDraws(5, data)
    pieces = [draws.draw(c, keep_index=True) for c in (7, 10, 1)]
    for part in range(3):
        np.testing.assert_array_equal(whole[part], np.concatenate([p[part] for p in pieces]))


def test_subject_draws_are_uniform() -> None:
    """Pearson's chi-square goodness of fit (scipy.stats.chisquare) of 700,000 draws over 7 subjects
    to the uniform distribution; a fixed seed, so the test is deterministic."""
    from scipy import stats

    data = np.zeros((7, 1))
    _, _, index = kernels.SubjectDraws(3, data).draw(100_000, keep_index=True)
    counts = np.bincount(index.ravel(), minlength=7)
    assert stats.chisquare(counts).pvalue > 1e-3


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_sorted_histogram_equals_numpy_histogram(seed: int) -> None:
    """numpy.histogram (equal-width bins, last bin closed) on data with ties and values on edges."""
    from service.stats.resampling import sorted_histogram

    rng = np.random.default_rng(seed)
    x = np.round(rng.normal(size=5000), 2)
    x = np.concatenate([x, np.linspace(x.min(), x.max(), 41)])  # values exactly on the edges
    counts, edges = sorted_histogram(np.sort(x), 40)
    expected_counts, expected_edges = np.histogram(x, bins=40)
    np.testing.assert_array_equal(edges, expected_edges)
    np.testing.assert_array_equal(counts, expected_counts)
    counts, edges = sorted_histogram(np.full(7, 3.0), 4)
    expected_counts, expected_edges = np.histogram(np.full(7, 3.0), bins=4)
    np.testing.assert_array_equal(counts, expected_counts)
    np.testing.assert_array_equal(edges, expected_edges)


@pytest.mark.parametrize("n", [5, 64, 65, 150])
def test_drawn_presence_and_omission_sums_match_the_draws(n: int) -> None:
    """Presence (bitsets up to 64 subjects, bytes beyond) marks exactly the drawn subjects, and the
    jackknife-after-bootstrap sums (Efron 1992 §3) from it equal an explicit numpy mask."""
    data = np.random.default_rng(n).normal(size=(n, 3))
    _, present, index = kernels.SubjectDraws(n, data).draw(
        200, keep_index=True)
    mask = np.zeros((200, n), dtype=bool)
    np.put_along_axis(mask, index, True, axis=1)
    if n <= 64:
        decoded = (present[:, :1] >> np.arange(n, dtype=np.uint64)) & np.uint64(1)
        np.testing.assert_array_equal(decoded.astype(bool), mask)
    else:
        np.testing.assert_array_equal(present.astype(bool), mask)
    centred = np.random.default_rng(0).normal(size=200)
    finite = np.arange(200) % 7 != 0
    omitted = np.zeros((3, n))
    kernels.add_omission_sums(present, n, finite, centred, omitted)
    absent = ~mask & finite[:, None]
    np.testing.assert_array_equal(omitted[0], absent.sum(0))
    np.testing.assert_allclose(omitted[1], (absent * centred[:, None]).sum(0), rtol=1e-12,
                               atol=1e-12)
    np.testing.assert_allclose(omitted[2], (absent * centred[:, None] ** 2).sum(0), rtol=1e-12)


@pytest.mark.parametrize("size", [1, 2, 3, 10, 999, 10_000])
def test_sorted_quantiles_equal_numpy_quantile_bit_for_bit(size: int) -> None:
    """numpy.quantile(method="linear") (Hyndman & Fan 1996 type 7) on the same sorted data."""
    from service.stats.intervals import sorted_quantiles

    rng = np.random.default_rng(size)
    x = np.sort(np.round(rng.normal(size=size), 3))
    levels = np.concatenate([rng.random(200), [0.0, 1.0, 0.05, 0.95, 0.5, 1e-9, 1 - 1e-9]])
    np.testing.assert_array_equal(sorted_quantiles(x, levels),
                                  np.quantile(x, levels, method="linear"))
