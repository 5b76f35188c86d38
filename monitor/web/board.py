"""The unit board: what the charge nurse looks at.

Server-rendered pages (Jinja2, autoescape on: every value from a feed is text, never
markup). One page a unit: one row a patient with an open flag or one closed within
``recent_window``; the latest P/F, A-a and a/A with their draw time, the FiO2 and where
it came from, a 24-hour P/F trace, the flag's priority in words (colour and shape only
repeat it) and its age, and an acknowledge form that asks for the person's name. A
patient page shows the full series, a larger trace and each flag's audit trail.

The pages refresh themselves (meta refresh); the acknowledge form is a plain POST, so
the board works without JavaScript.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from datetime import datetime, timedelta, tzinfo
from pathlib import Path
from typing import Any
from urllib.parse import parse_qs, quote

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from fastapi.templating import Jinja2Templates
from jinja2 import Environment, FileSystemLoader, select_autoescape

from monitor.engine.errors import MonitorError
from monitor.engine.model import ADVISORY, Alert, AlertEvent, Derivation, Location, Priority
from monitor.engine.wording import patient_display
from monitor.web.security import BOARD_COOKIE, board_user, same, same_origin, uses_basic
from storage import alerts as alerts_store
from storage import board as board_store
from storage.derivations import current_derivations

log = logging.getLogger("gasgap.board")
TEMPLATES_DIR = Path(__file__).resolve().parent / "templates"
MAX_NAME_LENGTH = 80

#: Words and shapes for each priority: the word is the signal, colour and shape repeat it.
PRIORITY_LOOK = {
    Priority.HIGH: ("High priority", "hi", "\u25b2"),  # triangle
    Priority.MEDIUM: ("Medium priority", "med", "\u25c6"),  # diamond
    Priority.LOW: ("Low priority", "lo", "\u25cf"),  # circle
}

_env = Environment(
    loader=FileSystemLoader(TEMPLATES_DIR),
    autoescape=select_autoescape(default=True, default_for_string=True),
)
templates = Jinja2Templates(env=_env)
router = APIRouter(include_in_schema=False)


# --- view models ---------------------------------------------------------------------


@dataclass
class FlagView:
    alert: Alert
    word: str
    css: str
    shape: str
    age: str
    state: str
    raised_local: str
    events: list[AlertEvent] = field(default_factory=list)

    @property
    def is_open(self) -> bool:
        return self.alert.state.is_open


@dataclass
class RowView:
    patient_key: str
    display: str
    where: str
    flags: list[FlagView]
    latest: Derivation | None
    latest_at: str
    trace: Trace | None
    patient_url: str

    @property
    def top(self) -> FlagView | None:
        open_flags = [f for f in self.flags if f.is_open]
        return open_flags[0] if open_flags else (self.flags[0] if self.flags else None)


def display_for(patient_key: str, stored: str | None, location: Location | None, mode: str) -> str:
    """The site's display key for a patient: as stored, else made by the site's rule."""
    if stored:
        return stored
    try:
        return patient_display(patient_key, location, mode)
    except MonitorError:
        return patient_display(patient_key, location, "mrn-last4")


def age_words(then: datetime, now: datetime) -> str:
    """ "just now", "12 min", "3 h 05 min", "2 d 4 h": how long ago, at a glance."""
    seconds = max(0, int((now - then).total_seconds()))
    if seconds < 60:
        return "just now"
    minutes = seconds // 60
    if minutes < 60:
        return f"{minutes} min"
    hours, minutes = divmod(minutes, 60)
    if hours < 24:
        return f"{hours} h {minutes:02d} min"
    days, hours = divmod(hours, 24)
    return f"{days} d {hours} h"


def local_time(at: datetime | None, tz: tzinfo, now: datetime) -> str:
    if at is None:
        return "-"
    local = at.astimezone(tz)
    if local.date() == now.astimezone(tz).date():
        return local.strftime("%H:%M")
    return local.strftime("%d %b %H:%M")


def flag_view(alert: Alert, now: datetime, tz: tzinfo) -> FlagView:
    word, css, shape = PRIORITY_LOOK[alert.priority]
    if alert.state.is_open:
        age = age_words(alert.raised_at, now)
        age = age if age == "just now" else f"{age} ago"
    else:
        age = f"closed {age_words(alert.closed_at or alert.updated_at, now)} ago"
    return FlagView(
        alert, word, css, shape, age, alert.state.value, local_time(alert.raised_at, tz, now)
    )


def patient_url(patient_key: str) -> str:
    return "/board/patient/" + quote(patient_key, safe="")


def unit_rows(conn: Any, unit: str, ctx: Any, now: datetime) -> list[RowView]:
    """One row a patient of ``unit`` with an open or recently closed flag, the most
    urgent first (priority, then the longest waiting)."""
    open_flags = alerts_store.open_alerts(conn, unit=unit)
    recent = alerts_store.recent_alerts(conn, now - ctx.recent_window, unit=unit)
    by_patient: dict[str, list[Alert]] = {}
    for alert in [*open_flags, *[a for a in recent if not a.state.is_open]]:
        by_patient.setdefault(alert.patient_key, []).append(alert)
    cards = board_store.patient_cards(conn, by_patient)
    rows = []
    for key, flags in by_patient.items():
        card = cards.get(key)
        location = (card.location if card else None) or flags[0].location
        series = current_derivations(conn, key, since=now - timedelta(hours=24))
        latest = series[-1].derivation if series else _latest(conn, key)
        rows.append(
            RowView(
                patient_key=key,
                display=display_for(
                    key, card.display_key if card else None, location, ctx.display_mode
                ),
                where=location.label() if location else "location unknown",
                flags=[flag_view(a, now, ctx.site_tz) for a in flags],
                latest=latest,
                latest_at=local_time(latest.drawn_at if latest else None, ctx.site_tz, now),
                trace=small_trace([s.derivation for s in series], now),
                patient_url=patient_url(key),
            )
        )
        if ctx.guard is not None:
            ctx.guard.register(key, rows[-1].display)
    rows.sort(key=_urgency)
    return rows


def _latest(conn: Any, patient_key: str) -> Derivation | None:
    series = current_derivations(conn, patient_key)
    return series[-1].derivation if series else None


def _urgency(row: RowView) -> tuple[int, int, float]:
    top = row.top
    if top is None:
        return (1, 0, 0.0)
    return (0 if top.is_open else 1, -top.alert.priority.rank, top.alert.raised_at.timestamp())


# --- P/F traces (inline SVG, drawn here so the page needs no script) ---------------------

#: P/F lines drawn on the traces: the bands of the site's rule table (P/F <= 300, 200,
#: 100; the Berlin definition's cut-offs, reference sheet).
PF_LINES = (300.0, 200.0, 100.0)
PF_TOP = 500.0


@dataclass(frozen=True)
class Trace:
    """An SVG polyline's ``points`` in a ``width`` x ``height`` box, plus guide lines."""

    width: int
    height: int
    points: str
    dots: list[tuple[float, float, str]]
    lines: list[tuple[float, str]]
    ticks: list[tuple[float, str]]


def _y(value: float, height: int, pad: int) -> float:
    clipped = min(max(value, 0.0), PF_TOP)
    return round(pad + (1 - clipped / PF_TOP) * (height - 2 * pad), 1)


def _trace(
    series: list[Derivation],
    start: datetime,
    end: datetime,
    width: int,
    height: int,
    pad: int,
    tz: tzinfo | None = None,
) -> Trace | None:
    """P/F against time in [start, end]; None when there is nothing to draw."""
    points = [(d.drawn_at, d.pf_ratio) for d in series if d.pf_ratio is not None]
    points = [(t, v) for t, v in points if start <= t <= end]
    if not points:
        return None
    span = max((end - start).total_seconds(), 1.0)

    def x(at: datetime) -> float:
        return round(pad + (at - start).total_seconds() / span * (width - 2 * pad), 1)

    xy = [(x(t), _y(v, height, pad), f"{v:.0f}") for t, v in points]
    ticks: list[tuple[float, str]] = []
    if tz is not None:
        ticks = [
            (x(start), start.astimezone(tz).strftime("%d %b %H:%M")),
            (x(end), end.astimezone(tz).strftime("%d %b %H:%M")),
        ]
    return Trace(
        width,
        height,
        " ".join(f"{a},{b}" for a, b, _ in xy),
        xy,
        [(_y(line, height, pad), f"{line:.0f}") for line in PF_LINES],
        ticks,
    )


def small_trace(series: list[Derivation], now: datetime) -> Trace | None:
    """The last 24 h of P/F, small enough for a board row."""
    return _trace(series, now - timedelta(hours=24), now, 200, 72, 5)


def full_plot(series: list[Derivation], now: datetime, tz: tzinfo | None = None) -> Trace | None:
    """Every P/F of the patient, from the first draw to now, for the patient page."""
    drawn = [d.drawn_at for d in series if d.pf_ratio is not None]
    if not drawn:
        return None
    start = min(min(drawn), now - timedelta(hours=24))
    return _trace(series, start, now, 720, 260, 24, tz)


# --- routes --------------------------------------------------------------------------


def _login_redirect(request: Request) -> Response:
    security = request.app.state.security
    if uses_basic(security):
        return Response(
            "board login needed",
            status_code=401,
            headers={"WWW-Authenticate": 'Basic realm="gasgap board"'},
        )
    return RedirectResponse("/board/login?next=" + quote(request.url.path, safe=""), 303)


def _page(request: Request, name: str, status_code: int = 200, **values: Any) -> HTMLResponse:
    ctx = request.app.state.ctx
    return templates.TemplateResponse(
        request,
        name,
        {
            "site": ctx.site_name,
            "advisory": ADVISORY,
            "refresh": ctx.refresh_seconds,
            "now": local_time(ctx.clock(), ctx.site_tz, ctx.clock()),
            **values,
        },
        status_code=status_code,
    )


def _guarded(request: Request) -> Response | None:
    """A response that sends the visitor to log in, or None when they may look."""
    token = request.query_params.get("token")
    security = request.app.state.security
    if token is not None and same(token, security.board_token):
        # The wall-screen link: set the session, then drop the token from the address.
        response = RedirectResponse(request.url.path, 303)
        _set_session(response, security)
        return response
    if board_user(request) is None:
        return _login_redirect(request)
    return None


def _set_session(response: Response, security: Any) -> None:
    response.set_cookie(
        BOARD_COOKIE,
        security.board_session_value(),
        httponly=True,
        samesite="strict",
        secure=security.secure_cookies,
        max_age=12 * 3600,
    )


@router.get("/board/login")
def login_form(request: Request, next: str = "/board") -> HTMLResponse:
    return _page(request, "login.html", next=_safe_next(next), error=None, refresh=None)


@router.post("/board/login")
async def login(request: Request) -> Response:
    form = _form(await request.body())
    security = request.app.state.security
    target = _safe_next(form.get("next", "/board"))
    if not same(form.get("token"), security.board_token):
        log.warning("board login refused")
        return _page(
            request,
            "login.html",
            401,
            next=target,
            error="That board code is not right.",
            refresh=None,
        )
    response = RedirectResponse(target, 303)
    _set_session(response, security)
    return response


@router.get("/board")
def units(request: Request) -> Response:
    if (redirect := _guarded(request)) is not None:
        return redirect
    ctx = request.app.state.ctx
    with ctx.db.begin(read_only=True) as conn:
        names = board_store.known_units(conn)
    return _page(
        request, "units.html", units=[(u, "/board/unit/" + quote(u, safe="")) for u in names]
    )


@router.get("/board/unit/{unit}")
def unit_page(request: Request, unit: str) -> Response:
    if (redirect := _guarded(request)) is not None:
        return redirect
    ctx = request.app.state.ctx
    now = ctx.clock()
    with ctx.db.begin(read_only=True) as conn:
        rows = unit_rows(conn, unit, ctx, now)
    return _page(
        request,
        "unit.html",
        unit=unit,
        rows=rows,
        now=local_time(now, ctx.site_tz, now),
        back=request.url.path,
        message=request.query_params.get("done"),
    )


@router.get("/board/patient/{patient_key:path}")
def patient_page(request: Request, patient_key: str) -> Response:
    if (redirect := _guarded(request)) is not None:
        return redirect
    ctx = request.app.state.ctx
    now = ctx.clock()
    with ctx.db.begin(read_only=True) as conn:
        card = board_store.patient_cards(conn, [patient_key]).get(patient_key)
        series = [s.derivation for s in current_derivations(conn, patient_key)]
        flags = board_store.patient_alerts(conn, patient_key)
        views = [flag_view(a, now, ctx.site_tz) for a in flags]
        for view in views:
            view.events = alerts_store.alert_events(conn, alert_id=view.alert.alert_id)
    if card is None and not series and not flags:
        return _page(request, "missing.html", 404)
    location = card.location if card else (series[-1].location if series else None)
    display = display_for(
        patient_key, card.display_key if card else None, location, ctx.display_mode
    )
    if ctx.guard is not None:
        ctx.guard.register(patient_key, display)
    rows = [(d, local_time(d.drawn_at, ctx.site_tz, now)) for d in reversed(series)]
    return _page(
        request,
        "patient.html",
        display=display,
        where=location.label() if location else "location unknown",
        rows=rows,
        flags=views,
        plot=full_plot(series, now, ctx.site_tz),
        back=request.url.path,
        unit_url=("/board/unit/" + quote(location.unit, safe=""))
        if location and location.unit
        else "/board",
        local=lambda at: local_time(at, ctx.site_tz, now),
    )


@router.post("/board/flags/{alert_id}/acknowledge")
async def acknowledge(request: Request, alert_id: str) -> Response:
    if board_user(request) is None:
        return _login_redirect(request)
    if not same_origin(request):
        return Response("form sent from another site", status_code=403)
    form = _form(await request.body())
    back = _safe_next(form.get("back", "/board"))
    by = " ".join(form.get("by", "").split())[:MAX_NAME_LENGTH]
    if not by:
        return RedirectResponse(_with_note(back, "name-needed"), 303)
    ctx = request.app.state.ctx
    try:
        ctx.pipeline.acknowledge(alert_id, by, now=ctx.clock())
    except LookupError:
        return RedirectResponse(_with_note(back, "unknown-flag"), 303)
    except MonitorError:
        return RedirectResponse(_with_note(back, "not-open"), 303)
    log.info("flag acknowledged on the board")
    return RedirectResponse(_with_note(back, "acknowledged"), 303)


def _with_note(path: str, note: str) -> str:
    return f"{path}?done={note}"


def _form(body: bytes) -> dict[str, str]:
    parsed = parse_qs(body.decode("utf-8", errors="replace"), keep_blank_values=True)
    return {k: v[0] for k, v in parsed.items()}


def _safe_next(target: str) -> str:
    """Only our own board pages are a place to go back to (no open redirect)."""
    if target.startswith("/board") and not target.startswith("//") and "\\" not in target:
        return target.split("?", 1)[0]
    return "/board"
