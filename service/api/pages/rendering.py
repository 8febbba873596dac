"""Rendering the browser pages: one Jinja environment over templates/pages, escaping everything.

Pages are plain HTML and CSS (no script): every value a user typed is escaped by autoescape, and
bidirectional formatting controls are shown as their code points, as in the audit report.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from functools import lru_cache
from typing import Any

import jinja2
from markupsafe import Markup
from starlette.requests import Request
from starlette.responses import HTMLResponse, RedirectResponse, Response

from service.api.pages.viewers import Viewer, set_form_cookie
from service.intake.problems import format_loc
from service.report.formatting import VERDICT_WORDS, fmt, level_percent
from service.report.rendering import templates_folder

# Explicit directional formatting characters (Unicode UAX #9, section 2) in user text would make
# a page show something other than what was stored; the templates have none.
_BIDI_CONTROLS = re.compile("[\u061c\u200e\u200f\u202a-\u202e\u2066-\u2069]")

CAUTION = (
    "bioparity is an aid, not a substitute for the protocol's statistical analysis plan, a "
    "qualified statistician's review, or the applicable regulatory guidance (ICH, FDA, EMA and "
    "local authorities). The acceptance limits, confidence level and methods are settings: the "
    "protocol must fix them in advance, and each record page and report states the ones used."
)


def _visible(value: Any) -> Any:
    if isinstance(value, Markup):
        # Markup (a macro's output, already escaped and finalised piece by piece) is a str too:
        # turning it back into a plain str would escape it a second time.
        return value
    if isinstance(value, str):
        return _BIDI_CONTROLS.sub(lambda match: f"[U+{ord(match.group()):04X}]", value)
    return value


@lru_cache(maxsize=1)
def environment() -> jinja2.Environment:
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(templates_folder() / "pages")),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        finalize=_visible,
    )
    env.filters.update(
        fmt=fmt, level=level_percent, where=format_loc,
        verdict=lambda code: VERDICT_WORDS.get(str(code), str(code) or "undetermined"),
    )
    return env


def render_page(
    request: Request,
    template: str,
    viewer: Viewer,
    *,
    status: int = 200,
    headers: Mapping[str, str] | None = None,
    **context: Any,
) -> HTMLResponse:
    html = environment().get_template(template).render(
        viewer=viewer, caution=CAUTION, path=request.url.path, **context
    )
    response = HTMLResponse(html, status_code=status, headers=dict(headers or {}))
    # Pages show archive data to one signed-in person: no shared or back-button cache.
    response.headers["Cache-Control"] = "no-store"
    if viewer.new_form_cookie:
        set_form_cookie(response, request, viewer.csrf_token)
    return response


def see_other(location: str) -> Response:
    response = RedirectResponse(location, status_code=303)
    response.headers["Cache-Control"] = "no-store"
    return response
