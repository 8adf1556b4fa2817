"""Exposure controls: security headers on every response, and an access token off loopback.

On 127.0.0.1 (the default) anyone who can reach the port is already on this machine, so no token
is asked. On any other address every request must carry the access token: an
``Authorization: Bearer …`` or ``X-Pellucid-Token`` header for scripts, or the cookie that a
one-time sign-in link sets for browsers. The link's code works once; the cookie holds the token.
"""

from __future__ import annotations

import hmac
import ipaddress
import secrets
import threading
from collections.abc import Awaitable, Callable
from dataclasses import dataclass, field
from http.cookies import SimpleCookie
from urllib.parse import parse_qs, urlencode

COOKIE = "pellucid_token"

# Only this server's own origin may supply scripts, styles, images and connections; no framing.
CONTENT_SECURITY_POLICY = (
    "default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data: blob:; "
    "connect-src 'self'; font-src 'self'; object-src 'none'; base-uri 'self'; form-action 'self'; "
    "frame-ancestors 'none'"
)
SECURITY_HEADERS = [
    (b"content-security-policy", CONTENT_SECURITY_POLICY.encode()),
    (b"x-content-type-options", b"nosniff"),
    (b"x-frame-options", b"DENY"),
    (b"referrer-policy", b"no-referrer"),
    (b"cross-origin-opener-policy", b"same-origin"),
    (b"cross-origin-resource-policy", b"same-origin"),
]


def is_loopback(host: str) -> bool:
    if host in ("localhost", "localhost.localdomain"):
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


@dataclass
class AccessGuard:
    """The token and the pending one-time sign-in codes of one server."""

    token: str
    _codes: set[str] = field(default_factory=set)
    _lock: threading.Lock = field(default_factory=threading.Lock)

    @classmethod
    def create(cls, token: str | None = None) -> AccessGuard:
        return cls(token=token or secrets.token_urlsafe(24))

    def new_sign_in_code(self) -> str:
        code = secrets.token_urlsafe(18)
        with self._lock:
            self._codes.add(code)
        return code

    def sign_in_link(self, base_url: str) -> str:
        return f"{base_url.rstrip('/')}/?{urlencode({'sign-in': self.new_sign_in_code()})}"

    def redeem(self, code: str) -> bool:
        with self._lock:
            if code in self._codes:
                self._codes.discard(code)
                return True
        return False

    def accepts(self, presented: str | None) -> bool:
        return bool(presented) and hmac.compare_digest(presented.encode(), self.token.encode())


Scope = dict
Receive = Callable[[], Awaitable[dict]]
Send = Callable[[dict], Awaitable[None]]


class SecurityMiddleware:
    """Adds the security headers to every response and enforces the token when one is set."""

    def __init__(self, app, *, guard: AccessGuard | None) -> None:
        self.app = app
        self.guard = guard

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return

        async def send_with_headers(message: dict) -> None:
            if message["type"] == "http.response.start":
                headers = [(k, v) for k, v in message.get("headers", []) if k.lower() not in
                           {h for h, _ in SECURITY_HEADERS}]
                message = {**message, "headers": headers + SECURITY_HEADERS}
            await send(message)

        if self.guard is not None:
            decision = self._check(scope)
            if decision is not None:
                await decision(send_with_headers)
                return
        await self.app(scope, receive, send_with_headers)

    def _check(self, scope: Scope) -> Callable[[Send], Awaitable[None]] | None:
        assert self.guard is not None
        headers = {k.decode("latin-1").lower(): v.decode("latin-1") for k, v in scope.get("headers", [])}
        query = parse_qs(scope.get("query_string", b"").decode("latin-1"))
        code = (query.get("sign-in") or [None])[0]
        if code is not None:
            if self.guard.redeem(code):
                return _redirect_setting_cookie(scope.get("path", "/"), self.guard.token)
            return _deny("this sign-in link was already used or is not valid; ask for a new one")
        presented = None
        auth = headers.get("authorization", "")
        if auth.lower().startswith("bearer "):
            presented = auth[7:].strip()
        presented = presented or headers.get("x-pellucid-token")
        if presented is None and "cookie" in headers:
            jar = SimpleCookie()
            jar.load(headers["cookie"])
            if COOKIE in jar:
                presented = jar[COOKIE].value
        if self.guard.accepts(presented):
            return None
        return _deny("this Pellucid server needs its access token: open the sign-in link printed at start, "
                     "or send the token in an 'Authorization: Bearer …' header")


def _deny(message: str) -> Callable[[Send], Awaitable[None]]:
    import json

    body = json.dumps({"detail": message, "error": "AccessDenied"}).encode()

    async def respond(send: Send) -> None:
        await send({"type": "http.response.start", "status": 401,
                    "headers": [(b"content-type", b"application/json"), (b"content-length", str(len(body)).encode()),
                                (b"www-authenticate", b"Bearer")]})
        await send({"type": "http.response.body", "body": body})

    return respond


def _redirect_setting_cookie(path: str, token: str) -> Callable[[Send], Awaitable[None]]:
    cookie = f"{COOKIE}={token}; Path=/; HttpOnly; SameSite=Strict"

    async def respond(send: Send) -> None:
        await send({"type": "http.response.start", "status": 303,
                    "headers": [(b"location", (path or "/").encode()), (b"set-cookie", cookie.encode()),
                                (b"content-length", b"0")]})
        await send({"type": "http.response.body", "body": b""})

    return respond
