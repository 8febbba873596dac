"""Recompute an archived result from its archived inputs and list every value that differs.

Compared: every value under `result` except `result.engine`, exactly (after the same RFC 8785
round trip the archive applies, so the numbers are compared as stored), plus the inputs hash.
The engine versions are listed apart: a newer engine that gives the same numbers reproduces the
record; its version change is reported in `engine_differences`, not counted as a failure. Two
kinds of change a newer engine may bring are listed apart as well and do not fail a reproduction:
fields the archived result does not have (`additions`: the record contract only ever adds), and
numbers that differ in their last digits only (`rounding_differences`: relative difference at most
ROUNDING_TOLERANCE, as when a model is fitted by an equivalent but differently ordered computation).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from service.records.building import compute_result
from service.records.hashing import canonical_json, inputs_sha256, load_canonical

MAX_LISTED = 200
ROUNDING_TOLERANCE = 1e-12
COMPARED = (
    "every value under result except result.engine, compared exactly after the archive's RFC 8785 "
    "round trip, and the SHA-256 of the archived inputs against inputs_sha256; result.engine is "
    "compared separately and reported in engine_differences; fields the archived result lacks are "
    "listed in additions, and numbers that differ by at most 1e-12 relative in "
    "rounding_differences, neither counted as a failure"
)

Path = list[str | int]


def reproduce(
    record: Mapping[str, Any], *, deadline: float | None = None, threads: int | None = None
) -> dict[str, Any]:
    inputs = record["inputs"]
    recomputed = load_canonical(canonical_json(
        compute_result(inputs, deadline=deadline, threads=threads)))
    archived = record["result"]
    differences: list[dict[str, Any]] = []
    if inputs_sha256(inputs) != record["inputs_sha256"]:
        differences.append({"path": ["inputs_sha256"], "archived": record["inputs_sha256"],
                            "recomputed": inputs_sha256(inputs)})
    found: list[dict[str, Any]] = []
    _compare(_without_engine(archived), _without_engine(recomputed), ["result"], found)
    additions = [d for d in found if d.get("missing_in") == "archived"]
    rounding = [d for d in found if _last_digits_only(d)]
    differences += [d for d in found if d not in additions and d not in rounding]
    engine_differences: list[dict[str, Any]] = []
    _compare(_engine(archived), _engine(recomputed), ["result", "engine"], engine_differences)
    return {
        "id": record.get("id"),
        "reproduced": not differences,
        "compared": COMPARED,
        "differences": differences[:MAX_LISTED],
        "differences_total": len(differences),
        "engine_differences": engine_differences,
        "additions": [d["path"] for d in additions][:MAX_LISTED],
        "rounding_differences": rounding[:MAX_LISTED],
    }


def _last_digits_only(difference: Mapping[str, Any]) -> bool:
    a, b = difference.get("archived"), difference.get("recomputed")
    if type(a) is not float or type(b) is not float:
        return False
    return abs(a - b) <= ROUNDING_TOLERANCE * max(abs(a), abs(b))


def _without_engine(result: Any) -> Any:
    if isinstance(result, dict):
        return {k: v for k, v in result.items() if k != "engine"}
    return result


def _engine(result: Any) -> Any:
    return result.get("engine") if isinstance(result, dict) else None


def _compare(archived: Any, recomputed: Any, path: Path, out: list[dict[str, Any]]) -> None:
    if isinstance(archived, dict) and isinstance(recomputed, dict):
        for key in sorted(set(archived) | set(recomputed)):
            if key not in archived or key not in recomputed:
                out.append({"path": [*path, key], "archived": archived.get(key),
                            "recomputed": recomputed.get(key),
                            "missing_in": "archived" if key not in archived else "recomputed"})
            else:
                _compare(archived[key], recomputed[key], [*path, key], out)
        return
    if isinstance(archived, list) and isinstance(recomputed, list):
        for i, (a, b) in enumerate(zip(archived, recomputed, strict=False)):
            _compare(a, b, [*path, i], out)
        if len(archived) != len(recomputed):
            out.append({"path": path, "archived": f"{len(archived)} items",
                        "recomputed": f"{len(recomputed)} items"})
        return
    # type() too: True == 1 and 1 == 1.0 in Python, but they are different JSON values.
    if type(archived) is not type(recomputed) or archived != recomputed:
        out.append({"path": path, "archived": archived, "recomputed": recomputed})
