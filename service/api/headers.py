"""Security headers, set once for every response of the app (ASGI middleware).

Every page is same-origin only: a Content-Security-Policy that grants no external source and no
inline script, no framing, no Referer to other origins (a share link's token must not leak), and
no MIME sniffing. A route that needs another policy (the audit report's inline CSS) sets its own; the API docs
pages get theirs by path, because their scripts come from the service's own static files.
"""

from __future__ import annotations

from starlette.types import ASGIApp, Message, Receive, Scope, Send

# Pages, JSON and static files: no script at all; styles and images only from the service.
PAGE_POLICY = (
    "default-src 'none'; style-src 'self'; img-src 'self' data:; form-action 'self'; "
    "frame-ancestors 'none'; base-uri 'none'"
)
# Swagger UI: its bundle and our init script from /assets, the OpenAPI document by fetch.
DOCS_POLICY = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
    "connect-src 'self'; form-action 'self'; frame-ancestors 'none'; base-uri 'none'"
)
# ReDoc writes its styles into <style> elements at run time (so 'unsafe-inline' for styles, never
# for scripts) and runs its search index in a worker it builds from a blob: URL.
REDOC_POLICY = (
    "default-src 'none'; script-src 'self'; style-src 'self' 'unsafe-inline'; "
    "img-src 'self' data:; connect-src 'self'; worker-src blob:; form-action 'none'; "
    "frame-ancestors 'none'; base-uri 'none'"
)
POLICY_BY_PATH = {"/docs": DOCS_POLICY, "/redoc": REDOC_POLICY}

_ALWAYS = {
    b"x-content-type-options": b"nosniff",
    b"x-frame-options": b"DENY",
    # same-origin, not no-referrer: under no-referrer browsers send "Origin: null" with form
    # posts, and the pages' CSRF check compares Origin with the host. Another origin never sees
    # a path of ours (a share link's token) either way.
    b"referrer-policy": b"same-origin",
}


class SecurityHeadersMiddleware:
    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        policy = POLICY_BY_PATH.get(scope.get("path", ""), PAGE_POLICY).encode("ascii")

        async def send_with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = [
                    (name, value) for name, value in message.get("headers", [])
                    if name.lower() not in _ALWAYS
                ]
                headers.extend(_ALWAYS.items())
                if not any(name.lower() == b"content-security-policy" for name, _ in headers):
                    headers.append((b"content-security-policy", policy))
                message = {**message, "headers": headers}
            await send(message)

        await self.app(scope, receive, send_with_headers)
