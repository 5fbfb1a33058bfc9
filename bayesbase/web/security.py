"""The desk's guard, one ASGI middleware in front of every route:

1. **Host check** (DNS rebinding): on loopback only the names this machine uses for itself are
   accepted in the Host header, so a page elsewhere cannot reach the desk under its own name.
2. **Access token** (any host other than loopback): every request carries the token printed by
   ``bayesbase serve``: once in the address (``?token=``; answered with a cookie and a redirect
   to the same address without it), then in an HttpOnly, SameSite=Strict cookie, or as
   ``Authorization: Bearer <token>``. Compared in constant time.
3. **CSRF**: a random token in an HttpOnly, SameSite=Strict cookie and in a hidden field of
   every form that changes anything (double submit); :func:`verify_csrf` refuses a POST whose
   field does not match the cookie, or whose Origin is another site.
4. **Upload limit**: a request body over the limit is refused with 413 and a clear message,
   whether the client announced its length or not; nothing of it is kept.
5. **Headers** on every answer: a Content-Security-Policy without inline script (scripts and
   styles only from the desk itself, no other origin, no framing), nosniff, no referrer, and
   ``Cache-Control: no-store`` (patient data stay out of caches).
"""
from __future__ import annotations

import hmac
import secrets
import urllib.parse
from http.cookies import SimpleCookie

from .config import DeskConfig, DeskError
from .render import CSRF_FIELD, error_html

__all__ = ["DeskGuard", "CSP", "CSRF_COOKIE", "ACCESS_COOKIE", "new_token", "verify_csrf",
           "csrf_token"]

CSRF_COOKIE = "bayesbase_csrf"
ACCESS_COOKIE = "bayesbase_access"
CSP = ("default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; "
       "connect-src 'self'; form-action 'self'; base-uri 'none'; frame-ancestors 'none'")
_HEADERS = (
    (b"content-security-policy", CSP.encode()),
    (b"x-content-type-options", b"nosniff"),
    (b"referrer-policy", b"no-referrer"),
    (b"x-frame-options", b"DENY"),
    (b"cross-origin-opener-policy", b"same-origin"),
    (b"cross-origin-resource-policy", b"same-origin"),
)


def new_token() -> str:
    """A random token (32 bytes from :mod:`secrets`, URL-safe text)."""
    return secrets.token_urlsafe(32)


class UploadTooLarge(Exception):
    """The request body went past the upload limit."""


def _headers(scope) -> dict[str, str]:
    return {k.decode("latin-1").lower(): v.decode("latin-1") for k, v in scope["headers"]}


def _cookies(headers: dict[str, str]) -> dict[str, str]:
    jar = SimpleCookie()
    try:
        jar.load(headers.get("cookie", ""))
    except Exception:  # a malformed cookie header counts as no cookie
        return {}
    return {k: m.value for k, m in jar.items()}


def _host_name(host_header: str) -> str:
    host = host_header.strip()
    if host.startswith("["):  # [::1]:8765
        return host[1:host.find("]")] if "]" in host else host
    return host.rsplit(":", 1)[0] if host.count(":") == 1 else host


def _same(a: str | None, b: str | None) -> bool:
    return bool(a) and bool(b) and hmac.compare_digest(str(a).encode(), str(b).encode())


def _cookie_header(name: str, value: str) -> tuple[bytes, bytes]:
    return (b"set-cookie",
            f"{name}={value}; Path=/; HttpOnly; SameSite=Strict".encode("latin-1"))


def csrf_token(request) -> str:
    """The CSRF token of this browser (set by :class:`DeskGuard` on the request's scope)."""
    return request.scope.get("state", {}).get("csrf", "")


def verify_csrf(request, form) -> None:
    """Refuse (403) a form whose CSRF field does not match this browser's cookie, or a request
    whose Origin header names another site."""
    origin = request.headers.get("origin")
    if origin and origin != "null":
        host = urllib.parse.urlsplit(origin).netloc
        if host.lower() != request.headers.get("host", "").lower():
            raise DeskError(403, "Refused", "this form was sent from another site")
    if not _same(form.get(CSRF_FIELD), request.cookies.get(CSRF_COOKIE)):
        raise DeskError(403, "Refused: the form's security token is missing or out of date",
                        "reload the page and send the form again")


class DeskGuard:
    """ASGI middleware: host check, access token, CSRF cookie, upload limit and headers."""

    def __init__(self, app, config: DeskConfig):
        self.app = app
        self.config = config

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        headers = _headers(scope)
        cookies = _cookies(headers)
        refusal = self._refusal(scope, headers, cookies)
        if refusal is not None:
            await self._send_page(send, *refusal)
            return
        if self.config.token and _query_token(scope) is not None:
            await self._redirect_without_token(scope, send)
            return
        extra = []
        csrf = cookies.get(CSRF_COOKIE, "")
        if not (20 <= len(csrf) <= 100 and csrf.replace("-", "").replace("_", "").isalnum()):
            csrf = new_token()
            extra.append(_cookie_header(CSRF_COOKIE, csrf))
        scope.setdefault("state", {})["csrf"] = csrf
        await self._call_app(scope, receive, send, headers, extra)

    # -- refusals ---------------------------------------------------------------------------
    def _refusal(self, scope, headers, cookies):
        """(status, title, message) when the request is refused before any route, else None."""
        cfg = self.config
        if cfg.allowed_hosts is not None:
            host = _host_name(headers.get("host", ""))
            if host not in cfg.allowed_hosts:
                return (400, "Refused: unknown host name",
                        f"this desk answers to {', '.join(cfg.allowed_hosts)} only")
        if cfg.token:
            given = _query_token(scope)
            if given is None:
                auth = headers.get("authorization", "")
                given = auth[7:].strip() if auth.lower().startswith("bearer ") else None
            if given is None:
                given = cookies.get(ACCESS_COOKIE)
            if not _same(given, cfg.token):
                return (401, "Access token required",
                        "open the address that bayesbase serve printed (it carries the token)")
        length = headers.get("content-length")
        if length and length.isdigit() and int(length) > cfg.max_upload_bytes:
            return self._too_large()
        return None

    def _too_large(self):
        return (413, "File too large",
                f"the upload is larger than this desk's limit of {limit_text(self.config)} "
                "(bayesbase serve --max-upload-mb); nothing was stored")

    # -- answering --------------------------------------------------------------------------
    async def _send_page(self, send, status, title, message, extra=()):
        body = error_html(status, title, message).encode("utf-8")
        await send({"type": "http.response.start", "status": status,
                    "headers": [(b"content-type", b"text/html; charset=utf-8"),
                                (b"content-length", str(len(body)).encode()),
                                (b"cache-control", b"no-store"), *_HEADERS, *extra]})
        await send({"type": "http.response.body", "body": body})

    async def _redirect_without_token(self, scope, send):
        query = [(k, v) for k, v in urllib.parse.parse_qsl(scope.get("query_string", b"").decode(),
                                                           keep_blank_values=True)
                 if k != "token"]
        target = scope.get("path", "/") + ("?" + urllib.parse.urlencode(query) if query else "")
        await send({"type": "http.response.start", "status": 303,
                    "headers": [(b"location", target.encode("latin-1", "replace")),
                                (b"content-length", b"0"), (b"cache-control", b"no-store"),
                                _cookie_header(ACCESS_COOKIE, self.config.token), *_HEADERS]})
        await send({"type": "http.response.body", "body": b""})

    async def _call_app(self, scope, receive, send, headers, extra):
        limit = self.config.max_upload_bytes
        seen = 0
        started = False

        async def limited_receive():
            nonlocal seen
            message = await receive()
            if message["type"] == "http.request":
                seen += len(message.get("body", b""))
                if seen > limit:
                    raise UploadTooLarge()
            return message

        async def guarded_send(message):
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
                names = {k.lower() for k, _ in message.get("headers", [])}
                add = [h for h in _HEADERS if h[0] not in names] + list(extra)
                if b"cache-control" not in names:
                    add.append((b"cache-control", b"no-store"))
                message = {**message, "headers": [*message.get("headers", []), *add]}
            await send(message)

        try:
            await self.app(scope, limited_receive, guarded_send)
        except UploadTooLarge:
            if started:
                raise
            await self._send_page(send, *self._too_large(), extra=extra)


def limit_text(config: DeskConfig) -> str:
    """The upload limit for people: '50 MB' (1 MB = 1,048,576 bytes), or bytes below 1 MB."""
    if config.max_upload_bytes < 1024 * 1024:
        return f"{config.max_upload_bytes} bytes"
    return f"{config.max_upload_mb:g} MB"


def _query_token(scope) -> str | None:
    for k, v in urllib.parse.parse_qsl(scope.get("query_string", b"").decode("latin-1"),
                                       keep_blank_values=True):
        if k == "token":
            return v
    return None
