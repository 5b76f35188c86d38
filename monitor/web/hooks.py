"""The FHIR subscription rest-hook endpoint: ``POST /hooks/fhir/{source}``.

A FHIR server with a rest-hook Subscription posts here when something changed:
- an empty body (a ping): the source is polled now, through its scheduled job, and the
  hook answers 202 at once;
- a resource or a Bundle: read like any other FHIR input and given to the pipeline;
  the answer (200) comes after the batch is committed;
- a handshake or heartbeat: 200, nothing to do;
- a topic-based notification (R4 Subscriptions Backport) whose event numbers show one
  was missed: the source is polled as well, to fill the gap.

When a shared secret is configured the header must carry it (constant-time check), or
the answer is 401. A body that is not FHIR JSON gets 400 with the reason.
"""

from __future__ import annotations

import logging
from typing import Any

from fastapi import APIRouter, Depends, HTTPException, Request
from fastapi.responses import JSONResponse
from starlette.concurrency import run_in_threadpool

from adapters.fhir.subscription import (
    EventGapTracker,
    HookKind,
    HookPayloadError,
    parse_notification,
)
from monitor.web.security import check_hook_secret

log = logging.getLogger("gasgap.hooks")
router = APIRouter(tags=["subscription"], dependencies=[Depends(check_hook_secret)])
#: Event numbers of topic-based (R4 backport) subscriptions seen by this process.
EVENT_GAPS = EventGapTracker()


@router.post("/hooks/fhir/{source}", summary="FHIR R4 rest-hook subscription delivery")
async def fhir_hook(request: Request, source: str) -> JSONResponse:
    ctx = request.app.state.ctx
    if source not in ctx.hook_sources and source not in ctx.poll_now:
        raise HTTPException(404, f"no FHIR source named {source!r} is configured")
    body = await request.body()
    try:
        delivery = parse_notification(body, request.headers.get("content-type"))
    except HookPayloadError as exc:
        raise HTTPException(400, str(exc)) from None
    gap = EVENT_GAPS.check(source, delivery)
    if gap.poll_needed and delivery.kind is not HookKind.PING and source in ctx.poll_now:
        ctx.poll_now[source]()  # a lost notification: the poll fills the gap
        log.warning("subscription %s: %s; poll started", source, gap.reason)
    if delivery.kind is HookKind.HEARTBEAT:
        return JSONResponse({"outcome": "heartbeat noted"})
    if delivery.kind is HookKind.PING:
        poll = ctx.poll_now.get(source)
        if poll is None:
            raise HTTPException(409, f"source {source!r} has no poller to run")
        poll()
        log.info("subscription ping for %s: poll started", source)
        return JSONResponse({"outcome": "poll started"}, status_code=202)
    reader = ctx.hook_sources.get(source)
    if reader is None:
        raise HTTPException(409, f"source {source!r} does not take resources by hook")
    report = await _accept(reader, delivery)
    return JSONResponse({"outcome": "stored", "stored": report.stored,
                         "quarantined": report.quarantined})


async def _accept(reader: Any, delivery: Any) -> Any:
    """Read and store off the event loop (the pipeline's transaction blocks); the reader
    is bound to the service's pipeline and clock."""
    return await run_in_threadpool(reader, delivery)
