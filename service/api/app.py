"""The FastAPI application factory. Importing this module creates nothing: call create_app()."""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from typing import Any

from fastapi import FastAPI
from fastapi.openapi.utils import get_openapi
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service import __version__
from service.api.analyses import build_router
from service.api.integrity import build_integrity_router
from service.api.problems import PROBLEM_MEDIA_TYPE, install_problem_handlers
from service.api.schemas import AnalysisRequest, Health
from service.api.settings import ServiceSettings
from service.archive.store import Archive

DESCRIPTION = (
    "Post a crossover measurement table (JSON, or CSV with settings as query parameters); "
    "get the ratio-of-mean-differences and average-bioequivalence result, an HTML audit report "
    "and a zip bundle, all archived with the SHA-256 of the normalized inputs. Errors are RFC 9457 "
    "problem details.\n\n"
    "Every /v1 call carries `Authorization: Bearer KEY` (keys are made with `python -m service keys "
    "create`; roles: read → GET endpoints; submit → also POST /v1/analyses and reproduction; admin → "
    "everything, including the archive verification). Only while the archive holds no active key "
    "and the service listens on a loopback address does it run open; records then name the "
    "submitter \"unauthenticated\". /healthz needs no key."
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
    archive = Archive.create(settings.database_url, busy_timeout_ms=settings.busy_timeout_ms)

    @asynccontextmanager
    async def lifespan(_app: FastAPI) -> AsyncIterator[None]:
        try:
            yield
        finally:
            archive.close()

    app = FastAPI(
        title="bioparity",
        version=__version__,
        description=DESCRIPTION,
        lifespan=lifespan,
    )
    app.state.settings = settings
    app.state.archive = archive
    install_problem_handlers(app)
    app.include_router(build_router(settings))
    app.include_router(build_integrity_router(settings))

    @app.get("/healthz", response_model=Health, tags=["service"], summary="Liveness")
    async def healthz() -> dict[str, str]:
        return {"status": "ok"}

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is None:
            app.openapi_schema = _openapi_with_request_schema(app)
        return app.openapi_schema

    app.openapi = openapi  # type: ignore[method-assign]
    app.add_middleware(NoSniffMiddleware)
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


class NoSniffMiddleware:
    """Adds X-Content-Type-Options: nosniff to every response (browsers must not guess types)."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return

        async def send_with_header(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = [
                    (name, value)
                    for name, value in message.get("headers", [])
                    if name.lower() != b"x-content-type-options"
                ]
                headers.append((b"x-content-type-options", b"nosniff"))
                message = {**message, "headers": headers}
            await send(message)

        await self.app(scope, receive, send_with_header)
