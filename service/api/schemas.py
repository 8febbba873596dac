"""Response schemas of the HTTP API (documentation of the wire format; storage rows live apart)."""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, Field

from service.intake.models import Design, Profile, Settings, Study
from service.intake.models import Record as RequestRecord


class AnalysisRecord(BaseModel):
    """One archived analysis: its normalized inputs, their hash, the result, and its chain link."""

    id: str = Field(description="archive identifier (32 hexadecimal digits)")
    created_at: str = Field(description="UTC time of archiving, ISO 8601 with microseconds and Z")
    inputs_sha256: str = Field(description="SHA-256 of the RFC 8785 canonical JSON of `inputs`")
    inputs: dict[str, Any] = Field(description="the normalized request, every default filled in")
    result: dict[str, Any] = Field(description="metrics, warnings and engine versions")
    submitter: str = Field(description="who submitted the analysis")
    record_sha256: str = Field(
        description="SHA-256 of the RFC 8785 JSON of inputs_sha256, result, created_at, "
        "submitter and previous_record_sha256"
    )
    previous_record_sha256: str | None = Field(
        description="record_sha256 of the record archived just before; null for the first"
    )


class AnalysisPage(BaseModel):
    items: list[AnalysisRecord]
    total: int = Field(description="number of records that match the filter, over all pages")


class Health(BaseModel):
    status: Literal["ok"]


class AnalysisRequest(BaseModel):
    """The JSON request body (for the schema; service.intake.tables validates every upload)."""

    study: Study | None = None
    design: Design
    records: list[RequestRecord] = Field(default_factory=list)
    profiles: list[Profile] = Field(default_factory=list)
    settings: Settings | None = None
