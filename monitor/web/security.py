"""Who may use the HTTP side, and how much they may send.

- The JSON API (and its acknowledge) wants ``Authorization: Bearer <api token>``.
- The unit board wants either HTTP basic auth (when a board user is configured) or a
  board session: a cookie set by the login form, or by ``?token=`` once (the link a
  unit's wall screen is started with), after which the token leaves the address bar.
- A board session is one sign-in: a random session id, its issue and expiry times and
  a fingerprint of the board code, signed with a key made when the process starts.
  So each sign-in has its own cookie; it expires (``SESSION_SECONDS``); it does not
  survive a restart or a change of the board code (the signature no longer matches);
  and signing out (``POST /board/logout``) revokes it. It never holds the code itself.
- ``/openapi.json`` and ``/docs`` want a signed-in user (API token or board session).
- The FHIR subscription hook may require a shared secret in a header.

Every response carries security headers (``SecurityHeaders``): a content security
policy allowing only the service's own scripts, styles and forms, no framing,
``nosniff``, no referrer sent to other sites (a wall-screen link may hold the board
code), and ``Cache-Control: no-store``
on everything but static files (pages and API answers carry patient data).

Secrets come from the environment or a secrets file (``SiteConfig.secret``), never from
the configuration file in clear. Every comparison is ``hmac.compare_digest`` (constant
time), and a service with no token configured refuses, it does not open up.

``BodyLimit`` answers 413 for a request body over the limit, whether the client
declared its length or streams it.
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import secrets
import threading
import time
from dataclasses import dataclass, field

from fastapi import APIRouter, HTTPException, Request, status
from fastapi.responses import RedirectResponse, Response
from starlette.types import ASGIApp, Message, Receive, Scope, Send

BOARD_COOKIE = "gasgap_board"
DEFAULT_MAX_BODY_BYTES = 1_000_000
#: How long one board sign-in lasts (a 12-hour shift; common practice, no source).
SESSION_SECONDS = 12 * 3600


class _Revoked:
    """Session ids signed out before their expiry (kept until then)."""

    def __init__(self) -> None:
        self._until: dict[str, float] = {}
        self._lock = threading.Lock()

    def add(self, sid: str, until: float) -> None:
        with self._lock:
            now = time.time()
            self._until = {k: v for k, v in self._until.items() if v > now}
            self._until[sid] = until

    def __contains__(self, sid: object) -> bool:
        with self._lock:
            return sid in self._until


@dataclass(frozen=True)
class WebSecurity:
    """The secrets of the HTTP side, already read from their store."""

    api_token: str | None = None
    board_token: str | None = None
    board_user: str | None = None
    board_password: str | None = None
    hook_secret: str | None = None
    hook_header: str = "X-Gasgap-Hook-Secret"
    max_body_bytes: int = DEFAULT_MAX_BODY_BYTES
    #: Send cookies only over HTTPS. Off for a loopback-only test; on in production.
    secure_cookies: bool = True
    session_seconds: int = SESSION_SECONDS
    #: Signs board sessions; made afresh by each process, so a restart ends them all.
    session_key: bytes = field(default_factory=lambda: secrets.token_bytes(32), repr=False)
    revoked: _Revoked = field(default_factory=_Revoked, repr=False, compare=False)

    def _code_print(self) -> str:
        return hmac.new(
            self.session_key, (self.board_token or "").encode(), hashlib.sha256
        ).hexdigest()[:16]

    def _sign(self, body: str) -> str:
        return hmac.new(self.session_key, body.encode(), hashlib.sha256).hexdigest()

    def board_session_value(self, now: float | None = None) -> str:
        """A new board session (one sign-in): ``sid.issued.expires.signature``."""
        if not self.board_token:
            return ""
        issued = int(time.time() if now is None else now)
        body = f"{secrets.token_urlsafe(18)}.{issued}.{issued + self.session_seconds}"
        return f"{body}.{self._sign(body + '.' + self._code_print())}"

    def session_id(self, value: str | None, now: float | None = None) -> str | None:
        """The session id of a valid, unexpired, not signed-out cookie; else None."""
        if not value or not self.board_token or value.count(".") != 3:
            return None
        sid, issued, expires, signature = value.split(".")
        body = f"{sid}.{issued}.{expires}"
        if not same(signature, self._sign(body + "." + self._code_print())):
            return None
        try:
            if int(expires) <= (time.time() if now is None else now):
                return None
        except ValueError:
            return None
        return None if sid in self.revoked else sid

    def sign_out(self, value: str | None) -> bool:
        """Revoke the session in ``value``; True if it was a valid one."""
        sid = self.session_id(value)
        if sid is None:
            return False
        assert value is not None
        self.revoked.add(sid, float(value.split(".")[2]))
        return True


def same(given: str | None, expected: str | None) -> bool:
    """Constant-time equality; False when either side is missing or empty."""
    if not given or not expected:
        return False
    return hmac.compare_digest(given.encode("utf-8"), expected.encode("utf-8"))


def _unauthorised(detail: str, scheme: str) -> HTTPException:
    return HTTPException(status.HTTP_401_UNAUTHORIZED, detail, headers={"WWW-Authenticate": scheme})


def require_api_token(request: Request) -> None:
    """FastAPI dependency: a valid Bearer token, or 401."""
    security: WebSecurity = request.app.state.security
    header = request.headers.get("authorization", "")
    scheme, _, token = header.partition(" ")
    if scheme.lower() != "bearer" or not same(token.strip(), security.api_token):
        raise _unauthorised("a valid API token is needed (Authorization: Bearer ...)", "Bearer")


def board_user(request: Request) -> str | None:
    """Who is looking at the board: "basic:<user>", "session", or None (not logged in)."""
    security: WebSecurity = request.app.state.security
    if security.board_user and security.board_password:
        header = request.headers.get("authorization", "")
        scheme, _, encoded = header.partition(" ")
        if scheme.lower() == "basic":
            try:
                user, _, password = base64.b64decode(encoded, validate=True).decode().partition(":")
            except (ValueError, UnicodeDecodeError):
                return None
            user_ok = same(user, security.board_user)
            password_ok = same(password, security.board_password)
            if user_ok and password_ok:
                return f"basic:{user}"
    if security.board_token and security.session_id(request.cookies.get(BOARD_COOKIE)):
        return "session"
    return None


def require_signed_in(request: Request) -> None:
    """FastAPI dependency: an API token or a board sign-in (for the API description and
    the read-only quarantine view), or 401."""
    security: WebSecurity = request.app.state.security
    header = request.headers.get("authorization", "")
    scheme, _, token = header.partition(" ")
    if scheme.lower() == "bearer" and same(token.strip(), security.api_token):
        return
    if board_user(request) is not None:
        return
    raise _unauthorised("sign in to the board or send the API token", "Bearer")


def uses_basic(security: WebSecurity) -> bool:
    return bool(security.board_user and security.board_password)


def check_hook_secret(request: Request) -> None:
    """FastAPI dependency for the subscription hook: the shared secret, when configured."""
    security: WebSecurity = request.app.state.security
    if security.hook_secret is None:
        return
    if not same(request.headers.get(security.hook_header), security.hook_secret):
        raise _unauthorised(f"the {security.hook_header} header is missing or wrong", "Secret")


def same_origin(request: Request) -> bool:
    """True when a form post comes from our own pages (or names no origin at all).

    The board cookie is SameSite=Strict already; this is the second lock on the
    acknowledge form against a page elsewhere posting to it.
    """
    origin = request.headers.get("origin")
    if origin is None or origin == "null":
        return origin is None
    host = request.headers.get("host", "")
    return origin.split("://", 1)[-1] == host


class BodyLimit:
    """ASGI middleware: 413 for a request body longer than ``max_bytes``."""

    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = _content_length(scope)
        if declared is not None and declared > self.max_bytes:
            await _too_large(send, self.max_bytes)
            return
        seen = 0
        refused = False

        async def counting_receive() -> Message:
            # Over the limit: answer 413 here and now, then tell the application the
            # client went away, so whatever it does next reaches no one.
            nonlocal seen, refused
            if refused:
                return {"type": "http.disconnect"}
            message = await receive()
            if message["type"] == "http.request":
                seen += len(message.get("body", b""))
                if seen > self.max_bytes:
                    refused = True
                    await _too_large(send, self.max_bytes)
                    return {"type": "http.disconnect"}
            return message

        async def guarded_send(message: Message) -> None:
            if not refused:
                await send(message)

        await self.app(scope, counting_receive, guarded_send)


def _content_length(scope: Scope) -> int | None:
    for name, value in scope.get("headers", []):
        if name == b"content-length":
            try:
                return int(value)
            except ValueError:
                return None
    return None


async def _too_large(send: Send, limit: int) -> None:
    body = f'{{"detail":"request body over {limit} bytes"}}'.encode()
    headers: list[tuple[bytes, bytes]] = [
        (b"content-type", b"application/json"),
        (b"content-length", str(len(body)).encode()),
    ]
    await send({"type": "http.response.start", "status": 413, "headers": headers})
    await send({"type": "http.response.body", "body": body})


# --- sign-out --------------------------------------------------------------------------

session_router = APIRouter(include_in_schema=False)


@session_router.post("/board/logout")
def sign_out(request: Request) -> Response:
    """End this board session (the cookie is cleared and no longer accepted)."""
    security: WebSecurity = request.app.state.security
    if not same_origin(request):
        return Response("form sent from another site", status_code=403)
    security.sign_out(request.cookies.get(BOARD_COOKIE))
    response = RedirectResponse("/board/login", status_code=303)
    response.delete_cookie(
        BOARD_COOKIE, httponly=True, samesite="strict", secure=security.secure_cookies
    )
    return response


# --- headers on every response -----------------------------------------------------------

CONTENT_SECURITY_POLICY = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
    "form-action 'self'; frame-ancestors 'none'; base-uri 'none'"
)
_ALWAYS = [
    (b"content-security-policy", CONTENT_SECURITY_POLICY.encode()),
    (b"x-content-type-options", b"nosniff"),
    # same-origin, not no-referrer: with no-referrer a browser sends "Origin: null" on
    # our own form posts, which the acknowledge form's origin check must refuse
    (b"referrer-policy", b"same-origin"),
    (b"x-frame-options", b"DENY"),
    (b"cross-origin-opener-policy", b"same-origin"),
]
_NO_STORE = (b"cache-control", b"no-store")


class SecurityHeaders:
    """ASGI middleware: the security headers on every HTTP response, and ``no-store``
    on every one but static files (board pages and API answers hold patient data)."""

    def __init__(self, app: ASGIApp, cacheable_prefixes: tuple[str, ...] = ("/static/",)) -> None:
        self.app = app
        self.cacheable = cacheable_prefixes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        cacheable = str(scope.get("path", "")).startswith(self.cacheable)

        async def with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = [(k, v) for k, v in message.get("headers", []) if k.lower() not in _OURS]
                headers.extend(_ALWAYS)
                if not cacheable:
                    headers.append(_NO_STORE)
                message = {**message, "headers": headers}
            await send(message)

        await self.app(scope, receive, with_headers)


_OURS = frozenset(k for k, _ in [*_ALWAYS, _NO_STORE])
