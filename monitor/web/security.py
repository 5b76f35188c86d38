"""Who may use the HTTP side, and how much they may send.

- The JSON API (and its acknowledge) wants ``Authorization: Bearer <api token>``.
- The unit board wants either HTTP basic auth (when a board user is configured) or a
  board session: a cookie set by the login form, or by ``?token=`` once (the link a
  unit's wall screen is started with), after which the token leaves the address bar.
  The cookie holds an HMAC of the board token, never the token itself.
- The FHIR subscription hook may require a shared secret in a header.

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
from dataclasses import dataclass
from typing import Any

from fastapi import HTTPException, Request, status
from starlette.types import ASGIApp, Message, Receive, Scope, Send

BOARD_COOKIE = "gasgap_board"
DEFAULT_MAX_BODY_BYTES = 1_000_000


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

    def board_session_value(self) -> str:
        """The cookie value that proves a board login (an HMAC of the board token)."""
        if not self.board_token:
            return ""
        return hmac.new(
            self.board_token.encode(), b"gasgap-board-session", hashlib.sha256
        ).hexdigest()


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
    if security.board_token and same(
        request.cookies.get(BOARD_COOKIE), security.board_session_value()
    ):
        return "session"
    return None


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
    headers: list[Any] = [
        (b"content-type", b"application/json"),
        (b"content-length", str(len(body)).encode()),
    ]
    await send({"type": "http.response.start", "status": 413, "headers": headers})
    await send({"type": "http.response.body", "body": body})
