"""Least squares of a within-subject linear model with the subject effects absorbed.

Model: y = S·α + Z·β + e, where S holds one indicator column per subject and Z the indicator
columns of the other factors (period, treatment), every level kept. By the Frisch–Waugh–Lovell
theorem (Frisch & Waugh 1933, Econometrica 1:387–401; Lovell 1963, JASA 58:993–1010) the
estimates of β and the residuals are those of the regression of M_S·y on M_S·Z, where
M_S = I − S(S'S)⁻¹S' subtracts from each observation its subject's mean. The intercept and any
factor nested in subjects (sequence) lie in the column space of S and are absorbed with it.
Because M_S·Z is orthogonal to S, rank[S Z] = n_subjects + rank(M_S·Z), so the residual degrees
of freedom are n_observations − n_subjects − rank(M_S·Z).

Work and memory grow linearly in the number of observations: the sweep is a few bincounts and
the reduced design has one column per level of the non-subject factors.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]
IndexArray = NDArray[np.intp]

# Singular values below this fraction of the largest count as zero: the reduced design is
# rank-deficient on purpose (every factor keeps all its levels).
RANK_RTOL = 1e-10
# A contrast is estimable iff it equals its projection on the row space (Searle 1971 §5.4).
ESTIMABLE_ATOL = 1e-8


@dataclass(frozen=True)
class AbsorbedFit:
    observations: int
    subjects: int
    rank: int  # rank of the reduced design M_S·Z
    df: int  # observations − subjects − rank
    sse: float
    coefficients: FloatArray  # minimum-norm least-squares solution on the columns of Z
    row_basis: FloatArray  # (rank, columns): orthonormal basis of the row space of M_S·Z
    singular_values: FloatArray  # (rank,): the non-zero singular values of M_S·Z
    column_offsets: tuple[int, ...]  # first column of each factor's block in Z

    def contrast(self, weights: FloatArray) -> tuple[float, float] | None:
        """(l'β̂, l'(Z'M_S Z)⁺l) of the contrast l, or None when l is not estimable.

        Var(l'β̂) = σ²·l'(Z'M_S Z)⁺l for an estimable l (Searle 1971 §5.4), the same value as
        from the full dummy design because the subject block is orthogonal to M_S·Z."""
        projected = self.row_basis @ weights
        if not np.allclose(self.row_basis.T @ projected, weights, atol=ESTIMABLE_ATOL):
            return None
        estimate = float(weights @ self.coefficients)
        variance_factor = float(np.sum((projected / self.singular_values) ** 2))
        return estimate, variance_factor


def subject_means(values: FloatArray, subject_codes: IndexArray, counts: FloatArray) -> FloatArray:
    n_subjects = counts.size
    return np.bincount(subject_codes, weights=values, minlength=n_subjects) / counts


def fit_absorbed(
    response: FloatArray, subject_codes: IndexArray, n_subjects: int,
    factors: Sequence[tuple[IndexArray, int]],
) -> AbsorbedFit:
    """Fit y = subject + Σ factors by the within-subject sweep; ``factors`` are (codes, levels).

    ``subject_codes`` must use every code in 0..n_subjects−1 at least once."""
    n = response.size
    counts = np.bincount(subject_codes, minlength=n_subjects).astype(np.float64)
    if counts.size != n_subjects or np.any(counts == 0):
        raise ValueError("subject_codes: every subject needs at least one observation")
    y_within = response - subject_means(response, subject_codes, counts)[subject_codes]

    blocks: list[FloatArray] = []
    offsets: list[int] = []
    width = 0
    rows = np.arange(n)
    for codes, levels in factors:
        # Subject-by-level share of observations = subject means of the indicator columns.
        cells = np.bincount(subject_codes * levels + codes, minlength=n_subjects * levels)
        shares: FloatArray = cells.reshape(n_subjects, levels) / counts[:, None]
        block: FloatArray = -shares[subject_codes]
        block[rows, codes] += 1.0
        blocks.append(block)
        offsets.append(width)
        width += levels
    reduced = np.hstack(blocks) if blocks else np.zeros((n, 0))

    if width and n:
        u, s, vt = np.linalg.svd(reduced, full_matrices=False)
        keep = s > RANK_RTOL * s[0] if s.size and s[0] > 0 else np.zeros(s.size, dtype=bool)
    else:
        u, s, vt = np.zeros((n, 0)), np.zeros(0), np.zeros((0, width))
        keep = np.zeros(0, dtype=bool)
    u_r, s_r, vt_r = u[:, keep], s[keep], vt[keep]
    # Minimum-norm solution β̂ = V S⁻¹ U'y (Moore–Penrose pseudo-inverse of the reduced design).
    coefficients = vt_r.T @ ((u_r.T @ y_within) / s_r)
    residuals = y_within - reduced @ coefficients
    rank = int(keep.sum())
    return AbsorbedFit(
        observations=n, subjects=n_subjects, rank=rank, df=n - n_subjects - rank,
        sse=float(residuals @ residuals), coefficients=coefficients, row_basis=vt_r,
        singular_values=s_r, column_offsets=tuple(offsets))
