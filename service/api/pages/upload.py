"""GET/POST /upload: analyse a CSV table or JSON request from a form, through the API's own path.

The form's fields are named like the query parameters of a CSV upload and reach
service.intake.reading.read_request exactly as those would, so a table uploaded here gets the
record and inputs hash that POST /v1/analyses would give it. A refused upload lists every
problem (CSV line and column) and keeps what was typed; nothing is archived.
"""

from __future__ import annotations

from functools import partial
from pathlib import PurePath

from fastapi import APIRouter, Request
from starlette.concurrency import run_in_threadpool
from starlette.datastructures import UploadFile
from starlette.responses import Response

from service.api.pages.forms import read_form
from service.api.pages.rendering import render_page, see_other
from service.api.pages.viewers import Viewer, check_form, require_viewer
from service.api.pages.views import PageProblem, page_problems
from service.api.problems import ProblemError
from service.api.settings import ServiceSettings
from service.api.submissions import analyse_and_archive
from service.intake.csvinput import SETTING_FIELDS
from service.intake.problems import InvalidRequest, Problem
from service.intake.reading import BodyKind

# Where a problem of the normalized request points on the form (longest prefix first).
FIELD_OF: dict[tuple[str | int, ...], str] = {
    ("settings", "limits", "lower"): "limit_lower",
    ("settings", "limits", "upper"): "limit_upper",
    **{("query", name): name for name in SETTING_FIELDS},
    **{(part, name): name for name in SETTING_FIELDS for part in ("study", "design", "settings")},
}
# The form's groups and labels; every name is a CSV query parameter (service.intake.csvinput).
GROUPS: tuple[tuple[str, tuple[tuple[str, str], ...]], ...] = (
    ("Study", (("title", "Title"), ("analyte", "Analyte (what was measured)"), ("unit", "Unit"))),
    ("Treatments as labelled in the table", (
        ("test", "Test treatment"), ("reference", "Reference treatment"),
        ("baseline", "Baseline or placebo treatment (if any)"))),
    ("Analysis settings", (
        ("replicates", "Bootstrap replicates"), ("seed", "Seed of the resampling"),
        ("confidence_level", "Confidence level"), ("interval", "Interval method"),
        ("limit_lower", "Lower acceptance limit of θ"),
        ("limit_upper", "Upper acceptance limit of θ"),
        ("stratify_by_sequence", "Resample within sequence groups"),
        ("incomplete_subjects", "Subjects without every treatment"))),
)
CHOICES = {
    "interval": ("percentile", "basic", "normal", "bca"),
    "incomplete_subjects": ("exclude", "reject"),
    "stratify_by_sequence": ("true", "false"),
}


def build_upload_router() -> APIRouter:
    router = APIRouter(include_in_schema=False)

    @router.get("/upload")
    def upload_page(request: Request) -> Response:
        viewer = require_viewer(request, "submit")
        return _form_page(request, viewer, {}, [])

    @router.post("/upload")
    async def upload(request: Request) -> Response:
        settings: ServiceSettings = request.app.state.settings
        viewer = await run_in_threadpool(require_viewer, request, "submit")
        form = await read_form(request, max_bytes=settings.max_body_bytes, files=True)
        try:
            check_form(request, viewer, form.get("csrf_token"))
            typed = {name: value for name in SETTING_FIELDS
                     if isinstance(value := form.get(name), str)}
            values = {name: value for name, value in typed.items() if value != ""}
            upload = form.get("file")
            body, name = b"", ""
            if isinstance(upload, UploadFile):
                body, name = await upload.read(), upload.filename or ""
        finally:
            await form.close()
        if not body:
            message = (f"the chosen file {name!r} is empty" if name
                       else "choose the CSV table or JSON request to analyse")
            return _form_page(request, viewer, typed, [PageProblem("File", message, "file")],
                              status=422)
        kind = _kind_of(name, body)
        if kind == "json" and values:
            return _form_page(request, viewer, typed, [
                PageProblem(f"field {field}", "applies to CSV tables only; a JSON request "
                            "carries its settings inside, so leave this field empty", field)
                for field in values], status=422)
        submitter = viewer.label or settings.submitter
        try:
            stored, _replayed = await run_in_threadpool(partial(
                analyse_and_archive, request.app.state.archive, settings, kind, body, values,
                submitter))
        except InvalidRequest as exc:
            return _form_page(request, viewer, typed, _problems(exc.problems, name), status=422)
        except ProblemError as exc:
            if exc.status != 422:
                raise
            problems = [Problem(tuple(loc), msg) for loc, msg in exc.errors]
            return _form_page(request, viewer, typed, _problems(problems, name, exc.detail),
                              status=422)
        return see_other(f"/analyses/{stored['id']}")

    return router


def _form_page(request: Request, viewer: Viewer, typed: dict[str, str],
               problems: list[PageProblem], *, status: int = 200) -> Response:
    file_problem = any(p.field == "file" for p in problems)
    return render_page(
        request, "upload.html.j2", viewer, status=status if problems else 200, typed=typed,
        problems=problems, groups=form_groups(), hints=SETTING_FIELDS, choices=CHOICES,
        file_problem=file_problem,
        max_bytes=request.app.state.settings.max_body_bytes,
    )


def form_groups() -> list[tuple[str, tuple[tuple[str, str], ...]]]:
    """GROUPS, plus any flat setting that the CSV intake has and GROUPS does not name yet."""
    named = {name for _, fields in GROUPS for name, _ in fields}
    others = tuple((name, name.replace("_", " ").capitalize())
                   for name in SETTING_FIELDS if name not in named)
    kept = [(heading, tuple(f for f in fields if f[0] in SETTING_FIELDS)) for heading, fields in GROUPS]
    return [*kept, *([("Further settings", others)] if others else [])]


def _problems(problems: list[Problem], filename: str, detail: str | None = None) -> list[PageProblem]:
    rows = page_problems(problems, FIELD_OF, default_field="file")
    if detail:
        rows.insert(0, PageProblem("Analysis", detail, None))
    if any(row.field == "file" for row in rows):
        shown = f" ({filename})" if filename else ""
        rows.append(PageProblem("File", f"browsers do not keep a chosen file after a refusal: "
                                f"choose the file{shown} again before you send the form", "file"))
    return rows


def _kind_of(filename: str, body: bytes) -> BodyKind:
    # As the command line decides (by the name's ending, else by the content).
    suffix = PurePath(filename).suffix.lower()
    if suffix == ".json":
        return "json"
    if suffix in (".csv", ".tsv", ".txt"):
        return "csv"
    return "json" if body.lstrip(b"\xef\xbb\xbf \t\r\n")[:1] in (b"{", b"[") else "csv"

