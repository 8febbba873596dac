"""Render a record as one self-contained HTML audit report (inline CSS and SVG, no script)."""

from __future__ import annotations

import re
from collections.abc import Sequence
from functools import lru_cache
from pathlib import Path
from typing import Any

import jinja2

from service.report.context import report_context
from service.report.formatting import (
    capitalize_first,
    computable,
    fmt,
    level_percent,
    sig,
    signed,
)
from service.report.signatures import signatures_view

TEMPLATE_NAME = "report.html.j2"

# Explicit directional formatting characters (Unicode UAX #9, section 2): in user text they make
# the report display something other than what was submitted ("Trojan Source", CVE-2021-42574).
# The template has none, so every one in the output came from the record; show each as its code.
_BIDI_CONTROLS = re.compile("[\u061c\u200e\u200f\u202a-\u202e\u2066-\u2069]")


def templates_folder() -> Path:
    return Path(__file__).resolve().parents[2] / "templates"


def _compiled_template_cache() -> jinja2.BytecodeCache | None:
    # Compiling the report template takes a process about 80 ms, reading it compiled about 1 ms:
    # jinja's own cache of compiled templates, in its per-user folder (created private, checked
    # to be the user's), keyed by the template's name and a checksum of its source. Where no
    # such folder can be made the template is compiled each time, as before.
    try:
        return jinja2.FileSystemBytecodeCache()
    except (OSError, RuntimeError):
        return None


@lru_cache(maxsize=1)
def environment() -> jinja2.Environment:
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(templates_folder())),
        bytecode_cache=_compiled_template_cache(),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )
    env.filters.update(
        fmt=fmt, sig=sig, signed=signed, level=level_percent, computable=computable,
        capitalize_first=capitalize_first,
    )
    return env


def render_report(record: dict[str, Any], signatures: Sequence[Any] | None = None) -> bytes:
    """The HTML audit report for one record (UTF-8), byte-identical for the same record and the
    same signatures (in any order). With `signatures` (a list, maybe empty) the report has a
    "Signatures" section; without (None) it has none, as for a record not archived.

    Raises ValueError naming the field when the record lacks a part the report needs.
    """
    context = report_context(record)
    context["signatures"] = signatures_view(signatures, record)
    html = environment().get_template(TEMPLATE_NAME).render(**context)
    html = _BIDI_CONTROLS.sub(lambda match: f"[U+{ord(match.group()):04X}]", html)
    return html.encode("utf-8")
