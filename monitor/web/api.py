"""The JSON API: patients, their derivations, flags, and acknowledging a flag.

Every route wants the API token (``Authorization: Bearer ...``). Every response carries
the advisory sentence. Patient keys travel in paths percent-encoded (they may hold
``|`` and ``/``).
"""

from __future__ import annotations

import logging
from datetime import datetime
from typing import TYPE_CHECKING, Annotated

from fastapi import APIRouter, Depends, HTTPException, Query, Request
from fastapi.responses import HTMLResponse
from pydantic import BaseModel, Field, field_validator

from monitor.engine.errors import IllegalTransition
from monitor.engine.model import ADVISORY, AlertEvent
from monitor.shapes import alert_json, derivation_json, iso_utc
from monitor.web.board import display_for
from monitor.web.security import require_api_token
from storage import alerts as alerts_store
from storage import board as board_store
from storage.derivations import current_derivations

if TYPE_CHECKING:
    from monitor.web.app import WebContext

log = logging.getLogger("gasgap.api")
router = APIRouter(prefix="/api", tags=["api"], dependencies=[Depends(require_api_token)])
#: The API's reference page, made here from the OpenAPI document: plain HTML with no
#: script and nothing loaded from elsewhere, so it works on a ward with no internet.
docs_router = APIRouter(include_in_schema=False)


class AcknowledgeBody(BaseModel):
    """Who acknowledges: a person's name or staff id, as the site records it."""

    by: str = Field(min_length=1, max_length=80)

    @field_validator("by")
    @classmethod
    def _not_blank(cls, value: str) -> str:
        cleaned = " ".join(value.split())
        if not cleaned:
            raise ValueError("by must name the person acknowledging, not be blank")
        return cleaned


def event_json(event: AlertEvent) -> dict[str, object]:
    return {
        "event": event.event,
        "at": iso_utc(event.at),
        "priority": event.priority.value,
        "state": event.state.value,
        "sample_id": event.sample_id,
        "by": event.by,
        "note": event.note,
    }


@router.get("/patients", summary="Patients, optionally of one unit")
def list_patients(request: Request, unit: str | None = None) -> dict[str, object]:
    ctx: WebContext = request.app.state.ctx
    with ctx.db.begin(read_only=True) as conn:
        cards = board_store.patients_in_unit(conn, unit)
    return {
        "patients": [
            {
                "patient_key": c.patient_key,
                "display": display_for(c.patient_key, c.display_key, c.location, ctx.display_mode),
                "unit": c.location.unit if c.location else None,
                "location": c.location.label() if c.location else None,
            }
            for c in cards
        ],
        "advisory": ADVISORY,
    }


@router.get("/patients/{patient_key:path}/derivations", summary="A patient's derived indices")
def patient_derivations(
    request: Request,
    patient_key: str,
    since: datetime | None = None,
    include_estimated: bool = True,
) -> dict[str, object]:
    ctx: WebContext = request.app.state.ctx
    if since is not None and since.tzinfo is None:
        raise HTTPException(422, "since must carry a time zone (e.g. 2026-03-15T08:00:00Z)")
    with ctx.db.begin(read_only=True) as conn:
        rows = current_derivations(
            conn, patient_key, since=since, include_estimated=include_estimated
        )
    return {
        "patient_key": patient_key,
        "derivations": [derivation_json(r.derivation) for r in rows],
        "advisory": ADVISORY,
    }


@router.get("/flags", summary="Open flags, or every flag changed since a time")
def list_flags(
    request: Request,
    unit: str | None = None,
    since: Annotated[datetime | None, Query(description="flags changed at or after")] = None,
) -> dict[str, object]:
    ctx: WebContext = request.app.state.ctx
    if since is not None and since.tzinfo is None:
        raise HTTPException(422, "since must carry a time zone (e.g. 2026-03-15T08:00:00Z)")
    with ctx.db.begin(read_only=True) as conn:
        if since is None:
            found = alerts_store.open_alerts(conn, unit=unit)
        else:
            found = alerts_store.recent_alerts(conn, since, unit=unit)
    return {"flags": [alert_json(a) for a in found], "advisory": ADVISORY}


@router.get("/flags/{alert_id}", summary="One flag and its audit trail")
def get_flag(request: Request, alert_id: str) -> dict[str, object]:
    ctx: WebContext = request.app.state.ctx
    with ctx.db.begin(read_only=True) as conn:
        alert = alerts_store.get_alert(conn, alert_id)
        if alert is None:
            raise HTTPException(404, f"no flag with id {alert_id!r}")
        events = alerts_store.alert_events(conn, alert_id=alert_id)
    return {
        "flag": alert_json(alert),
        "events": [event_json(e) for e in events],
        "advisory": ADVISORY,
    }


@router.post("/flags/{alert_id}/acknowledge", summary="Record who has seen a flag")
def acknowledge(request: Request, alert_id: str, body: AcknowledgeBody) -> dict[str, object]:
    ctx: WebContext = request.app.state.ctx
    try:
        alert = ctx.pipeline.acknowledge(alert_id, body.by, now=ctx.clock())
    except LookupError as exc:
        raise HTTPException(404, str(exc)) from None
    except IllegalTransition as exc:
        raise HTTPException(409, f"flag {alert_id!r} cannot be acknowledged: {exc}") from None
    log.info("flag acknowledged through the API")
    return {"flag": alert_json(alert), "advisory": ADVISORY}


@docs_router.get("/docs")
def api_docs(request: Request) -> HTMLResponse:
    """Every operation of the OpenAPI document: method, path, summary, parameters."""
    from monitor.web.board import templates

    schema = request.app.openapi()
    operations = []
    for path, methods in sorted(schema.get("paths", {}).items()):
        for method, op in methods.items():
            params = [
                (
                    p.get("name", ""),
                    p.get("in", ""),
                    bool(p.get("required")),
                    p.get("description", ""),
                )
                for p in op.get("parameters", [])
            ]
            body = "requestBody" in op
            operations.append((method.upper(), path, op.get("summary", ""), params, body))
    return templates.TemplateResponse(
        request,
        "api_docs.html",
        {
            "title": schema.get("info", {}).get("title", "gasgap"),
            "operations": operations,
            "description": schema.get("info", {}).get("description", ""),
            "advisory": ADVISORY,
            "site": request.app.state.ctx.site_name,
            "refresh": None,
            "now": "",
            "zone": "",
        },
    )
