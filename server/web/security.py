"""Exposure controls: who may talk to the server, from which page, and with how much data.

Every request passes these checks, in this order, before any route runs:

1. **Proxy headers without a token.** A loopback server without a token trusts that only this
   machine reaches it. A request that carries ``Forwarded``, ``X-Forwarded-For`` and the like came
   through a proxy, which may expose the server to anyone; it is refused until a token is set.
2. **Host allow-list** (no token set). A page on another site can rebind its own name to
   127.0.0.1 and then call the server as if it were same-origin (DNS rebinding). Its requests
   still name the foreign host in ``Host``, so only 127.0.0.1, localhost, [::1], the configured
   host and ``allowed_hosts`` are answered, on any port.
3. **Access token** (off loopback, or whenever one is given): an ``Authorization: Bearer …`` or
   ``X-Pellucid-Token`` header for scripts, or the cookie that a one-time sign-in link sets for
   browsers. Wrong tokens from one client lead to a short, growing back-off (429).
4. **Cross-origin writes.** POST, PUT, PATCH and DELETE (multipart uploads included, which a
   browser sends to any origin without asking) are refused when ``Sec-Fetch-Site`` says another
   site or origin, or ``Origin`` names another origin than the request's own host.
5. **Body size.** Request bodies other than image uploads are read up to ``max_body_bytes``;
   a larger one gets 413 before the route parses it. Uploads are counted against their own,
   larger cap by their router while they stream in.

Security headers (a content security policy allowing only this origin, no sniffing, no framing)
go on every response, refusals included.
"""

from __future__ import annotations

import hmac
import ipaddress
import json
import math
import secrets
import socket
import threading
import time
from collections import OrderedDict
from collections.abc import Awaitable, Callable
from dataclasses import dataclass, field
from http.cookies import CookieError, SimpleCookie
from urllib.parse import parse_qsl, quote, urlencode, urlsplit

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
_SECURITY_HEADER_NAMES = {h for h, _ in SECURITY_HEADERS}
LOOPBACK_NAMES = ("127.0.0.1", "localhost", "::1")
PROXY_HEADERS = ("forwarded", "x-forwarded-for", "x-forwarded-host", "x-forwarded-proto", "x-real-ip")
UNSAFE_METHODS = frozenset({"POST", "PUT", "PATCH", "DELETE"})

# Back-off after wrong tokens: the first FREE_FAILURES are answered at once; each further one
# locks the client out for 2, 4, 8 … seconds, at most MAX_LOCKOUT (common practice, no source).
FREE_FAILURES = 3
MAX_LOCKOUT = 60.0
_FAILURE_MEMORY = 600.0  # a client's failures are forgotten after this many quiet seconds
_MAX_CLIENTS_TRACKED = 4096


def is_loopback(host: str) -> bool:
    if host in ("localhost", "localhost.localdomain"):
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def _is_ip(text: str) -> bool:
    try:
        ipaddress.ip_address(text.strip("[]"))
    except ValueError:
        return False
    return True


def _is_wildcard(host: str) -> bool:
    return host.strip("[]") in ("", "0.0.0.0", "::")


def display_base_url(host: str, port: int, *, scheme: str = "http") -> str:
    """A base URL a person can open: the machine's name for a wildcard bind, IPv6 in brackets."""
    name = host.strip()
    if _is_wildcard(name):
        name = socket.gethostname() or "localhost"
    elif _is_ip(name) and ":" in name.strip("[]"):
        name = f"[{name.strip('[]')}]"
    return f"{scheme}://{name}:{port}"


def host_name(header: str) -> str:
    """The host part of a Host header value, lower-cased, without port, brackets or a trailing dot."""
    value = header.strip().lower()
    if value.startswith("["):
        end = value.find("]")
        return value[1:end] if end > 0 else value
    if value.count(":") == 1:
        value = value.split(":", 1)[0]
    return value.rstrip(".")


@dataclass
class _Failures:
    count: int = 0
    last: float = 0.0
    locked_until: float = 0.0


@dataclass
class AccessGuard:
    """The token, the pending one-time sign-in codes and the wrong-token back-off of one server."""

    token: str
    clock: Callable[[], float] = time.monotonic
    _codes: set[str] = field(default_factory=set)
    _failures: OrderedDict[str, _Failures] = field(default_factory=OrderedDict)
    _lock: threading.Lock = field(default_factory=threading.Lock)

    @classmethod
    def create(cls, token: str | None = None, **kw) -> AccessGuard:
        return cls(token=token or secrets.token_urlsafe(24), **kw)  # 32 characters when generated

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

    # -- back-off --------------------------------------------------------------------------------

    def locked_for(self, client: str) -> float:
        """Seconds this client must still wait before its next attempt is checked (0: none)."""
        with self._lock:
            entry = self._failures.get(client)
            return max(0.0, entry.locked_until - self.clock()) if entry else 0.0

    def failed(self, client: str) -> None:
        now = self.clock()
        with self._lock:
            entry = self._failures.pop(client, None) or _Failures()
            if now - entry.last > _FAILURE_MEMORY:
                entry = _Failures()
            entry.count += 1
            entry.last = now
            if entry.count > FREE_FAILURES:
                entry.locked_until = now + min(MAX_LOCKOUT, 2.0 ** (entry.count - FREE_FAILURES))
            self._failures[client] = entry
            while len(self._failures) > _MAX_CLIENTS_TRACKED:
                self._failures.popitem(last=False)

    def succeeded(self, client: str) -> None:
        with self._lock:
            self._failures.pop(client, None)


Scope = dict
Receive = Callable[[], Awaitable[dict]]
Send = Callable[[dict], Awaitable[None]]
Responder = Callable[[Send], Awaitable[None]]


@dataclass(frozen=True)
class Exposure:
    """What the middleware needs to know about the server it guards."""

    guard: AccessGuard | None
    allowed_hosts: frozenset[str]
    max_body_bytes: int
    upload_paths: frozenset[str]  # multipart image uploads: their router counts against its own, larger cap

    @classmethod
    def for_server(cls, *, guard: AccessGuard | None, host: str, extra_hosts: tuple[str, ...] = (),
                   max_body_bytes: int, upload_paths: tuple[str, ...]) -> Exposure:
        names = {*LOOPBACK_NAMES, host_name(host), *(host_name(h) for h in extra_hosts)}
        return cls(guard=guard, allowed_hosts=frozenset(n for n in names if n),
                   max_body_bytes=max_body_bytes, upload_paths=frozenset(upload_paths))


class SecurityMiddleware:
    """Applies the checks of the module docstring and adds the security headers to every response."""

    def __init__(self, app, *, exposure: Exposure) -> None:
        self.app = app
        self.exposure = exposure

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return

        async def send_with_headers(message: dict) -> None:
            if message["type"] == "http.response.start":
                headers = [(k, v) for k, v in message.get("headers", []) if k.lower() not in _SECURITY_HEADER_NAMES]
                message = {**message, "headers": headers + SECURITY_HEADERS}
            await send(message)

        headers = _headers(scope)
        refusal = self._check(scope, headers)
        if refusal is not None:
            await refusal(send_with_headers)
            return
        method = scope.get("method", "GET").upper()
        path = scope.get("path", "")
        if method in UNSAFE_METHODS and path not in self.exposure.upload_paths:
            receive, refusal = await _buffered_body(receive, headers, self.exposure.max_body_bytes)
            if refusal is not None:
                await refusal(send_with_headers)
                return
        await self.app(scope, receive, send_with_headers)

    def _check(self, scope: Scope, headers: dict[str, str]) -> Responder | None:
        guard = self.exposure.guard
        if guard is None:
            proxied = [h for h in PROXY_HEADERS if h in headers]
            if proxied:
                return _refuse(403, "ProxyWithoutToken", (
                    f"this request came through a proxy (it carries a {proxied[0]!r} header), which can expose "
                    "the server beyond this machine; a server without an access token answers only direct "
                    "requests. Start it with --token (see the README's Security section)"))
            refusal = self._check_host(scope, headers)
            if refusal is not None:
                return refusal
        else:
            refusal = self._check_token(scope, headers, guard)
            if refusal is not None:
                return refusal
        return _check_origin(scope, headers, behind_proxy=guard is not None)

    def _check_host(self, scope: Scope, headers: dict[str, str]) -> Responder | None:
        client = scope.get("client")
        if not client or not _is_ip(str(client[0])):
            return None  # an in-process transport (tests): no network, no page that could rebind a name
        raw = headers.get("host")
        if raw is None:
            return None  # HTTP/1.0 without Host: no name to rebind
        name = host_name(raw)
        if name in self.exposure.allowed_hosts:
            return None
        allowed = ", ".join(sorted(f"[{h}]" if ":" in h else h for h in self.exposure.allowed_hosts))
        return _refuse(400, "ForeignHost", (
            f"this server answers only to {allowed} (any port); the request named the host {raw[:80]!r}, which "
            "could be a page that points its own name at this machine. Open Pellucid by one of those names, or "
            "start it with --token to serve other names"))

    def _check_token(self, scope: Scope, headers: dict[str, str], guard: AccessGuard) -> Responder | None:
        client = str((scope.get("client") or ("unknown",))[0])
        wait = math.ceil(guard.locked_for(client))
        if wait > 0:
            return _refuse(429, "TooManyAttempts", (
                f"too many wrong access tokens from this address; wait {wait} s before trying again"),
                retry_after=wait)
        query = parse_qsl(scope.get("query_string", b"").decode("latin-1"), keep_blank_values=True)
        code = next((v for k, v in query if k == "sign-in"), None)
        presented = _presented_token(headers)
        path = scope.get("path", "/")
        if guard.accepts(presented):
            guard.succeeded(client)
            if code is not None:  # a leftover sign-in link: drop the used code from the address
                return _redirect(path, [(k, v) for k, v in query if k != "sign-in"], cookie=None)
            return None
        if code is not None:
            if guard.redeem(code):
                guard.succeeded(client)
                cookie = f"{COOKIE}={guard.token}; Path=/; HttpOnly; SameSite=Strict"
                return _redirect(path, [(k, v) for k, v in query if k != "sign-in"], cookie=cookie)
            guard.failed(client)
            return _refuse(401, "AccessDenied",
                           "this sign-in link was already used or is not valid; ask for a new one", bearer=True)
        if presented is not None:
            guard.failed(client)
        return _refuse(401, "AccessDenied", (
            "this Pellucid server needs its access token: open the sign-in link printed at start, or send the "
            "token in an 'Authorization: Bearer …' header"), bearer=True)


def _headers(scope: Scope) -> dict[str, str]:
    return {k.decode("latin-1").lower(): v.decode("latin-1") for k, v in scope.get("headers", [])}


def _presented_token(headers: dict[str, str]) -> str | None:
    auth = headers.get("authorization", "")
    if auth.lower().startswith("bearer "):
        return auth[7:].strip() or None
    if headers.get("x-pellucid-token"):
        return headers["x-pellucid-token"]
    if "cookie" in headers:
        jar = SimpleCookie()
        try:
            jar.load(headers["cookie"])
        except CookieError:
            return None
        if COOKIE in jar:
            return jar[COOKIE].value
    return None


def _check_origin(scope: Scope, headers: dict[str, str], *, behind_proxy: bool) -> Responder | None:
    """Refuse a state-changing request that a page of another origin sent.

    With a token set, a proxy in front may rewrite ``Host``; the name it forwards in
    ``X-Forwarded-Host`` then counts as this server's own (a page cannot add that header to a
    cross-origin request without a CORS preflight, which this server never grants).
    """
    if scope.get("method", "GET").upper() not in UNSAFE_METHODS:
        return None
    site = headers.get("sec-fetch-site")
    if site is not None and site not in ("same-origin", "none"):
        return _cross_origin(f"the browser marked it {site!r}")
    origin = headers.get("origin")
    if origin is None:
        return None  # not sent by a browser page (scripts, the command line): the checks above apply
    own = {headers.get("host", "").strip().lower()}
    if behind_proxy and headers.get("x-forwarded-host"):
        own.add(headers["x-forwarded-host"].split(",")[0].strip().lower())
    theirs = urlsplit(origin.strip().lower())
    if origin.strip().lower() == "null" or not theirs.netloc or theirs.netloc not in own:
        return _cross_origin(f"it came from the page origin {origin[:80]!r}")
    return None


def _cross_origin(why: str) -> Responder:
    return _refuse(403, "CrossOrigin", (
        f"a request that changes something must come from this server's own pages; {why}. Open the dashboard "
        "itself to do this"))


async def _buffered_body(receive: Receive, headers: dict[str, str], limit: int) -> tuple[Receive, Responder | None]:
    """Read the whole body (at most ``limit`` bytes) and replay it; a larger one gets a 413 answer."""
    declared = headers.get("content-length", "")
    if declared.isdigit() and int(declared) > limit:
        return receive, _too_large(int(declared), limit, "the request body")
    messages: list[dict] = []
    total = 0
    while True:
        message = await receive()
        messages.append(message)
        if message["type"] != "http.request":
            break
        total += len(message.get("body", b""))
        if total > limit:
            return receive, _too_large(None, limit, "the request body")
        if not message.get("more_body", False):
            break

    async def replay() -> dict:
        return messages.pop(0) if messages else await receive()

    return replay, None


def _too_large(received: int | None, limit: int, what: str) -> Responder:
    size = f"{received / 1e6:.1f} MB" if received is not None else "more than that"
    return _refuse(413, "BodyTooLarge", (
        f"{what} is {size}; this server reads at most {limit / 1e6:.1f} MB. Send less (images go to "
        "POST /api/images as multipart uploads)"))


def _refuse(status: int, kind: str, message: str, *, retry_after: int | None = None,
            bearer: bool = False) -> Responder:
    body = json.dumps({"detail": message, "error": kind}).encode()
    headers = [(b"content-type", b"application/json"), (b"content-length", str(len(body)).encode())]
    if status == 413:  # the unread body is still on the wire: end the connection instead of reading it
        headers.append((b"connection", b"close"))
    if bearer:
        headers.append((b"www-authenticate", b"Bearer"))
    if retry_after is not None:
        headers.append((b"retry-after", str(retry_after).encode()))

    async def respond(send: Send) -> None:
        await send({"type": "http.response.start", "status": status, "headers": headers})
        await send({"type": "http.response.body", "body": body})

    return respond


def same_site_path(path: str) -> str:
    """``path`` as a redirect target that stays on this site ('/' for anything that could leave it)."""
    if not path.startswith("/") or path.startswith("//") or "\\" in path or any(ord(c) < 32 for c in path):
        return "/"
    return quote(path, safe="/-._~!$&'()*+,;=:@%")


def _redirect(path: str, query: list[tuple[str, str]], *, cookie: str | None) -> Responder:
    location = same_site_path(path or "/")
    if query:
        location += "?" + urlencode(query)
    headers = [(b"location", location.encode("latin-1")), (b"content-length", b"0")]
    if cookie is not None:
        headers.append((b"set-cookie", cookie.encode()))

    async def respond(send: Send) -> None:
        await send({"type": "http.response.start", "status": 303, "headers": headers})
        await send({"type": "http.response.body", "body": b""})

    return respond
