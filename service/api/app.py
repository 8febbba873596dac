"""The FastAPI application factory. Importing this module creates nothing: call create_app()."""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from datetime import UTC, datetime
from typing import Any

from fastapi import FastAPI
from fastapi.openapi.utils import get_openapi
from starlette.concurrency import run_in_threadpool

from service import __version__
from service.api.analyses import build_router
from service.api.headers import SecurityHeadersMiddleware
from service.api.integrity import build_integrity_router
from service.api.pages import install_pages
from service.api.planning import build_planning_router
from service.api.problems import PROBLEM_MEDIA_TYPE, install_problem_handlers
from service.api.schemas import AnalysisRequest, Health
from service.api.settings import ServiceSettings
from service.api.shares import build_share_router
from service.api.signatures import build_signatures_router
from service.archive.store import Archive
from service.records.warmup import prefer_compiled_loops, warm_up

DESCRIPTION = (
    "Post a crossover measurement table (JSON, or CSV with settings as query parameters); "
    "get the ratio-of-mean-differences and average-bioequivalence result, an HTML audit report "
    "and a zip bundle, all archived with the SHA-256 of the normalized inputs. Errors are RFC 9457 "
    "problem details.\n\n"
    "Every /v1 call carries `Authorization: Bearer KEY` (keys are made with `python -m service keys "
    "create`; roles: read → GET endpoints; submit → also POST /v1/analyses and reproduction; "
    "review → GET endpoints and signing records; admin → everything, including signing and the "
    "archive verification). Only while the archive holds no active key "
    "and the service listens on a loopback address does it run open; records then name the "
    "submitter \"unauthenticated\". /healthz needs no key.\n\n"
    "In a browser, sign in at /login with a key: the GET endpoints then also take the session "
    "cookie; the archive index is /, each record has a page at /analyses/{id}, and /upload "
    "analyses a table from a form."
)

SECURITY_SCHEME = {
    "type": "http",
    "scheme": "bearer",
    "description": "an API key from `python -m service keys create` (it starts with bp_)",
}


def create_app(settings: ServiceSettings | None = None) -> FastAPI:
    """The service over the archive at settings.database_url (default: from the environment).

    The archive is opened here (tables created when missing) and closed at shutdown.
    """
    settings = ServiceSettings.from_env() if settings is None else settings
    prefer_compiled_loops()
    archive = Archive.create(settings.database_url, busy_timeout_ms=settings.busy_timeout_ms)

    @asynccontextmanager
    async def lifespan(_app: FastAPI) -> AsyncIterator[None]:
        if settings.warm_up:
            # uvicorn says "startup complete" only after this: the first request is not the
            # one that loads the compiled kernels.
            await run_in_threadpool(warm_up)
        try:
            yield
        finally:
            archive.close()

    app = FastAPI(
        title="bioparity",
        version=__version__,
        description=DESCRIPTION,
        lifespan=lifespan,
        # /docs and /redoc are served from local files by service.api.pages.docs.
        docs_url=None,
        redoc_url=None,
    )
    app.state.settings = settings
    app.state.archive = archive
    app.state.clock = utc_now
    install_problem_handlers(app)
    app.include_router(build_router(settings))
    app.include_router(build_integrity_router(settings))
    app.include_router(build_planning_router(settings.max_planning_total))
    app.include_router(build_share_router())
    install_pages(app)
    app.include_router(build_signatures_router())

    @app.get("/healthz", response_model=Health, tags=["service"], summary="Liveness")
    async def healthz() -> dict[str, str]:
        return {"status": "ok"}

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is None:
            app.openapi_schema = _openapi_with_request_schema(app)
        return app.openapi_schema

    app.openapi = openapi  # type: ignore[method-assign]
    app.add_middleware(SecurityHeadersMiddleware)
    return app


def _openapi_with_request_schema(app: FastAPI) -> dict[str, Any]:
    # The POST body is read raw (size cap, two media types), so FastAPI cannot see its model;
    # add it to the components by hand.
    schema = get_openapi(
        title=app.title, version=app.version, description=app.description, routes=app.routes
    )
    request_schema = AnalysisRequest.model_json_schema(
        ref_template="#/components/schemas/{model}"
    )
    components = schema.setdefault("components", {}).setdefault("schemas", {})
    for name, definition in request_schema.pop("$defs", {}).items():
        components.setdefault(name, definition)
    components["AnalysisRequest"] = request_schema
    schema["components"].setdefault("securitySchemes", {})["bearer"] = SECURITY_SCHEME
    for path, operations in schema.get("paths", {}).items():
        if path.startswith("/v1/"):
            for operation in operations.values():
                operation["security"] = [{"bearer": []}]
    # FastAPI files every response model under application/json too; problems are only ever
    # sent as application/problem+json, so list that media type alone.
    for operations in schema.get("paths", {}).values():
        for operation in operations.values():
            for response in operation.get("responses", {}).values():
                content = response.get("content", {})
                if PROBLEM_MEDIA_TYPE in content:
                    content.pop("application/json", None)
    return schema


def utc_now() -> datetime:
    return datetime.now(UTC)
