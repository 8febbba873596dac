"""Power under scaled acceptance limits, by seeded simulation of the studies' sufficient statistics.

Every analysis used here (the fixed-effects model on all data, the reference-only model, the
per-subject contrasts I and D) depends on a study only through, per sequence k of m subjects, the
mean vector ȳ_k of the p periods and the within-sequence cross-product matrix W_k (subject effects
are absorbed). With independent normal errors of variance σ²_wT or σ²_wR by treatment (no subject-
by-formulation interaction, σ_D = 0) these have exact distributions, independent of each other:

    ȳ_k ~ N_p(μ_k, Σ_k/m),   W_k ~ Wishart_p(m − 1, Σ_k),   Σ_k = diag(σ² of each period's treatment)

(Anderson 2003, An Introduction to Multivariate Statistical Analysis, §3.3 and ch. 7). W_k is
drawn by Bartlett's decomposition (Bartlett 1933): W = D·A·Aᵀ·D, D = Σ_k^{1/2}, A lower triangular
with A_jj² ~ χ²_{m−1−j} and N(0, 1) below the diagonal; m − 1 ≥ p is needed. A study costs O(s·p²)
draws whatever its size. The same standard draws serve every (ratio, CV) point of one call, so a
power curve carries common random numbers, and one seed fixes every draw (chunks of fixed size).

Decisions, on the log scale, without the two-decimal rounding of a real report:
- ``none``: the (1 − 2α) interval of the fixed-effects model within the limits;
- ``widened_limits`` (EMA 2010 §4.1.10, CPMP/EWP/QWP/1401/98 Rev.1): s²_wR from the reference-only
  model (subject + period on the reference values); CV_wR ≤ 30 %: limits ln 0.80, ln 1.25; above,
  ±0.760·s_wR with s_wR capped at its value for CV_wR = 50 %; the interval of the fixed-effects model
  (all data) within them and the point estimate within ln 0.80 … ln 1.25;
- ``reference_scaled`` (FDA draft guidance on progesterone, 2011): s²_wR = SS(D on sequence)/(2·df_D);
  if s_wR < 0.294 the unscaled interval test as for ``none`` at 80.00–125.00 %; otherwise the upper
  bound of Howe's method (Hyslop, Hsuan & Holder 2000, Stat Med 19:2885–2897) must be ≤ 0 and the
  point estimate within 80.00–125.00 %:
      x = δ̂² − s²_δ, x_u = (|δ̂| + t_{1−α,df_I}·s_δ)², y = −θ·s²_wR, y_u = −θ·s²_wR·df_D/χ²_{1−α,df_D},
      bound = x + y + sqrt((x_u − x)² + (y_u − y)²), θ = (ln 1.25/0.25)²,
  where χ²_{1−α,df} is the (1 − α) quantile (the value exceeded with probability α, the guidance's
  χ²_{0.05}), so that y_u is −θ times the one-sided lower confidence bound of σ²_wR.

Degrees of freedom of s²_wR, derived from the models (and checked by least squares in the tests):
the reference-only model has (values on R) − (subjects) − (estimable period contrasts); D on
sequence has (subjects with two R values) − (sequences holding them). full_replicate_4: n − 2 for
both. full_replicate_3: only RTR subjects have two R values: n/2 − 1 for both. partial_replicate:
every subject has two R values; D on sequence n − 3, but the reference-only model estimates only two
period contrasts for the three sequences' R–R differences, so n − 2.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from functools import cache

import numpy as np
from numpy.typing import NDArray
from scipy import stats as sps
from scipy.linalg import block_diag

from service.stats.power import Design, sigma_from_cv

APPROACHES = ("none", "widened_limits", "reference_scaled")
LOG_STANDARD_LIMIT = math.log(1.25)            # 80.00–125.00 %
WIDENING_FACTOR = 0.760                        # EMA 2010 §4.1.10
S2_WIDENING_FROM = math.log1p(0.30**2)         # CV_wR = 30 %, EMA 2010 §4.1.10
S_WR_CAP = math.sqrt(math.log1p(0.50**2))      # CV_wR = 50 %, EMA 2010 §4.1.10
THETA = (math.log(1.25) / 0.25) ** 2           # FDA progesterone draft guidance 2011
S_WR_SCALING_FROM = 0.294                      # same guidance
CHUNK = 25_000                                 # studies per batch: caps memory; fixes the draw order

Array = NDArray[np.float64]


@dataclass(frozen=True)
class SimulatedPower:
    power: float
    standard_error: float     # Monte-Carlo: sqrt(p(1 − p)/N), binomial
    passes: int
    simulations: int


@dataclass(frozen=True)
class _Layout:
    """Constant matrices of one design's three analyses (built once per design)."""

    sequences: int
    periods: int
    is_test: NDArray[np.bool_]       # (s, p)
    full_delta: Array                # (s, p): δ̂ = Σ_k full_delta_k · ȳ_k
    full_within: Array               # (s, p, p): the within-subject projector Q per sequence
    full_means: Array                # (s·p, s·p): residual maker of the period+treatment means, ∘ Q
    full_rank: int
    ref_within: Array                # (s, p, p): projector on the R values of each sequence
    ref_means: Array                 # (s·p, s·p)
    ref_rank: int                    # estimable period contrasts of the reference-only model
    ref_rows: int                    # Σ_k rank of ref_within_k, per subject of a sequence
    i_weights: Array                 # (s, p): I = mean T − mean R
    d_weights: Array                 # (s, p): D = R₁ − R₂ (zero for sequences without two R)
    d_sequences: int


@cache
def _layout(sequences: tuple[str, ...]) -> _Layout:
    s, p = len(sequences), len(sequences[0])
    is_test = np.array([[c == "T" for c in q] for q in sequences])
    q_full = np.eye(p) - 1.0 / p
    design = np.zeros((s, p, p))                          # period dummies 2..p, then T
    design[:, np.arange(1, p), np.arange(p - 1)] = 1.0
    design[:, :, p - 1] = is_test
    z = np.concatenate([q_full @ design[k] for k in range(s)])
    z_pinv = np.linalg.pinv(z)
    full_delta = (z_pinv[p - 1].reshape(s, p) @ q_full)
    full_means = (np.eye(s * p) - z @ z_pinv) @ block_diag(*([q_full] * s))

    ref_within = np.zeros((s, p, p))
    i_weights = np.zeros((s, p))
    d_weights = np.zeros((s, p))
    for k in range(s):
        r = np.flatnonzero(~is_test[k])
        if r.size >= 2:
            ref_within[k][np.ix_(r, r)] = np.eye(r.size) - 1.0 / r.size
        if r.size == 2:
            d_weights[k, r] = (1.0, -1.0)
        i_weights[k] = np.where(is_test[k], 1.0 / is_test[k].sum(), -1.0 / (~is_test[k]).sum())
    z_ref = np.concatenate([ref_within[k] @ design[k][:, : p - 1] for k in range(s)])
    z_ref_pinv = np.linalg.pinv(z_ref)
    ref_means = (np.eye(s * p) - z_ref @ z_ref_pinv) @ block_diag(*ref_within)
    return _Layout(
        s, p, is_test, full_delta, np.broadcast_to(q_full, (s, p, p)).copy(), full_means,
        int(np.linalg.matrix_rank(z)), ref_within, ref_means, int(np.linalg.matrix_rank(z_ref)),
        int(sum(np.linalg.matrix_rank(w) for w in ref_within)), i_weights, d_weights,
        int(np.count_nonzero(np.any(d_weights != 0.0, axis=1))))


def full_model_df(design: Design, total: int) -> int:
    """Residual df of the fixed-effects model: n·(p − 1) − rank(period + treatment)."""
    lay = _layout(design.sequences)
    return total * (lay.periods - 1) - lay.full_rank


def reference_df(design: Design, total: int, approach: str) -> int:
    """Degrees of freedom of s²_wR under ``approach`` (see the module docstring)."""
    lay = _layout(design.sequences)
    m = total // lay.sequences
    if approach == "widened_limits":
        return m * lay.ref_rows - lay.ref_rank
    if approach == "reference_scaled":
        return m * lay.d_sequences - lay.d_sequences
    raise ValueError(f"approach: {approach!r} has no s_wR")


def simulated_power(
    design: Design, total: int, points: Sequence[tuple[float, float, float]], *, approach: str,
    alpha: float, simulations: int, seed: int, limits: tuple[float, float] = (0.80, 1.25),
) -> tuple[SimulatedPower, ...]:
    """Power at each (ratio, cv_test, cv_reference) point for ``total`` subjects in equal sequences.

    ``limits`` are used by ``approach="none"`` only; the scaled approaches fix 80.00–125.00 %.
    Inputs are assumed valid (service.stats.planning checks them)."""
    lay = _layout(design.sequences)
    m = total // lay.sequences
    if total % lay.sequences or m - 1 < lay.periods:
        raise ValueError(f"total: {total} must be a multiple of {lay.sequences} with at least "
                         f"{lay.periods + 1} subjects per sequence")
    if approach != "none" and lay.d_sequences == 0:
        raise ValueError(f"design: {design.name} does not repeat the reference")
    rng = np.random.default_rng(seed)
    passes = np.zeros(len(points), dtype=np.int64)
    done = 0
    while done < simulations:
        size = min(CHUNK, simulations - done)
        z, w = _standard_draws(rng, size, lay, m)
        for i, (ratio, cv, cv_ref) in enumerate(points):
            ok = _passes(lay, z, w, m, math.log(ratio), sigma_from_cv(cv), sigma_from_cv(cv_ref),
                         approach, alpha, limits)
            passes[i] += int(np.count_nonzero(ok))
        done += size
    return tuple(_summary(int(k), simulations) for k in passes)


def _summary(passes: int, simulations: int) -> SimulatedPower:
    p = passes / simulations
    return SimulatedPower(p, math.sqrt(p * (1.0 - p) / simulations), passes, simulations)


def _standard_draws(rng: np.random.Generator, size: int, lay: _Layout, m: int) -> tuple[Array, Array]:
    """z ~ N(0, I_p) per sequence and S = A·Aᵀ ~ Wishart_p(m − 1, I) by Bartlett's decomposition."""
    s, p = lay.sequences, lay.periods
    z = rng.standard_normal((size, s, p))
    rows, cols = np.tril_indices(p, -1)
    a = np.zeros((size, s, p, p))
    a[:, :, rows, cols] = rng.standard_normal((size, s, rows.size))
    df = (m - 1 - np.arange(p)).astype(np.float64)                # Bartlett 1933: χ²_{m−1−j}
    a[:, :, np.arange(p), np.arange(p)] = np.sqrt(rng.chisquare(np.broadcast_to(df, (size, s, p))))
    return z, np.matmul(a, np.swapaxes(a, -1, -2))


def _quadratic(w: Array, coefficients: Array) -> Array:
    """Σ_k ⟨C_k, S_k⟩ for each study: one matrix–vector product over the flattened matrices."""
    n = w.shape[0]
    return w.reshape(n, -1) @ coefficients.reshape(-1)


def _passes(
    lay: _Layout, z: Array, w: Array, m: int, delta: float, sigma_t: float, sigma_r: float,
    approach: str, alpha: float, limits: tuple[float, float],
) -> NDArray[np.bool_]:
    s = lay.sequences
    n = s * m
    sig = np.where(lay.is_test, sigma_t, sigma_r)                  # (s, p)
    outer = sig[:, :, None] * sig[:, None, :]
    z_scaled = (z * sig).reshape(z.shape[0], -1)                   # σ ∘ z, flattened

    # Fixed-effects model on all data: δ̂, residual SS = Σ tr(Q W_k) + m·|M·Q ȳ|²; ν = n(p−1) − rank.
    delta_full = delta + z_scaled @ lay.full_delta.reshape(-1) / math.sqrt(m)
    u = z_scaled @ lay.full_means.T
    rss: Array = _quadratic(w, lay.full_within * outer) + np.einsum("ij,ij->i", u, u)
    df_full = n * (lay.periods - 1) - lay.full_rank
    se_full = np.sqrt(rss / df_full * float(np.sum(lay.full_delta**2)) / m)
    t_full = float(sps.t.ppf(1.0 - alpha, df_full))
    lower_ci, upper_ci = delta_full - t_full * se_full, delta_full + t_full * se_full

    if approach == "none":
        return (lower_ci >= math.log(limits[0])) & (upper_ci <= math.log(limits[1]))
    pe_ok = np.abs(delta_full) <= LOG_STANDARD_LIMIT

    if approach == "widened_limits":
        u_ref = z_scaled @ lay.ref_means.T
        ss_ref: Array = _quadratic(w, lay.ref_within * outer) + np.einsum("ij,ij->i", u_ref, u_ref)
        s2_wr = ss_ref / (m * lay.ref_rows - lay.ref_rank)
        limit = np.where(s2_wr <= S2_WIDENING_FROM, LOG_STANDARD_LIMIT,
                         WIDENING_FACTOR * np.minimum(np.sqrt(s2_wr), S_WR_CAP))  # EMA 2010 §4.1.10
        return (lower_ci >= -limit) & (upper_ci <= limit) & pe_ok

    # reference_scaled: I and D per subject, regressed on sequence (FDA 2011).
    delta_i = delta + (z_scaled @ lay.i_weights.reshape(-1)) / (s * math.sqrt(m))  # mean of seq. means
    df_i = n - s
    s2_delta = _quadratic(w, lay.i_weights[:, :, None] * lay.i_weights[:, None, :] * outer) / df_i / n
    df_d = m * lay.d_sequences - lay.d_sequences
    s2_wr = (_quadratic(w, lay.d_weights[:, :, None] * lay.d_weights[:, None, :] * outer)
             / (2.0 * df_d))
    x = delta_i**2 - s2_delta                                       # Hyslop et al. 2000
    x_u = (np.abs(delta_i) + float(sps.t.ppf(1.0 - alpha, df_i)) * np.sqrt(s2_delta)) ** 2
    y = -THETA * s2_wr
    y_u = -THETA * s2_wr * df_d / float(sps.chi2.ppf(1.0 - alpha, df_d))
    bound = x + y + np.sqrt((x_u - x) ** 2 + (y_u - y) ** 2)
    scaled_ok = (bound <= 0.0) & (np.abs(delta_i) <= LOG_STANDARD_LIMIT)
    unscaled_ok = (lower_ci >= -LOG_STANDARD_LIMIT) & (upper_ci <= LOG_STANDARD_LIMIT)
    return np.where(np.sqrt(s2_wr) < S_WR_SCALING_FROM, unscaled_ok, scaled_ok)
