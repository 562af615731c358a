"""Security headers, the Content-Security-Policy, and the request's language (pure ASGI).

The policy allows scripts only from the app itself (no inline script, no eval), so the pages and
plotly.js work offline and injected markup cannot run. Plotly sets inline ``style`` attributes,
hence ``style-src 'self' 'unsafe-inline'`` (styles cannot run code). The interactive API docs at
``/docs`` (web/apidocs.py) load Swagger UI and its start script from the app under the same policy.
"""

from __future__ import annotations

from collections.abc import Awaitable, Callable, MutableMapping
from http.cookies import SimpleCookie
from typing import Any
from urllib.parse import parse_qs

from web.i18n import choose_language, current_language

__all__ = ["CSP", "SecurityHeaders"]

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]
ASGIApp = Callable[[Scope, Receive, Send], Awaitable[None]]

CSP = (
    "default-src 'self'; script-src 'self'; style-src 'self' 'unsafe-inline'; "
    "img-src 'self' data:; font-src 'self'; connect-src 'self'; object-src 'none'; "
    "base-uri 'none'; form-action 'self'; frame-ancestors 'none'"
)
_HEADERS = [
    (b"x-content-type-options", b"nosniff"),
    (b"x-frame-options", b"DENY"),
    (b"referrer-policy", b"same-origin"),
    (b"permissions-policy", b"camera=(), microphone=(), geolocation=(), interest-cohort=()"),
    (b"cross-origin-opener-policy", b"same-origin"),
]


class SecurityHeaders:
    """Adds security headers to every response and sets :data:`current_language`."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        headers = {k.decode("latin-1"): v.decode("latin-1") for k, v in scope["headers"]}
        query = parse_qs(scope.get("query_string", b"").decode("latin-1")).get("lang", [None])[0]
        cookie = SimpleCookie()
        try:
            cookie.load(headers.get("cookie", ""))
        except Exception:  # noqa: BLE001 - a malformed cookie header only loses the language
            cookie = SimpleCookie()
        lang = choose_language(
            query, cookie["tw_lang"].value if "tw_lang" in cookie else None,
            headers.get("accept-language"),
        )
        token = current_language.set(lang)
        scope.setdefault("state", {})["lang"] = lang
        secure = scope.get("scheme") == "https"

        async def send_with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                extra = list(_HEADERS)
                extra.append((b"content-security-policy", CSP.encode()))
                if secure:
                    extra.append((b"strict-transport-security", b"max-age=31536000"))
                message["headers"] = list(message.get("headers", [])) + extra
            await send(message)

        try:
            await self.app(scope, receive, send_with_headers)
        finally:
            current_language.reset(token)
