"""A warning attached to a statistical result: a stable code and a sentence for people."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Diagnostic:
    code: str
    message: str
