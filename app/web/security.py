"""Protections for a web app that runs on an analyst's laptop next to other browser tabs.

* Host allow-list: refuses requests whose Host header is not this machine (DNS rebinding).
* Origin check on every state-changing request: a page from another site open in the same browser
  cannot upload, remap, start jobs or delete (browsers always send Origin on cross-site POSTs). The
  Origin (or Referer) must match this server's own scheme and port exactly, on an allowed host: a page
  served by another local program (``http://localhost:9999``, ``https://127.0.0.1:4443``) is another
  site too.
* A strict Content-Security-Policy with a per-request nonce, and the usual hardening headers.
* An upload size limit enforced on the declared length and on the bytes actually received.

Written as plain ASGI middleware because it must see every request, including the body stream.
"""

from __future__ import annotations

import secrets
from collections.abc import Awaitable, Callable, MutableMapping
from typing import Any
from urllib.parse import urlsplit

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]
ASGIApp = Callable[[Scope, Receive, Send], Awaitable[None]]

UNSAFE_METHODS = frozenset({"POST", "PUT", "PATCH", "DELETE"})


def content_security_policy(nonce: str) -> str:
    # plotly.js sets inline style attributes on the SVG it draws, hence style-src 'unsafe-inline';
    # scripts are only our own files plus a nonce'd JSON hand-off.
    return (
        "default-src 'self'; "
        f"script-src 'self' 'nonce-{nonce}'; "
        "style-src 'self' 'unsafe-inline'; "
        "img-src 'self' data: blob:; "
        "font-src 'self' data:; "
        "connect-src 'self'; "
        "object-src 'none'; base-uri 'none'; form-action 'self'; frame-ancestors 'none'"
    )


def _host_only(value: str) -> str:
    return _host_port(value)[0]


DEFAULT_PORTS = {"http": 80, "https": 443}


def _host_port(value: str, scheme: str = "http") -> tuple[str, int | None]:
    """(host, port) of a Host header or URL netloc; the scheme's default port when none is written.

    The port is None when it is not a number (such a value never matches).
    """
    value = value.strip().lower()
    if value.startswith("["):
        end = value.find("]")
        host, rest = value[: end + 1], value[end + 1:]
    else:
        host, colon, port_text = value.partition(":")
        rest = colon + port_text
    if not rest:
        return host, DEFAULT_PORTS.get(scheme)
    port_text = rest.removeprefix(":")
    return host, int(port_text) if rest.startswith(":") and port_text.isdecimal() else None


class SecurityMiddleware:
    """Host allow-list, Origin check, CSP nonce, headers and the upload size limit."""

    def __init__(self, app: ASGIApp, *, allowed_hosts: tuple[str, ...], upload_limit: int) -> None:
        self.app = app
        self.allowed_hosts = frozenset(h.lower() for h in allowed_hosts)
        self.upload_limit = upload_limit

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        headers = {k.decode("latin-1").lower(): v.decode("latin-1") for k, v in scope.get("headers", [])}
        host = _host_only(headers.get("host", ""))
        if host not in self.allowed_hosts:
            await _plain(send, 400, f"Host {host!r} is not served here; Helmshift answers only on this machine.")
            return
        method = scope.get("method", "GET").upper()
        if method in UNSAFE_METHODS:
            problem = self._cross_site(headers, scope.get("scheme", "http"))
            if problem:
                await _plain(send, 403, problem)
                return
            declared = headers.get("content-length")
            if declared and declared.isdecimal() and int(declared) > self.upload_limit:
                await _plain(send, 413, self._too_large())
                return
            receive = self._limited(receive)
        nonce = secrets.token_urlsafe(16)
        scope.setdefault("state", {})["csp_nonce"] = nonce

        async def send_with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                extra = [
                    (b"content-security-policy", content_security_policy(nonce).encode()),
                    (b"x-content-type-options", b"nosniff"),
                    (b"x-frame-options", b"DENY"),
                    (b"referrer-policy", b"same-origin"),
                    (b"cross-origin-opener-policy", b"same-origin"),
                    (b"cross-origin-resource-policy", b"same-origin"),
                ]
                message["headers"] = list(message.get("headers", [])) + extra
            await send(message)

        try:
            await self.app(scope, receive, send_with_headers)
        except _UploadTooLarge:
            await _plain(send, 413, self._too_large())

    def _too_large(self) -> str:
        mb = self.upload_limit / (1024 * 1024)
        return (f"The upload is larger than the limit of {mb:g} MB; split the roster or raise "
                "HELMSHIFT_UPLOAD_LIMIT (bytes).")

    def _cross_site(self, headers: dict[str, str], scheme: str) -> str | None:
        """Why a state-changing request must be refused, or None when it comes from this server's pages.

        Same origin means same scheme, same port and an allowed host (the analyst may use 127.0.0.1 or
        localhost for the same server); Origin is checked when sent, otherwise Referer.
        """
        own_port = _host_port(headers.get("host", ""), scheme)[1]

        def foreign(url: str) -> bool:
            parts = urlsplit(url)
            if parts.scheme != scheme:
                return True
            host, port = _host_port(parts.netloc.rpartition("@")[2], parts.scheme)
            return host not in self.allowed_hosts or port is None or port != own_port

        origin = headers.get("origin")
        if origin is not None:
            if origin == "null" or foreign(origin):
                return f"Refused a change requested from another site ({origin})."
            return None
        referer = headers.get("referer")
        if referer and foreign(referer):
            return "Refused a change requested from another site."
        return None

    def _limited(self, receive: Receive) -> Receive:
        received = 0
        limit = self.upload_limit

        async def wrapped() -> Message:
            nonlocal received
            message = await receive()
            if message["type"] == "http.request":
                received += len(message.get("body", b""))
                if received > limit:
                    raise _UploadTooLarge()
            return message

        return wrapped


class _UploadTooLarge(Exception):
    pass


async def _plain(send: Send, status: int, text: str) -> None:
    body = text.encode()
    await send({"type": "http.response.start", "status": status, "headers": [
        (b"content-type", b"text/plain; charset=utf-8"), (b"content-length", str(len(body)).encode()),
    ]})
    await send({"type": "http.response.body", "body": body})
