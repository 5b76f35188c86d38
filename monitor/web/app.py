"""The HTTP application: unit board, JSON API, health, metrics and the FHIR hook.

``create_app`` builds it from what the composition root (``monitor.service``) already
made; routers are included explicitly, nothing registers itself by import. The API
description is served at ``/openapi.json`` (and, as a plain page, ``/docs``) to a
signed-in user only. Every response passes ``SecurityHeaders`` (outermost).
"""

from __future__ import annotations

import html
import logging
import time
from collections.abc import Awaitable, Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta, tzinfo
from pathlib import Path
from typing import TYPE_CHECKING

from fastapi import Depends, FastAPI, Request, Response
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse
from fastapi.staticfiles import StaticFiles

from monitor.engine.model import ADVISORY
from monitor.logs import IdentifierGuard
from monitor.metrics import Metrics
from monitor.shapes import iso_utc
from monitor.web import api, board, hooks, quarantine_api
from monitor.web.security import (
    BodyLimit,
    SecurityHeaders,
    WebSecurity,
    require_signed_in,
    session_router,
)
from storage import board as board_store
from storage import outbox as outbox_store
from storage.cursors import all_cursors
from storage.db import Database
from storage.errors import StorageUnavailable

log = logging.getLogger("gasgap.http")
STATIC_DIR = Path(__file__).resolve().parent / "static"

if TYPE_CHECKING:
    from adapters.fhir.subscription import HookDelivery
    from monitor.pipeline import BatchReport, Pipeline

Clock = Callable[[], datetime]


@dataclass
class WebContext:
    """What the routes need, built once by the service (or a test)."""

    db: Database
    pipeline: Pipeline
    clock: Clock = field(default=lambda: datetime.now(UTC))
    site_name: str = "gasgap"
    display_mode: str = "mrn-last4"
    site_tz: tzinfo = UTC
    #: A closed flag stays on the board this long after it closed.
    recent_window: timedelta = timedelta(hours=12)
    refresh_seconds: int = 60
    metrics: Metrics = field(default_factory=Metrics)
    guard: IdentifierGuard | None = None
    #: Source name -> function that polls it now (the hook's ping), returning at once.
    poll_now: dict[str, Callable[[], None]] = field(default_factory=dict)
    #: Source name -> function turning a hook delivery into a pipeline Inbound.
    hook_sources: dict[str, Callable[[HookDelivery], BatchReport]] = field(default_factory=dict)


def create_app(
    db: Database,
    pipeline: Pipeline,
    *,
    clock: Clock | None = None,
    security: WebSecurity | None = None,
    context: WebContext | None = None,
) -> FastAPI:
    """The FastAPI application. ``context`` carries the service's parts; without one a
    minimal context is made from ``db`` and ``pipeline`` (tests of single routes)."""
    ctx = context or WebContext(db=db, pipeline=pipeline)
    if clock is not None:
        ctx.clock = clock
    security = security or WebSecurity()
    app = FastAPI(
        title="gasgap",
        description="Oxygenation indices and advisory flags. " + ADVISORY,
        version="1",
        openapi_url=None,  # served below, behind sign-in
        docs_url=None,  # our own page (api.docs_router): nothing fetched from a CDN
        redoc_url=None,
    )
    app.state.ctx = ctx
    app.state.security = security
    app.add_exception_handler(StorageUnavailable, storage_unavailable)
    app.include_router(api.router)
    app.include_router(board.router)
    app.include_router(hooks.router)
    app.include_router(quarantine_api.router)
    app.include_router(session_router)
    signed_in = [Depends(require_signed_in)]
    app.add_api_route(
        "/openapi.json",
        openapi_json,
        methods=["GET"],
        dependencies=signed_in,
        include_in_schema=False,
    )
    app.include_router(api.docs_router, dependencies=signed_in)
    app.add_api_route("/health", health, methods=["GET"], tags=["operations"])
    app.add_api_route("/metrics", metrics, methods=["GET"], tags=["operations"])
    app.add_api_route("/", home, methods=["GET"], include_in_schema=False)
    app.mount("/static", StaticFiles(directory=STATIC_DIR), name="static")
    app.middleware("http")(log_requests)
    app.add_middleware(BodyLimit, max_bytes=security.max_body_bytes)
    app.add_middleware(SecurityHeaders)
    return app


#: Seconds a client is asked to wait before trying again when the database cannot be
#: used (common practice, no source: long enough for a restart or a lock to clear).
RETRY_AFTER_S = 30


async def storage_unavailable(request: Request, exc: Exception) -> Response:
    """Any route that meets a database that cannot be used now answers 503 with
    Retry-After (a sender resends, a board reloads), never a 500 or a wrong answer. The
    reason is logged without the request's identifiers; the client is not told the
    database's address."""
    log.warning("database unavailable during %s %s", request.method, request.url.path)
    headers = {"Retry-After": str(RETRY_AFTER_S)}
    if "text/html" in request.headers.get("accept", ""):
        page = (
            "<!doctype html><html lang=en><meta charset=utf-8><title>gasgap: not available"
            "</title><h1>The flags cannot be shown at the moment</h1><p>gasgap cannot reach "
            "its database. This page will work again when it is back; until then follow "
            "your local procedure for downtime. " + html.escape(ADVISORY) + "</p></html>"
        )
        return HTMLResponse(page, status_code=503, headers=headers)
    detail = "the database cannot be used at the moment; retry later"
    return JSONResponse({"detail": detail}, status_code=503, headers=headers)


def openapi_json(request: Request) -> JSONResponse:
    return JSONResponse(request.app.openapi())


async def home() -> RedirectResponse:
    return RedirectResponse("/board", status_code=303)


def health(request: Request) -> JSONResponse:
    """Database reachable, each source's last success, the outbox backlog; 503 when the
    database does not answer."""
    ctx: WebContext = request.app.state.ctx
    try:
        with ctx.db.begin(read_only=True) as conn:
            board_store.ping(conn)
            cursors = all_cursors(conn)
            backlog = outbox_store.backlog(conn)
    except Exception as exc:  # any database failure is "unhealthy", reported by type
        log.warning("health: database unreachable (%s)", type(exc).__name__)
        return JSONResponse(
            {"status": "unavailable", "database": f"unreachable: {type(exc).__name__}"},
            status_code=503,
        )
    ctx.metrics.outbox_backlog.set(backlog)
    sources = {
        c.source: {
            "last_success_at": iso_utc(c.last_success_at),
            "last_error_at": iso_utc(c.last_error_at),
            "failing": c.failing,
            "watermark": c.watermark,
        }
        for c in cursors
    }
    return JSONResponse(
        {
            "status": "ok",
            "database": "reachable",
            "sources": sources,
            "outbox_backlog": backlog,
            "checked_at": iso_utc(ctx.clock()),
        }
    )


def metrics(request: Request) -> Response:
    ctx: WebContext = request.app.state.ctx
    from monitor.metrics import CONTENT_TYPE

    return Response(ctx.metrics.exposition(), media_type=CONTENT_TYPE)


async def log_requests(
    request: Request, call_next: Callable[[Request], Awaitable[Response]]
) -> Response:
    """One line per request with the route template, never the concrete path (which may
    hold a patient key or a token)."""
    started = time.perf_counter()
    response = await call_next(request)
    route = request.scope.get("route")
    template = getattr(route, "path", None) or "(unrouted)"
    log.info(
        "%s %s -> %d in %.0f ms",
        request.method,
        template,
        response.status_code,
        (time.perf_counter() - started) * 1000,
    )
    return response
