"""Bootstrap cases whose outputs are pinned in bootstrap_outputs.json.

The file was written by the engine of commit 57d5843, before the bootstrap ran on several threads
(one xoshiro256** stream per stratum, one core), so that archived records keep reproducing:
for every case, the SHA-256 of the replicate values θ* (in replicate order, every NaN written
as one canonical NaN), of the per-subject omission sums behind the jackknife-after-bootstrap,
and every number of the public result.

    .venv/bin/python -m tests.stats.bootstrap_cases   # rewrites the file: only on purpose
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.stats import resampling as rs

FloatArray = NDArray[np.float64]
OUTPUTS = Path(__file__).with_name("bootstrap_outputs.json")


def _one(m: FloatArray) -> FloatArray:
    return m[..., 0] * m[..., 0]


def _two(m: FloatArray) -> FloatArray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.asarray((m[..., 0] - m[..., 1]) / m[..., 1], dtype=np.float64)


def _three(m: FloatArray) -> FloatArray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.asarray((m[..., 0] - m[..., 1]) / (m[..., 1] - m[..., 2]), dtype=np.float64)


def _five(m: FloatArray) -> FloatArray:
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = (m[..., 0] - m[..., 1]) / (m[..., 2] - m[..., 3])
        return np.asarray(ratio + 0.25 * m[..., 4], dtype=np.float64)


STATISTICS: dict[int, Callable[[FloatArray], FloatArray]] = {1: _one, 2: _two, 3: _three, 5: _five}


@dataclass(frozen=True)
class Case:
    name: str
    n: int
    k: int
    replicates: int
    seed: int
    strata: int  # 0: none; else the number of stratum codes drawn
    integers: bool = False  # integer data, so that some replicates divide by zero
    bins: int = 40


def _raw(case: Case, count: int) -> NDArray[np.uint32]:
    # SeedSequence's output is fixed by its published algorithm (the engine's streams rest on it too)
    entropy = [case.n, case.k, case.replicates, case.strata, int(case.integers), case.seed % 2**32]
    return np.random.SeedSequence(entropy).generate_state(count, dtype=np.uint32)


def case_inputs(case: Case) -> tuple[FloatArray, NDArray[np.int64] | None]:
    raw = _raw(case, case.n * case.k + case.n).astype(np.float64)
    values = raw[: case.n * case.k].reshape(case.n, case.k)
    if case.integers:  # column 1 is 1 for two subjects, else 0: some replicates divide by 0
        data = np.floor(values / 2**32 * 3.0)
        data[:, 1] = np.arange(case.n) < 2
    else:
        centres = np.array([52.0, 50.0, 20.0, 31.0, 7.0][: case.k])
        data = centres + 12.0 * (values / 2**32 - 0.5)
    strata = None
    if case.strata:
        strata = (raw[case.n * case.k :] % case.strata).astype(np.int64) * 3 + 1
        if case.strata in (3, 7):
            strata[0] = 10_000  # a stratum of one subject (never omitted: no Monte-Carlo errors)
    return data, strata


def _cases() -> list[Case]:
    out = []
    layout = [  # n, k, B, strata
        (2, 1, 1, 0), (2, 3, 2, 0), (3, 2, 7, 0), (3, 2, 500, 0), (4, 5, 300, 0),
        (5, 1, 1000, 0), (8, 3, 2048, 0), (13, 2, 3000, 2), (16, 3, 20_000, 0),
        (24, 3, 5000, 0), (24, 3, 20_000, 3), (31, 5, 1234, 0), (40, 1, 999, 4),
        (63, 3, 7000, 0), (64, 2, 4096, 0), (64, 3, 3000, 5), (65, 3, 3000, 0),
        (65, 5, 1500, 2), (100, 1, 2500, 0), (128, 3, 6000, 0), (150, 3, 20_000, 0),
        (150, 2, 800, 6), (200, 3, 10_000, 0), (200, 5, 3000, 3), (257, 3, 1000, 0),
        (300, 3, 20_000, 0), (300, 1, 200, 7), (300, 5, 2000, 0),
    ]
    seeds = [0, 1, 7, 12345, 2**31 - 1, 2**40 + 11, 987_654_321]
    for number, (n, k, replicates, strata) in enumerate(layout):
        seed = seeds[number % len(seeds)]
        bins = 40 if number % 3 else 8
        out.append(Case(f"n{n}-k{k}-B{replicates}-s{strata}-seed{seed}", n, k, replicates, seed,
                        strata, bins=bins))
    for n, replicates, seed in [(3, 400, 5), (6, 3000, 2), (12, 10_000, 99)]:
        out.append(Case(f"zero-denominators-n{n}-B{replicates}", n, 2, replicates, seed, 0,
                        integers=True))
    out.append(Case("two-seeds-same-data-a", 24, 3, 5000, 424242, 0))
    out.append(Case("stratified-zero-denominators", 20, 2, 4000, 31, 2, integers=True))
    # 2³² mod (2¹⁷ − 1) = 2¹⁵: Lemire's method rejects about one lane in 131,000, so these
    # streams hold dozens of rejected lanes, which shift where later replicates start.
    out.append(Case("rejected-lanes-n131071", 131_071, 3, 64, 5, 0, bins=8))
    out.append(Case("rejected-lanes-stratified", 131_071 + 641, 2, 40, 9, 2, bins=8))
    return out


CASES = _cases()


def theta_star_digest(theta_star: FloatArray) -> str:
    canonical = np.where(np.isnan(theta_star), np.nan, theta_star)
    return hashlib.sha256(np.ascontiguousarray(canonical, dtype="<f8").tobytes()).hexdigest()


def array_digest(values: FloatArray) -> str:
    return hashlib.sha256(np.ascontiguousarray(values, dtype="<f8").tobytes()).hexdigest()


def _plain(value: Any) -> Any:
    if hasattr(value, "__dataclass_fields__"):
        return {name: _plain(getattr(value, name)) for name in value.__dataclass_fields__}
    if isinstance(value, tuple | list):
        return [_plain(v) for v in value]
    if isinstance(value, float):
        return value if math.isfinite(value) else repr(value)
    return value


def run_case(
    case: Case, *, chunk_size: int | None = None, **options: Any
) -> tuple[dict[str, Any], rs.Bootstrap]:
    """The pinned outputs of one case, and the result itself. ``options`` go to rs.bootstrap."""
    data, strata = case_inputs(case)
    statistic = STATISTICS[case.k]
    theta_hat = float(statistic(data.mean(axis=0)))
    if not math.isfinite(theta_hat):
        theta_hat = 0.5
    jackknife_values = rs.leave_one_out_values(data, statistic)
    seen: dict[str, FloatArray] = {}
    summarise = rs._summarise

    def spy(theta_star: FloatArray, omitted: FloatArray, *rest: Any) -> rs.Bootstrap:
        seen["theta_star"], seen["omitted"] = theta_star.copy(), omitted.copy()
        return summarise(theta_star, omitted, *rest)

    rs._summarise = spy  # type: ignore[assignment]
    try:
        result = rs.bootstrap(
            data, statistic, theta_hat=theta_hat, jackknife_values=jackknife_values,
            replicates=case.replicates, seed=case.seed, confidence_level=0.9, strata=strata,
            chunk_size=chunk_size, histogram_bins=case.bins, **options,
        )
    finally:
        rs._summarise = summarise  # type: ignore[assignment]
    fields = _plain(result)
    fields.pop("distribution")
    pinned = {
        "theta_star_sha256": theta_star_digest(seen["theta_star"]),
        "omitted_sha256": array_digest(seen["omitted"]),
        "distribution_sha256": array_digest(result.distribution),
        "result": fields,
    }
    return pinned, result


def main() -> None:
    outputs = {case.name: run_case(case)[0] for case in CASES}
    for case in CASES[::5]:  # the engine's chunk invariance, checked as the file is written
        assert run_case(case, chunk_size=3)[0] == outputs[case.name], case.name
    OUTPUTS.write_text(json.dumps(outputs, indent=1, sort_keys=True) + "\n")
    print(f"wrote {len(outputs)} cases to {OUTPUTS}")


if __name__ == "__main__":
    main()
