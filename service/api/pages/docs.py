"""The API reference at /docs (Swagger UI) and /redoc (ReDoc), from files on this machine.

The Swagger UI and ReDoc bundles come from the installed fastapi-offline package and are served
by StaticFiles from its folder, so the pages work in a network without internet and load nothing
from another origin. Swagger UI starts from a script served here (never an inline one), so the
policy script-src 'self' holds on /docs.
"""

from __future__ import annotations

import json
from pathlib import Path

import fastapi_offline
from fastapi import APIRouter, FastAPI
from fastapi.openapi.docs import get_redoc_html, swagger_ui_default_parameters
from starlette.responses import HTMLResponse, Response
from starlette.staticfiles import StaticFiles

from service.api.pages.rendering import environment
from service.report.rendering import templates_folder

VENDOR_PREFIX = "/assets/vendor"
SITE_PREFIX = "/assets/site"
SWAGGER_INIT = "/assets/swagger-init.js"


def vendor_folder() -> Path:
    return Path(fastapi_offline.__file__).resolve().parent / "static"


def site_folder() -> Path:
    return templates_folder() / "pages" / "static"


def swagger_init_script(openapi_url: str) -> str:
    options = {
        **swagger_ui_default_parameters,
        "url": openapi_url,
        # No badge that asks an outside validator about the document.
        "validatorUrl": None,
    }
    return (
        "// Starts Swagger UI on the page (served as a file: the page allows no inline script).\n"
        "window.addEventListener('load', function () {\n"
        f"  var options = {json.dumps(options, sort_keys=True)};\n"
        "  options.presets = [SwaggerUIBundle.presets.apis, SwaggerUIBundle.SwaggerUIStandalonePreset];\n"
        "  window.ui = SwaggerUIBundle(options);\n"
        "});\n"
    )


def install_docs(app: FastAPI) -> None:
    """Mount the asset folders and add /docs, /redoc and the Swagger UI start script."""
    app.mount(VENDOR_PREFIX, StaticFiles(directory=vendor_folder()), name="vendor-assets")
    app.mount(SITE_PREFIX, StaticFiles(directory=site_folder()), name="site-assets")
    router = APIRouter(include_in_schema=False)
    openapi_url = app.openapi_url or "/openapi.json"
    script = swagger_init_script(openapi_url)

    @router.get("/docs")
    def swagger_page() -> Response:
        html = environment().get_template("docs.html.j2").render(
            title=f"{app.title} API reference", css=f"{VENDOR_PREFIX}/swagger-ui.css",
            bundle=f"{VENDOR_PREFIX}/swagger-ui-bundle.js", init=SWAGGER_INIT,
            openapi_url=openapi_url,
        )
        return HTMLResponse(html)

    @router.get(SWAGGER_INIT)
    def swagger_init() -> Response:
        return Response(script, media_type="text/javascript; charset=utf-8")

    @router.get("/redoc")
    def redoc_page() -> Response:
        return get_redoc_html(
            openapi_url=openapi_url, title=f"{app.title} API reference",
            redoc_js_url=f"{VENDOR_PREFIX}/redoc.standalone.js",
            redoc_favicon_url=f"{VENDOR_PREFIX}/favicon.png", with_google_fonts=False,
        )

    app.include_router(router)
