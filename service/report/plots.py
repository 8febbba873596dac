"""Hand-written inline SVG figures for the audit report.

Every number that reaches the markup goes through a fixed-precision formatter, so the same record
always yields the same bytes. All text is escaped here; the report embeds the result as markup.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from html import escape

MINUS = "\u2212"

# A sober palette of our own: slate bars, dark estimate line, teal interval, rust limits.
BAR_FILL = "#a9b4c2"
INK = "#1d2733"
INTERVAL = "#2f6f8f"
LIMIT = "#a4452c"
GRID = "#e3e7ec"
CURVE = "#4a5a6e"


@dataclass(frozen=True)
class Frame:
    """Plot area in pixels inside an SVG canvas."""

    width: float
    height: float
    left: float
    right: float
    top: float
    bottom: float

    @property
    def x0(self) -> float:
        return self.left

    @property
    def x1(self) -> float:
        return self.width - self.right

    @property
    def y0(self) -> float:
        return self.height - self.bottom

    @property
    def y1(self) -> float:
        return self.top


@dataclass(frozen=True)
class Curve:
    """One subject's concentration–time points; `fitted` marks the points of the terminal fit."""

    label: str
    times: tuple[float, ...]
    concentrations: tuple[float | None, ...]
    fitted: tuple[bool, ...]


def px(value: float) -> str:
    """Pixel coordinate with two decimals; '-0.00' is folded to '0.00' for stable bytes."""
    text = f"{value:.2f}"
    return "0.00" if text == "-0.00" else text


def number(value: float, decimals: int) -> str:
    """Fixed-decimal label with a typographic minus sign."""
    text = f"{value:.{decimals}f}"
    if float(text) == 0.0:
        text = text.lstrip("-")
    return text.replace("-", MINUS)


def nice_ticks(low: float, high: float, target: int = 6) -> tuple[list[float], int]:
    """Ticks on a 1–2–5 grid covering [low, high]; returns the ticks and the label decimals."""
    if not (math.isfinite(low) and math.isfinite(high)):
        raise ValueError("axis range must be finite")
    if high <= low:
        pad = abs(low) * 0.1 or 1.0
        low, high = low - pad, high + pad
    span = high - low
    magnitude = 10.0 ** math.floor(math.log10(span / max(target, 1)))
    # the 1–2–2.5–5 step whose tick count is nearest the target; ties go to the finer step
    candidates = [f * magnitude * m for m in (0.1, 1.0, 10.0) for f in (1.0, 2.0, 2.5, 5.0)]
    step = min(candidates,
               key=lambda s: (abs(math.floor(span / s + 1e-9) + 1 - target), s))
    decimals = max(0, -math.floor(math.log10(step) + 1e-9))
    if step < 10 and abs(step / 10.0 ** math.floor(math.log10(step) + 1e-9) - 2.5) < 1e-9:
        decimals += 1
    first = math.ceil(low / step - 1e-9)
    last = math.floor(high / step + 1e-9)
    ticks = [round(i * step, 12) for i in range(first, last + 1)]
    return ticks, decimals


def log_ticks(low: float, high: float) -> list[float]:
    """Decade ticks for a log axis, with 2 and 5 multiples when the range spans few decades."""
    lo_exp = math.floor(math.log10(low))
    hi_exp = math.ceil(math.log10(high))
    factors = (1.0, 2.0, 5.0) if hi_exp - lo_exp <= 2 else (1.0,)
    ticks = [
        f * 10.0**e
        for e in range(lo_exp, hi_exp + 1)
        for f in factors
        if low * (1 - 1e-9) <= f * 10.0**e <= high * (1 + 1e-9)
    ]
    return ticks


def log_label(value: float) -> str:
    decimals = max(0, -math.floor(math.log10(value) + 1e-9))
    return number(value, decimals)


def _scale(value: float, low: float, high: float, start: float, end: float) -> float:
    return start + (value - low) / (high - low) * (end - start)


def _open(frame: Frame, ident: str, title: str, description: str) -> list[str]:
    return [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{px(frame.width)}" '
        f'height="{px(frame.height)}" viewBox="0 0 {px(frame.width)} {px(frame.height)}" '
        f'role="img" aria-labelledby="{ident}-t {ident}-d" class="figure-svg">',
        f'<title id="{ident}-t">{escape(title)}</title>',
        f'<desc id="{ident}-d">{escape(description)}</desc>',
        f'<rect x="0" y="0" width="{px(frame.width)}" height="{px(frame.height)}" fill="#ffffff"/>',
    ]


def _x_axis(frame: Frame, ticks: Sequence[float], labels: Sequence[str], positions: Sequence[float],
            caption: str) -> list[str]:
    parts = [
        f'<line x1="{px(frame.x0)}" y1="{px(frame.y0)}" x2="{px(frame.x1)}" y2="{px(frame.y0)}" '
        f'stroke="{INK}" stroke-width="1"/>'
    ]
    for _, label, x in zip(ticks, labels, positions, strict=True):
        parts.append(
            f'<line x1="{px(x)}" y1="{px(frame.y0)}" x2="{px(x)}" y2="{px(frame.y0 + 5)}" '
            f'stroke="{INK}" stroke-width="1"/>'
        )
        parts.append(
            f'<text class="tick-x" x="{px(x)}" y="{px(frame.y0 + 18)}" text-anchor="middle" '
            f'font-size="11" fill="{INK}">{escape(label)}</text>'
        )
    parts.append(
        f'<text x="{px((frame.x0 + frame.x1) / 2)}" y="{px(frame.height - 6)}" '
        f'text-anchor="middle" font-size="12" fill="{INK}">{escape(caption)}</text>'
    )
    return parts


def _y_axis(frame: Frame, labels: Sequence[str], positions: Sequence[float],
            caption: str) -> list[str]:
    parts = [
        f'<line x1="{px(frame.x0)}" y1="{px(frame.y0)}" x2="{px(frame.x0)}" y2="{px(frame.y1)}" '
        f'stroke="{INK}" stroke-width="1"/>'
    ]
    for label, y in zip(labels, positions, strict=True):
        parts.append(
            f'<line x1="{px(frame.x0)}" y1="{px(y)}" x2="{px(frame.x1)}" y2="{px(y)}" '
            f'stroke="{GRID}" stroke-width="1"/>'
        )
        parts.append(
            f'<text class="tick-y" x="{px(frame.x0 - 6)}" y="{px(y + 4)}" text-anchor="end" '
            f'font-size="11" fill="{INK}">{escape(label)}</text>'
        )
    cy = (frame.y0 + frame.y1) / 2
    parts.append(
        f'<text x="14" y="{px(cy)}" text-anchor="middle" font-size="12" fill="{INK}" '
        f'transform="rotate(-90 14 {px(cy)})">{escape(caption)}</text>'
    )
    return parts


def _marker(frame: Frame, x: float, colour: str, dash: str, label: str, row: int) -> list[str]:
    dash_attr = f' stroke-dasharray="{dash}"' if dash else ""
    return [
        f'<line class="marker" x1="{px(x)}" y1="{px(frame.y0)}" x2="{px(x)}" y2="{px(frame.y1)}" '
        f'stroke="{colour}" stroke-width="1.5"{dash_attr}/>',
        # labels sit in the top margin, one row per kind, so they never cover the bars
        f'<text x="{px(x + 3)}" y="{px(frame.y1 - 4 - 12 * row)}" font-size="10" '
        f'fill="{colour}">{escape(label)}</text>',
    ]


def histogram_svg(
    ident: str,
    edges: Sequence[float],
    counts: Sequence[int],
    theta_hat: float | None,
    interval: tuple[float, float] | None,
    interval_label: str,
    limits: tuple[float, float] | None,
    title: str,
) -> str:
    """Bootstrap distribution as bars, with θ̂, the chosen interval and the acceptance limits."""
    if len(edges) != len(counts) + 1 or not counts:
        raise ValueError("histogram needs one more edge than counts and at least one bin")
    frame = Frame(width=680, height=330, left=58, right=18, top=46, bottom=46)
    marks: list[float] = [edges[0], edges[-1]]
    marks += [v for v in (theta_hat,) if v is not None]
    marks += list(interval or ()) + list(limits or ())
    low, high = min(marks), max(marks)
    pad = (high - low) * 0.04 or 0.1
    low, high = low - pad, high + pad
    x_ticks, x_dec = nice_ticks(low, high)
    top_count = max(max(counts), 1)
    y_ticks, _ = nice_ticks(0.0, float(top_count), target=5)
    y_top = max(y_ticks[-1], float(top_count))

    def sx(v: float) -> float:
        return _scale(v, low, high, frame.x0, frame.x1)

    def sy(v: float) -> float:
        return _scale(v, 0.0, y_top, frame.y0, frame.y1)

    parts = _open(frame, ident, title, "Histogram of the bootstrap replicates of the estimate.")
    parts += _y_axis(frame, [str(int(t)) if t == int(t) else number(t, 1) for t in y_ticks],
                     [sy(t) for t in y_ticks], "replicates")
    parts.append('<g class="bars">')
    for left_edge, right_edge, count in zip(edges[:-1], edges[1:], counts, strict=True):
        x, w = sx(left_edge), sx(right_edge) - sx(left_edge)
        parts.append(
            f'<rect class="bar" x="{px(x)}" y="{px(sy(count))}" width="{px(w)}" '
            f'height="{px(sy(0) - sy(count))}" fill="{BAR_FILL}" stroke="#ffffff" '
            f'stroke-width="0.5"/>'
        )
    parts.append("</g>")
    parts += _x_axis(frame, x_ticks, [number(t, x_dec) for t in x_ticks],
                     [sx(t) for t in x_ticks], "bootstrap estimate of \u03b8")
    if limits is not None:
        parts += _marker(frame, sx(limits[0]), LIMIT, "2 3", "limit", 0)
        parts += _marker(frame, sx(limits[1]), LIMIT, "2 3", "limit", 0)
    if interval is not None:
        parts += _marker(frame, sx(interval[0]), INTERVAL, "6 3", interval_label, 1)
        parts += _marker(frame, sx(interval[1]), INTERVAL, "6 3", interval_label, 1)
    if theta_hat is not None:
        parts += _marker(frame, sx(theta_hat), INK, "", "\u03b8\u0302", 2)
    parts.append("</svg>")
    return "\n".join(parts)


def jackknife_svg(
    ident: str, values: Sequence[tuple[str, float | None]], theta_hat: float | None, title: str
) -> str:
    """Leave-one-out estimates, one row per subject, with a vertical line at θ̂."""
    finite = [v for _, v in values if v is not None and math.isfinite(v)]
    if theta_hat is not None:
        finite.append(theta_hat)
    if not finite:
        raise ValueError("no jackknife value to plot")
    row = 16.0 if len(values) <= 40 else 11.0
    label_width = min(160.0, 24.0 + 7.0 * max(len(s) for s, _ in values))
    frame = Frame(width=680, height=40 + 46 + row * len(values), left=label_width + 10, right=18,
                  top=40, bottom=46)
    low, high = min(finite), max(finite)
    pad = (high - low) * 0.08 or abs(high) * 0.05 or 0.01
    low, high = low - pad, high + pad
    x_ticks, x_dec = nice_ticks(low, high, target=5)
    low, high = min(low, x_ticks[0]), max(high, x_ticks[-1])

    def sx(v: float) -> float:
        return _scale(v, low, high, frame.x0, frame.x1)

    parts = _open(frame, ident, title,
                  "Leave-one-subject-out estimates of \u03b8, one per subject.")
    for t in x_ticks:
        parts.append(
            f'<line x1="{px(sx(t))}" y1="{px(frame.y1)}" x2="{px(sx(t))}" y2="{px(frame.y0)}" '
            f'stroke="{GRID}" stroke-width="1"/>'
        )
    for i, (subject, value) in enumerate(values):
        y = frame.y1 + row * (i + 0.5)
        label = subject if len(subject) <= 20 else subject[:19] + "\u2026"
        parts.append(
            f'<text x="{px(frame.x0 - 6)}" y="{px(y + 4)}" text-anchor="end" font-size="11" '
            f'fill="{INK}">{escape(label)}</text>'
        )
        if value is not None and math.isfinite(value):
            parts.append(
                f'<circle class="dot" cx="{px(sx(value))}" cy="{px(y)}" r="3.5" fill="{INTERVAL}">'
                f"<title>{escape(subject)}: {escape(number(value, 4))}</title></circle>"
            )
    parts += _x_axis(frame, x_ticks, [number(t, x_dec) for t in x_ticks],
                     [sx(t) for t in x_ticks], "estimate of \u03b8 without this subject")
    if theta_hat is not None:
        parts += _marker(frame, sx(theta_hat), INK, "", "\u03b8\u0302 (all subjects)", 0)
    parts.append("</svg>")
    return "\n".join(parts)


def profiles_svg(
    ident: str, curves: Sequence[Curve], log_scale: bool, title: str, unit: str
) -> str:
    """Overlaid concentration–time curves; filled dots mark the points of the terminal fit."""
    points = [
        (t, c)
        for curve in curves
        for t, c in zip(curve.times, curve.concentrations, strict=True)
        if c is not None and math.isfinite(c) and math.isfinite(t) and (c > 0 or not log_scale)
    ]
    if not points:
        raise ValueError("no concentration to plot")
    frame = Frame(width=500, height=320, left=64, right=18, top=20, bottom=46)
    t_low, t_high = min(t for t, _ in points), max(t for t, _ in points)
    x_ticks, x_dec = nice_ticks(min(t_low, 0.0), t_high)
    t_low, t_high = min(x_ticks[0], t_low), max(x_ticks[-1], t_high)
    c_values = [c for _, c in points]
    if log_scale:
        # whole decades at both ends, so the axis always carries labelled decade ticks
        c_low = float(math.floor(math.log10(min(c_values)) + 1e-9))
        c_high = float(math.ceil(math.log10(max(c_values)) - 1e-9))
        if c_high <= c_low:
            c_high = c_low + 1.0
        ticks = log_ticks(10.0**c_low, 10.0**c_high)
        y_ticks = [math.log10(t) for t in ticks]
        y_labels = [log_label(t) for t in ticks]
    else:
        raw, y_dec = nice_ticks(0.0, max(c_values), target=5)
        c_low, c_high = 0.0, max(raw[-1], max(c_values))
        y_ticks, y_labels = raw, [number(t, y_dec) for t in raw]

    def sx(v: float) -> float:
        return _scale(v, t_low, t_high, frame.x0, frame.x1)

    def sy(v: float) -> float:
        return _scale(math.log10(v) if log_scale else v, c_low, c_high, frame.y0, frame.y1)

    scale_word = "log" if log_scale else "linear"
    parts = _open(frame, ident, title,
                  f"Concentration against time for each subject, {scale_word} scale.")
    parts += _y_axis(frame, y_labels,
                     [_scale(v, c_low, c_high, frame.y0, frame.y1) for v in y_ticks],
                     f"concentration ({unit})" if unit else "concentration")
    for curve in curves:
        parts.append(f'<g class="curve"><title>{escape(curve.label)}</title>')
        segment: list[str] = []
        segments: list[list[str]] = []
        for t, c in zip(curve.times, curve.concentrations, strict=True):
            if c is None or not math.isfinite(c) or (log_scale and c <= 0):
                # a gap in the line rather than an invented point
                if segment:
                    segments.append(segment)
                segment = []
                continue
            segment.append(f"{px(sx(t))},{px(sy(c))}")
        if segment:
            segments.append(segment)
        for seg in segments:
            parts.append(
                f'<polyline points="{" ".join(seg)}" fill="none" stroke="{CURVE}" '
                f'stroke-width="0.8" stroke-opacity="0.7"/>'
            )
        for t, c, fitted in zip(curve.times, curve.concentrations, curve.fitted, strict=True):
            if fitted and c is not None and math.isfinite(c) and (c > 0 or not log_scale):
                parts.append(
                    f'<circle class="fit-point" cx="{px(sx(t))}" cy="{px(sy(c))}" r="2.2" '
                    f'fill="{LIMIT}"/>'
                )
        parts.append("</g>")
    parts += _x_axis(frame, x_ticks, [number(t, x_dec) for t in x_ticks],
                     [sx(t) for t in x_ticks], "time")
    parts.append("</svg>")
    return "\n".join(parts)
