"""The bootstrap loops, compiled and plain numpy alike, against plain numpy computations of the
same definitions and an independent rendering of the published generator."""

from __future__ import annotations

import numpy as np
import pytest

from service.stats import kernels


@pytest.fixture(params=[False, True], ids=["plain", "compiled"])
def compiled(request: pytest.FixtureRequest) -> bool:
    """Every check below holds for both sets of loops (kernels.py)."""
    return bool(request.param)


@pytest.mark.parametrize(("n", "k"), [(1, 1), (7, 2), (24, 3), (25, 3), (40, 5), (64, 3), (130, 4)])
def test_resampled_means_equal_numpy_gather(n: int, k: int, compiled: bool) -> None:
    """Definition of a bootstrap sample mean (Efron & Tibshirani 1993 ch. 6): the column means of
    the drawn rows, here by numpy fancy indexing of the draws the kernel reports."""
    data = np.random.default_rng(n * 10 + k).normal(size=(n, k))
    draws = kernels.SubjectDraws(n + k, data, compiled=compiled)
    means, _, index = draws.draw(50, keep_index=True)
    np.testing.assert_allclose(means, data[index].mean(axis=1), rtol=1e-13, atol=1e-13)


def test_stratified_draws_stay_in_their_strata_and_are_uniform(compiled: bool) -> None:
    """Stratified bootstrap (Efron & Tibshirani 1993 §6.5 — from memory): each replicate draws, per
    stratum, as many of its members as it has; within a stratum the draws fit the uniform
    distribution (Pearson's chi-square, scipy.stats.chisquare)."""
    from scipy import stats

    strata = np.array([2, 0, 1, 0, 2, 2, 1, 0, 0, 2, 1], dtype=np.int64)
    data = np.zeros((strata.size, 1))
    draws = kernels.SubjectDraws(9, data, strata, compiled=compiled)
    _, _, index = draws.draw(20_000, keep_index=True)
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
def test_subject_draws_follow_xoshiro_and_lemire_exactly(n: int, compiled: bool) -> None:
    """The draws equal an independent Python rendering of xoshiro256** (two 32-bit lanes per output,
    low first) mapped by Lemire's method (Lemire 2019, ACM TOMACS 29:3): high word of x·n, rejecting
    lanes whose low word is below 2³² mod n; means equal numpy's mean of the drawn rows."""
    child = np.random.SeedSequence(77).spawn(1)[0]
    state = [int(v) for v in child.generate_state(4, dtype=np.uint64)]
    data = np.random.default_rng(1).normal(size=(n, 3))
    means, _, index = kernels.SubjectDraws(77, data, compiled=compiled).draw(5, keep_index=True)
    lanes = []
    for word in _xoshiro256ss_reference(state, 5 * n + 10):
        lanes += [word & 0xFFFFFFFF, word >> 32]
    threshold = (1 << 32) % n
    expected = [(x * n) >> 32 for x in lanes if (x * n) & 0xFFFFFFFF >= threshold][: 5 * n]
    assert index.ravel().tolist() == expected
    np.testing.assert_allclose(means, data[index].mean(axis=1), rtol=1e-13, atol=1e-13)


def test_subject_draws_do_not_depend_on_chunking(compiled: bool) -> None:
    """Chunk invariance (DESIGN.md: chunk size must not change any number): 7 + 10 + 1 replicates
    drawn in pieces equal 18 drawn at once, bit for bit."""
    data = np.random.default_rng(2).normal(size=(13, 3))
    whole = kernels.SubjectDraws(5, data, compiled=compiled).draw(18, keep_index=True)
    draws = kernels.SubjectDraws(5, data, compiled=compiled)
    pieces = [draws.draw(c, keep_index=True) for c in (7, 10, 1)]
    for part in range(3):
        np.testing.assert_array_equal(whole[part], np.concatenate([p[part] for p in pieces]))


def test_subject_draws_are_uniform(compiled: bool) -> None:
    """Pearson's chi-square goodness of fit (scipy.stats.chisquare) of 700,000 draws over 7 subjects
    to the uniform distribution; a fixed seed, so the test is deterministic."""
    from scipy import stats

    data = np.zeros((7, 1))
    draws = kernels.SubjectDraws(3, data, compiled=compiled)
    _, _, index = draws.draw(100_000, keep_index=True)
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
def test_drawn_presence_and_omission_sums_match_the_draws(n: int, compiled: bool) -> None:
    """Presence (bitsets up to 64 subjects, bytes beyond) marks exactly the drawn subjects, and the
    jackknife-after-bootstrap sums (Efron 1992 §3) from it equal an explicit numpy mask."""
    data = np.random.default_rng(n).normal(size=(n, 3))
    _, present, index = kernels.SubjectDraws(n, data, compiled=compiled).draw(
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
    kernels.add_omission_sums(present, n, finite, centred, omitted, compiled=compiled)
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


def _lanes_from(state6: np.ndarray, count: int) -> list[int]:
    """The next ``count`` 32-bit lanes of a six-word stream state (s0..s3, spare, spare unused),
    two per output of the reference generator above, low half first."""
    lanes = [int(state6[4])] if state6[5] else []
    for word in _xoshiro256ss_reference([int(v) for v in state6[:4]], count // 2 + 1):
        lanes += [word & 0xFFFFFFFF, word >> 32]
    return lanes[:count]


@pytest.mark.parametrize("seed", [0, 41])
def test_jump_to_any_lane_equals_stepping(seed: int) -> None:
    """xoshiro256** is linear over GF(2) (Blackman & Vigna 2021 §3), so the state m outputs on is
    J^m·state: the state streams.at_lane jumps to must produce the same lanes as stepping the
    published algorithm (the Python reference above) there, at even and odd lanes and from a
    state holding a spare half."""
    from service.stats import streams

    table = streams.jump_table()
    start = np.zeros(6, dtype=np.uint64)
    start[:4] = np.random.SeedSequence(seed).generate_state(4, dtype=np.uint64)
    reference = _lanes_from(start, 4200)
    here = np.empty(6, dtype=np.uint64)
    onward = np.empty(6, dtype=np.uint64)
    for lanes in [*range(12), 255, 256, 1023, 1024, 1025, 4000, 4001]:
        streams.at_lane(table, start, lanes, here)
        assert _lanes_from(here, 16) == reference[lanes : lanes + 16], lanes
        streams.at_lane(table, here, 7, onward)  # from wherever `here` stands, spare or not
        assert _lanes_from(onward, 8) == reference[lanes + 7 : lanes + 15], lanes


def test_jump_table_matches_published_jump_polynomials() -> None:
    """Blackman & Vigna's reference code for xoshiro256** (the jump() and long_jump() functions,
    constants recalled from memory) advances the state by 2¹²⁸ and 2¹⁹² outputs by XOR-ing the
    states at the set bits of a jump polynomial; the tabulated powers J^(2¹²⁸), J^(2¹⁹²) must do
    the same."""
    from service.stats import streams

    jumps = {
        128: [0x180EC6D33CFD0ABA, 0xD5A61266F0C9392C, 0xA9582618E03FC9AA, 0x39ABDC4529B1661C],
        192: [0x76E15D3EFEFDCBBF, 0xC5004E441C522FB3, 0x77710069854EE241, 0x39109BB02ACBE635],
    }
    mask = (1 << 64) - 1
    state = [int(v) for v in np.random.SeedSequence(8).generate_state(4, dtype=np.uint64)]
    table = streams.jump_table(193)
    for power, polynomial in jumps.items():
        s, acc = list(state), [0, 0, 0, 0]
        for word in polynomial:
            for bit in range(64):
                if word >> bit & 1:
                    acc = [a ^ x for a, x in zip(acc, s, strict=True)]
                t = (s[1] << 17) & mask  # one step of the generator, output aside
                s[2] ^= s[0]
                s[3] ^= s[1]
                s[1] ^= s[2]
                s[0] ^= s[3]
                s[2] ^= t
                s[3] = ((s[3] << 45) | (s[3] >> 19)) & mask
        moved = np.array(state, dtype=np.uint64)
        streams._apply(table[power], moved)
        assert [int(v) for v in moved[:4]] == acc, power


def test_rejected_lanes_are_counted(compiled: bool) -> None:
    """Lemire 2019 (ACM TOMACS 29:3): a lane x is rejected when the low word of x·n is below
    2³² mod n. With n = 2¹⁷ − 1 (2³² mod n = 2¹⁵) rejections are common enough to count: the
    kernel's count and its draws equal those of the reference generator above."""
    n = 131_071
    data = np.zeros((n, 1))
    draws = kernels.SubjectDraws(12, data, compiled=compiled)
    start = draws.position()
    means, present, index = draws.buffers(2, keep_index=True)
    misses = np.zeros(1, dtype=np.int64)
    draws.draw_from(draws.position(), means, present, index, misses)
    lanes = _lanes_from(start[0], 2 * n + 64)
    threshold = (1 << 32) % n
    accepted = [i for i, x in enumerate(lanes) if (x * n) & 0xFFFFFFFF >= threshold][: 2 * n]
    assert misses[0] == accepted[-1] + 1 - 2 * n > 0
    assert index.ravel().tolist() == [(lanes[i] * n) >> 32 for i in accepted]


@pytest.mark.parametrize("n", [5, 64, 65, 150])
def test_omission_sums_by_subject_ranges_equal_one_pass(n: int, compiled: bool) -> None:
    """Common practice (floating-point sums depend on their order): the jackknife-after-bootstrap
    sums (Efron 1992 §3) added for a few subject ranges, as threads share them, equal the sums
    over all subjects at once bit for bit."""
    data = np.random.default_rng(n).normal(size=(n, 3))
    _, present, _ = kernels.SubjectDraws(n, data, compiled=compiled).draw(300)
    centred = np.random.default_rng(1).normal(size=300)
    finite = np.arange(300) % 5 != 0
    whole = np.zeros((3, n))
    kernels.add_omission_sums(present, n, finite, centred, whole, compiled=compiled)
    kernels.add_omission_sums(present, n, finite, centred[::-1].copy(), whole, compiled=compiled)
    parts = np.zeros((3, n))
    cuts = [0, 1, n // 3, n // 2 + 1, n]
    for first, stop in zip(cuts[:-1], cuts[1:], strict=True):
        kernels.add_omission_sums(present, n, finite, centred, parts, subjects=(first, stop),
                                  compiled=compiled)
    for first, stop in zip(cuts[:-1], cuts[1:], strict=True):
        kernels.add_omission_sums(present, n, finite, centred[::-1].copy(), parts,
                                  subjects=(first, stop), compiled=compiled)
    np.testing.assert_array_equal(parts, whole)
