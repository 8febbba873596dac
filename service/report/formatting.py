"""Deterministic number formatting for the audit report: fixed decimals, typographic minus."""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from typing import Any

from markupsafe import Markup

from service.report.plots import MINUS, number

DASH = "\u2014"


def fmt(value: Any, digits: int = 3) -> str:
    """Fixed-decimal number with a typographic minus; '—' for a missing or non-finite value."""
    if value is None or isinstance(value, bool):
        return DASH if value is None else ("yes" if value else "no")
    if isinstance(value, int):
        return str(value).replace("-", MINUS)
    if isinstance(value, float):
        if not math.isfinite(value):
            return DASH
        return number(value, digits)
    return str(value)


def sig(value: Any, digits: int = 4) -> str:
    """About `digits` significant figures, written with fixed decimals (no exponent)."""
    if isinstance(value, float) and math.isfinite(value) and value != 0.0:
        decimals = digits - 1 - math.floor(math.log10(abs(value)))
        return fmt(value, min(max(decimals, 0), 8))
    return fmt(value, 0 if isinstance(value, float) and value == 0.0 else digits)


def signed(value: Any, digits: int = 2) -> str:
    text = fmt(value, digits)
    if isinstance(value, float | int) and not isinstance(value, bool) and value > 0:
        return "+" + text
    return text


def level_percent(value: Any) -> str:
    """0.9 -> '90 %'; written from the shortest repr so 0.975 stays '97.5 %'."""
    if isinstance(value, float | int) and not isinstance(value, bool) and math.isfinite(value):
        return f"{round(float(value) * 100.0, 6):g}\u00a0%"
    return DASH


def computable(value: Any, digits: int = 3) -> str:
    return "not computable" if value is None else fmt(value, digits)


VERDICT_WORDS = {
    "within_limits": "within limits",
    "not_within_limits": "not within limits",
    "undetermined": "undetermined",
}


def text(value: Any) -> str:
    return "" if value is None else str(value)


def mapping(value: Any) -> Mapping[str, Any]:
    return value if isinstance(value, Mapping) else {}


def words(key: str) -> str:
    return key.replace("_", " ")


def figure(make: Callable[..., str], *args: Any) -> Markup | None:
    """A figure, or None when the record lacks the data for it (the template says so)."""
    try:
        svg = make(*args)
    except ValueError:
        return None
    # plots.py escapes every piece of text it writes, so its output is trusted markup.
    return Markup(svg)


def ordered_treatments(design: Mapping[str, Any], seen: Sequence[str]) -> list[str]:
    """Design order (test, reference, baseline), then any other treatment in sorted order."""
    named = [str(design[r]) for r in ("test", "reference", "baseline") if design.get(r)]
    first = [t for t in named if t in seen]
    return first + sorted({t for t in seen if t not in first})


def display(value: Any) -> str:
    """A setting as written in the inputs: shortest float repr, yes/no, '—' for null."""
    if value is None:
        return DASH
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return fmt(value, 0) if value == int(value) and abs(value) >= 1e6 else repr(value)
    if isinstance(value, list):
        return ", ".join(display(v) for v in value) or DASH
    return str(value)


def interval_text(lower: Any, upper: Any, digits: int = 3) -> str:
    if lower is None or upper is None:
        return "not computable"
    return f"[{fmt(lower, digits)}, {fmt(upper, digits)}]"


def percent_interval(lower: Any, upper: Any) -> str:
    if lower is None or upper is None:
        return "not computable"
    return f"[{fmt(lower, 2)} %, {fmt(upper, 2)} %]"


def p_value(value: Any) -> str:
    """p-values below 0.0001 are written as a bound; four decimals would print a false 0."""
    if isinstance(value, float) and 0.0 <= value < 0.0001:
        return "<\u00a00.0001"
    return fmt(value, 4)


def capitalize_first(value: Any) -> str:
    """Upper-case the first letter only (str.capitalize lower-cases 'BCa'); drop a final '.'."""
    words_ = text(value).rstrip(".")
    return words_[:1].upper() + words_[1:]


def decimals_for(values: Sequence[Any], digits: int = 4) -> int:
    """One decimal count for a table column: `digits` significant figures on its largest entry."""
    finite = [abs(v) for v in values
              if isinstance(v, float | int) and not isinstance(v, bool) and math.isfinite(v)]
    largest = max(finite, default=0.0)
    if largest == 0.0:
        return 2
    return min(max(digits - 1 - math.floor(math.log10(largest)), 0), 6)
