"""The one path from an uploaded body to an archived record, shared by POST /v1/analyses and the
upload page, so that the same upload gives the same record and inputs hash through either door."""

from __future__ import annotations

import time
from collections.abc import Mapping
from typing import Any

from service.api.limits import check_work, time_exceeded
from service.api.settings import ServiceSettings
from service.archive.store import Archive
from service.intake.reading import BodyKind, read_for_record
from service.records.building import build_record_and_texts
from service.stats.deadlines import ComputeTimeExceeded


def analyse_and_archive(
    archive: Archive,
    settings: ServiceSettings,
    kind: BodyKind,
    body: bytes,
    query: Mapping[str, str],
    submitter: str,
    *,
    idempotency_key: str | None = None,
    fingerprint: str | None = None,
) -> tuple[dict[str, Any], bool]:
    """(the archived record, whether it is the replay of an earlier request with the same
    Idempotency-Key). A new record is not read back from its stored texts (its json_text is
    them; callers answer with that and its id). Blocking: parsing, resampling and the archive
    write; run it off the loop.

    Raises InvalidRequest (every problem of the upload), ProblemError 422 (work or time cap) and
    IdempotencyConflict; nothing is archived then.
    """
    if idempotency_key is not None:
        if fingerprint is None:
            raise ValueError("an idempotency key needs the request fingerprint")
        # A retry is answered from the archive before any parsing or computing.
        earlier = archive.find_idempotent(
            submitter=submitter, idempotency_key=idempotency_key, request_sha256=fingerprint
        )
        if earlier is not None:
            return earlier, True
    # The cap covers reading and checking the table too, not only the statistics.
    deadline = time.monotonic() + settings.max_compute_seconds
    inputs, tables, plain_records = read_for_record(kind, body, query,
                                                    max_records=settings.max_records)
    check_work(inputs, settings.max_work)
    try:
        record, texts = build_record_and_texts(inputs, deadline=deadline,
                                               threads=settings.bootstrap_threads or None,
                                               tables=tables, plain_records=plain_records)
    except ComputeTimeExceeded as exc:
        raise time_exceeded(exc, settings.max_compute_seconds) from None
    if idempotency_key is None or fingerprint is None:
        return archive.insert(record, submitter=submitter, texts=texts, read_back=False), False
    return archive.insert_once(
        record, submitter=submitter, idempotency_key=idempotency_key, request_sha256=fingerprint,
        texts=texts, read_back=False,
    )
