"""Plain values the pages print about a record: its verdicts, and form problems as rows."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from service.archive.shares import ShareLink
from service.intake.problems import Problem, format_loc

HASH_DIGITS_SHOWN = 12


@dataclass(frozen=True)
class Verdicts:
    metric: str
    ratio: str | None  # verdict of the ratio of mean differences, None when not analysed
    abe: str | None    # verdict of average bioequivalence, None when not analysed


@dataclass(frozen=True)
class PageProblem:
    where: str
    message: str
    field: str | None  # the form field it concerns, for the link from the summary


def verdicts_of(result: Mapping[str, Any]) -> list[Verdicts]:
    rows: list[Verdicts] = []
    for metric in result.get("metrics") or []:
        if not isinstance(metric, Mapping):
            continue
        rows.append(Verdicts(
            str(metric.get("metric") or "response"),
            _verdict(metric.get("ratio_of_mean_differences")),
            _verdict(metric.get("average_bioequivalence")),
        ))
    return rows


def _verdict(analysis: Any) -> str | None:
    if not isinstance(analysis, Mapping):
        return None
    acceptance = analysis.get("acceptance")
    if not isinstance(acceptance, Mapping):
        return "undetermined"
    return str(acceptance.get("verdict") or "undetermined")


def short_hash(digest: str) -> str:
    return digest[:HASH_DIGITS_SHOWN]


def page_problems(
    problems: Sequence[Problem], field_of: Mapping[tuple[str | int, ...], str] | None = None,
    default_field: str | None = None,
) -> list[PageProblem]:
    """Problems as the pages list them: where (line and column for CSV), what, and which field."""
    fields = field_of or {}
    rows = []
    for problem in problems:
        loc = tuple(problem.loc)
        field = fields.get(loc) or next(
            (name for prefix, name in fields.items() if loc[: len(prefix)] == prefix), default_field
        )
        rows.append(PageProblem(_where(loc), problem.msg, field))
    return rows


def _where(loc: tuple[str | int, ...]) -> str:
    if len(loc) == 2 and loc[0] == "query" and isinstance(loc[1], str):
        return f"field {loc[1]}"
    return format_loc(loc)


def share_state(link: ShareLink, now: datetime, service_open: bool) -> str:
    """'active', 'expired', 'ended', 'key revoked', or 'service no longer open' for a link made
    while the service ran open (such a link names no key, so it lives only as long as that)."""
    state = link.state(now)
    if state == "active" and link.label is None and not service_open:
        return "service no longer open"
    return state
