"""The compiled bootstrap loops against plain numpy computations of the same definitions."""

from __future__ import annotations

import numpy as np
import pytest

from service.stats import kernels


@pytest.mark.parametrize(("n", "k"), [(1, 1), (7, 2), (24, 3), (25, 3), (40, 5)])
def test_resampled_means_equal_numpy_gather(n: int, k: int) -> None:
    """Definition of a bootstrap sample mean (Efron & Tibshirani 1993 ch. 6): the column means of
    the drawn rows, here by numpy fancy indexing."""
    rng = np.random.default_rng(n * 10 + k)
    data = rng.normal(size=(n, k))
    index = rng.integers(0, n, size=(50, n)).astype(np.uint32)
    expected = data[index].mean(axis=1)
    np.testing.assert_allclose(kernels.resampled_means(index, data), expected, rtol=1e-13,
                               atol=1e-13)


def test_omission_sums_equal_brute_force() -> None:
    """Jackknife-after-bootstrap sums (Efron 1992 §3): for subject i, the count, sum and sum of
    squares of θ*−θ̂ over the finite replicates whose sample does not contain i; computed here with
    an explicit numpy mask."""
    rng = np.random.default_rng(4)
    n, c = 9, 300
    index = rng.integers(0, n, size=(c, n)).astype(np.uint32)
    centred = rng.normal(size=c)
    finite = rng.random(c) > 0.1
    omitted = np.zeros((3, n))
    kernels.add_omission_sums(index, finite, centred, omitted)
    present = np.zeros((c, n), dtype=bool)
    np.put_along_axis(present, index.astype(np.intp), True, axis=1)
    absent = (~present) & finite[:, None]
    np.testing.assert_array_equal(omitted[0], absent.sum(0))
    np.testing.assert_allclose(omitted[1], (absent * centred[:, None]).sum(0), rtol=1e-12)
    np.testing.assert_allclose(omitted[2], (absent * centred[:, None] ** 2).sum(0), rtol=1e-12)
