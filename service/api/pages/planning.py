"""GET /planning: the planning form and, once it is filled in, the answer on the same page.

Planning changes nothing on the server, so the form is a GET (bookmarkable, no CSRF token needed);
the figures go through the same service.stats.planning entry point as POST /v1/planning. A record
page links here with the archived study's CV filled in ("plan the next study").
"""

from __future__ import annotations

import math
from typing import Any
from urllib.parse import urlencode

from fastapi import APIRouter, Request
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from service.api.pages.errors import PageRefusal
from service.api.pages.rendering import render_page, see_other
from service.api.pages.viewers import require_viewer
from service.api.pages.views import PageProblem
from service.api.planning import FromRecordBody, from_record
from service.api.settings import ServiceSettings
from service.stats.planning import PlanningInputError, plan, plan_to_json

DESIGNS = (
    ("two_by_two", "2×2 crossover (TR/RT)"),
    ("full_replicate_4", "full replicate, 4 periods (TRTR/RTRT)"),
    ("full_replicate_3", "full replicate, 3 periods (TRT/RTR)"),
    ("partial_replicate", "partial replicate (TRR/RTR/RRT)"),
    ("parallel", "parallel groups"),
)
APPROACHES = ("none", "widened_limits", "reference_scaled")
# field -> (label, hint, default shown as a placeholder)
NUMBERS: tuple[tuple[str, str, str, str], ...] = (
    ("cv", "Within-subject CV", "as a fraction: 0.30 for 30 %", ""),
    ("ratio", "Assumed true ratio test / reference", "e.g. 0.95", "0.95"),
    ("target_power", "Target power", "e.g. 0.80 or 0.90", "0.80"),
    ("alpha", "Level of each one-sided test (α)", "0.05 gives the 90 % interval", "0.05"),
    ("limit_lower", "Lower acceptance limit of the ratio", "e.g. 0.80", "0.80"),
    ("limit_upper", "Upper acceptance limit of the ratio", "e.g. 1.25", "1.25"),
    ("dropout_rate", "Expected dropout rate", "a fraction, e.g. 0.10", "0"),
    ("cv_reference", "Within-subject CV of the reference (scaled approaches)",
     "leave empty to use the CV above", ""),
    ("seed", "Seed of the simulation (scaled approaches)", "leave empty for a new one", ""),
)
CURVE = {"width": 560, "height": 260, "left": 56, "right": 16, "top": 16, "bottom": 40}


def build_planning_router() -> APIRouter:
    router = APIRouter(include_in_schema=False)

    @router.get("/planning")
    async def planning_page(request: Request) -> Response:
        viewer = await run_in_threadpool(require_viewer, request, "read")
        settings: ServiceSettings = request.app.state.settings
        typed = {name: value.strip() for name, value in request.query_params.items()
                 if name in {n for n, *_ in NUMBERS} | {"design", "approach", "source"}}
        problems: list[PageProblem] = []
        answer: dict[str, Any] | None = None
        if typed.get("cv"):
            arguments, problems = _arguments(typed)
            if not problems:
                try:
                    answer = await run_in_threadpool(
                        lambda: plan_to_json(plan(**arguments,
                                                  max_total=settings.max_planning_total)))
                except PlanningInputError as exc:
                    problems = [PageProblem(_label(field), message, _field(field))
                                for field, message in exc.problems]
        return render_page(
            request, "planning.html.j2", viewer, status=422 if problems else 200,
            designs=DESIGNS, approaches=APPROACHES, numbers=NUMBERS, typed=typed,
            problems=problems, answer=answer, curve=_curve_svg(answer) if answer else None)

    @router.get("/analyses/{analysis_id}/plan")
    async def plan_from_record(analysis_id: str, request: Request) -> Response:
        """The planning form filled in from an archived metric's CV and design."""
        await run_in_threadpool(require_viewer, request, "read")
        archive = request.app.state.archive
        record = await run_in_threadpool(archive.get, analysis_id[:64])
        if record is None:
            raise PageRefusal(404, "No such record", "There is no archived analysis with this id.")
        metrics = [m for m in record["result"].get("metrics", [])
                   if (m.get("average_bioequivalence") or {}).get("within_subject_cv_percent")]
        if not metrics:
            return see_other("/planning?" + urlencode({"source": record["id"]}))
        chosen = next((m for m in metrics if m.get("metric") == request.query_params.get("metric")),
                      metrics[0])
        planning, _ = from_record(record, FromRecordBody(metric=chosen["metric"]))
        return see_other("/planning?" + urlencode({
            "source": record["id"], "design": planning.design, "cv": f"{planning.cv:.6g}"}))

    return router


def _arguments(typed: dict[str, str]) -> tuple[dict[str, Any], list[PageProblem]]:
    problems: list[PageProblem] = []
    values: dict[str, float | None] = {}
    for name, label, _, default in NUMBERS:
        text = typed.get(name, "") or default
        if text == "":
            values[name] = None
            continue
        try:
            number = float(text.replace(",", "."))
        except ValueError:
            number = math.nan
        if not math.isfinite(number):
            problems.append(PageProblem(label, f"must be a number, got {text[:40]!r}", name))
        values[name] = number
    design = typed.get("design") or "two_by_two"
    if design not in {d for d, _ in DESIGNS}:
        problems.append(PageProblem("Design", "choose one of the listed designs", "design"))
    approach = typed.get("approach") or "none"
    if approach not in APPROACHES:
        problems.append(PageProblem("Approach", "choose one of the listed approaches", "approach"))
    seed = values.get("seed")
    if seed is not None and not float(seed).is_integer():
        problems.append(PageProblem("Seed", "must be a whole number", "seed"))
    arguments: dict[str, Any] = {
        "design": design, "approach": approach, "cv": values["cv"], "ratio": values["ratio"],
        "target_power": values["target_power"], "alpha": values["alpha"],
        "limits": (values["limit_lower"], values["limit_upper"]),
        "dropout_rate": values["dropout_rate"], "cv_reference": values["cv_reference"],
        "seed": None if seed is None or problems else int(seed),
    }
    return arguments, problems


def _field(field: str) -> str | None:
    return {"limits.lower": "limit_lower", "limits.upper": "limit_upper", "limits": "limit_lower",
            "simulations": None, "method": None, "max_total": None}.get(field, field)


def _label(field: str) -> str:
    name = _field(field)
    return next((label for n, label, *_ in NUMBERS if n == name), field.replace("_", " "))


def _curve_svg(answer: dict[str, Any]) -> str | None:
    """Power against CV at the planned ratio, as an inline SVG (no script; numbers escaped by
    construction: every value is a formatted float)."""
    ratio = answer["assumptions"]["ratio"]
    points = sorted((p["cv"], p["power"]) for p in answer["curve"]
                    if p["ratio"] == ratio and p["power"] is not None)
    if len(points) < 2:
        return None
    c = CURVE
    x0, x1 = points[0][0], points[-1][0]
    inner_w = c["width"] - c["left"] - c["right"]
    inner_h = c["height"] - c["top"] - c["bottom"]

    def x(cv: float) -> float:
        return float(c["left"] + (cv - x0) / (x1 - x0) * inner_w)

    def y(power: float) -> float:
        return float(c["top"] + (1.0 - power) * inner_h)

    path = " ".join(f"{'M' if i == 0 else 'L'}{x(cv):.1f},{y(p):.1f}" for i, (cv, p) in enumerate(points))
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {c["width"]} {c["height"]}" '
             'role="img" aria-labelledby="curve-title"><title id="curve-title">Power against '
             'the within-subject CV at the planned ratio and sample size</title>',
             f'<rect x="{c["left"]}" y="{c["top"]}" width="{inner_w}" height="{inner_h}" '
             'fill="none" stroke="#888"/>']
    for tick in (0.0, 0.2, 0.4, 0.6, 0.8, 1.0):
        parts.append(f'<line x1="{c["left"]}" x2="{c["left"] + inner_w}" y1="{y(tick):.1f}" '
                     f'y2="{y(tick):.1f}" stroke="#ddd"/><text x="{c["left"] - 6}" '
                     f'y="{y(tick) + 4:.1f}" text-anchor="end" font-size="12">{tick:.1f}</text>')
    for cv, _ in points[:: max(1, len(points) // 6)]:
        parts.append(f'<text x="{x(cv):.1f}" y="{c["top"] + inner_h + 18}" text-anchor="middle" '
                     f'font-size="12">{cv:.3f}</text>')
    target = answer["assumptions"]["target_power"]
    parts.append(f'<line x1="{c["left"]}" x2="{c["left"] + inner_w}" y1="{y(target):.1f}" '
                 f'y2="{y(target):.1f}" stroke="#b35c00" stroke-dasharray="5 4"/>')
    parts.append(f'<path d="{path}" fill="none" stroke="#1d4f91" stroke-width="2"/>')
    parts.append(f'<text x="{c["left"] + inner_w / 2:.1f}" y="{c["height"] - 4}" '
                 'text-anchor="middle" font-size="12">within-subject CV</text></svg>')
    return "".join(parts)
