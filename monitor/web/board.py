"""The unit board: what the charge nurse looks at.

Server-rendered pages (Jinja2, autoescape on: every value from a feed is text, never
markup). The unit page has one row a patient (an open flag, a flag closed within
``recent_window``, or a gas in the last 24 h), the most urgent first: the priority in
words and shape, the open flags named in words, what changed since the gas before with
units, the latest gas (measured) and, in a column of its own, any later SpO2 estimate,
each time with its date and age, and one acknowledge form a patient. The index lists
the units with their open flags by priority; a patient page shows the whole series as
tables and plots. Unknown units and patients are answered 404, never as empty.

What is shown is worked out in ``board_view`` (pure); this module reads and routes. The
pages refresh themselves (meta refresh); the forms are plain POSTs, so the board works
without JavaScript and with no internet.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta, tzinfo
from pathlib import Path
from typing import TYPE_CHECKING
from urllib.parse import parse_qs, quote, unquote

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from fastapi.templating import Jinja2Templates
from jinja2 import Environment, FileSystemLoader, select_autoescape

from monitor.engine.errors import IllegalTransition, MonitorError
from monitor.engine.model import ADVISORY, Alert, Derivation, Location
from monitor.engine.wording import patient_display
from monitor.web.board_view import (
    RowView,
    build_row,
    clock_words,
    compared_pf,
    flag_view,
    unit_count,
    urgency,
    zone_words,
)
from monitor.web.security import (
    BOARD_COOKIE,
    WebSecurity,
    board_user,
    same,
    same_origin,
    uses_basic,
)
from storage import alerts as alerts_store
from storage import board as board_store
from storage.censored import censored_for_patient
from storage.derivations import current_derivations

if TYPE_CHECKING:
    from sqlalchemy import Connection

    from monitor.web.app import WebContext

log = logging.getLogger("gasgap.board")
TEMPLATES_DIR = Path(__file__).resolve().parent / "templates"
MAX_NAME_LENGTH = 80

NAME_COOKIE = "gasgap_ack_name"
#: The acknowledger's name is remembered for a shift, then asked again.
NAME_COOKIE_SECONDS = 12 * 3600
#: Patients with a gas drawn this recently are on their unit's board even with no flag.
RECENT_GASES = timedelta(hours=24)

_env = Environment(
    loader=FileSystemLoader(TEMPLATES_DIR),
    autoescape=select_autoescape(default=True, default_for_string=True),
)
templates = Jinja2Templates(env=_env)
router = APIRouter(include_in_schema=False)


def display_for(patient_key: str, stored: str | None, location: Location | None, mode: str) -> str:
    """The site's display key for a patient: as stored, else made by the site's rule."""
    if stored:
        return stored
    try:
        return patient_display(patient_key, location, mode)
    except MonitorError:
        return patient_display(patient_key, location, "mrn-last4")


def unit_rows(conn: Connection, unit: str, ctx: WebContext, now: datetime) -> list[RowView]:
    """One row a patient of ``unit``: with an open flag, a flag closed within
    ``recent_window``, or a gas drawn in the last 24 h; the most urgent first."""
    open_flags = alerts_store.open_alerts(conn, unit=unit)
    recent = alerts_store.recent_alerts(conn, now - ctx.recent_window, unit=unit)
    by_patient: dict[str, list[Alert]] = {}
    for alert in [*open_flags, *[a for a in recent if not a.state.is_open]]:
        by_patient.setdefault(alert.patient_key, []).append(alert)
    for key in board_store.patients_with_gases_since(conn, unit, now - RECENT_GASES):
        by_patient.setdefault(key, [])
    cards = board_store.patient_cards(conn, by_patient)
    rows = []
    for key, flags in by_patient.items():
        card = cards.get(key)
        series = [s.derivation for s in current_derivations(conn, key, since=now - RECENT_GASES)]
        if not any(not d.estimated for d in series):
            series = [s.derivation for s in current_derivations(conn, key)][-40:]
        location = (card.location if card else None) or (flags[0].location if flags else None)
        location = location or (series[-1].location if series else None)
        display = display_for(key, card.display_key if card else None, location, ctx.display_mode)
        where = location.label() if location else "location unknown"
        rows.append(build_row(key, display, where, flags, series, ctx.site_tz, now))
        if ctx.guard is not None:
            ctx.guard.register(key, display)
    rows.sort(key=urgency)
    return rows


# --- P/F plots (inline SVG, drawn here so the page needs no script) ---------------------

#: P/F lines drawn on the plots: the bands of the site's rule table (P/F <= 300, 200,
#: 100; the Berlin definition's cut-offs, reference sheet), against the same P/F the
#: rule compares (adjusted for altitude when there is one).
PF_LINES = (300.0, 200.0, 100.0)


@dataclass(frozen=True)
class Series:
    """One plotted series: points, and how it is drawn (css class), and its name."""

    name: str
    css: str
    points: str
    dots: list[tuple[float, float, str]]
    step: bool = False


@dataclass(frozen=True)
class Plot:
    """One panel of the patient page's chart: an SVG box with series, guide lines and
    time ticks in site time."""

    title: str
    width: int
    height: int
    series: list[Series]
    lines: list[tuple[float, str]]
    ticks: list[tuple[float, str]]
    y_labels: list[tuple[float, str]]
    axis: str


#: A value to its SVG y (the top is 0), and a time to its SVG x.
YScale = Callable[[float], float]
XScale = Callable[[datetime], float]

#: The plots' width and their left and right margins, in SVG units.
PLOT_WIDTH, PLOT_LEFT, PLOT_RIGHT = 760, 46, 12


@dataclass(frozen=True)
class _Frame:
    """What every panel of one patient's chart shares: the time axis and its ticks."""

    x: XScale
    ticks: list[tuple[float, str]]
    axis: str
    end: datetime


def _scale(lo: float, hi: float, height: int, pad: int) -> YScale:
    def y(value: float) -> float:
        clipped = min(max(value, lo), hi)
        return round(pad + (1 - (clipped - lo) / (hi - lo)) * (height - 2 * pad), 1)

    return y


def _x_axis(start: datetime, end: datetime, width: int, left: int, right: int) -> XScale:
    span = max((end - start).total_seconds(), 1.0)

    def x(at: datetime) -> float:
        return round(left + (at - start).total_seconds() / span * (width - left - right), 1)

    return x


def _ticks(start: datetime, end: datetime, x: XScale, tz: tzinfo) -> list[tuple[float, str]]:
    """Five ticks across the span, in site time with the date."""
    step = (end - start) / 4
    return [(x(start + step * i), clock_words(start + step * i, tz)) for i in range(5)]


def patient_plots(series: list[Derivation], now: datetime, tz: tzinfo) -> list[Plot]:
    """Three panels over one time axis: the P/F the rules compare (measured P/F beside
    it when an altitude adjustment applies), FiO2 as steps, and S/F estimated from SpO2
    in its own panel with its own scale (S/F is not P/F)."""
    times = [d.drawn_at for d in series]
    if not times:
        return []
    start = min(min(times), now - timedelta(hours=24))
    end = max(max(times), now)
    x = _x_axis(start, end, PLOT_WIDTH, PLOT_LEFT, PLOT_RIGHT)
    frame = _Frame(x, _ticks(start, end, x, tz), "Time: " + zone_words(tz, now), end)
    gases = [d for d in series if not d.estimated]
    estimates = [d for d in series if d.estimated and d.sf_ratio is not None]
    panels = (_pf_plot(gases, frame), _fio2_plot(series, frame), _sf_plot(estimates, frame))
    return [p for p in panels if p is not None]


def _pf_plot(gases: list[Derivation], frame: _Frame) -> Plot | None:
    """The P/F the rules compare, with the measured P/F beside it when adjusted for
    altitude, and the rule table's P/F lines."""
    pf_points = [(d.drawn_at, *compared_pf(d)) for d in gases if compared_pf(d)[0] is not None]
    if not pf_points:
        return None
    y = _scale(0.0, 500.0, 200, 14)
    adjusted = any(a for _, _, a in pf_points)
    name = "P/F adjusted for altitude (rules compare this)" if adjusted else "P/F"
    shown = [_series(name, "pf", [(t, v) for t, v, _ in pf_points], frame.x, y)]
    if adjusted:
        measured = [(d.drawn_at, d.pf_ratio) for d in gases if d.pf_ratio is not None]
        shown.append(_series("P/F as measured", "pf-measured", measured, frame.x, y))
    return Plot(
        "P/F from blood gases, mmHg",
        PLOT_WIDTH,
        200,
        shown,
        [(y(v), f"{v:.0f}") for v in PF_LINES],
        frame.ticks,
        [(y(v), f"{v:.0f}") for v in (0.0, 100.0, 200.0, 300.0, 400.0, 500.0)],
        frame.axis,
    )


def _fio2_plot(series: list[Derivation], frame: _Frame) -> Plot | None:
    """FiO2 in effect as steps, the last one carried to the end of the axis."""
    fio2 = sorted((d.drawn_at, d.fio2) for d in series if d.fio2 is not None)
    if not fio2:
        return None
    y = _scale(0.2, 1.0, 110, 10)
    points = fio2 + [(frame.end, fio2[-1][1])]
    return Plot(
        "FiO2 in effect (fraction), drawn as steps",
        PLOT_WIDTH,
        110,
        [_series("FiO2", "fio2", points, frame.x, y, step=True, digits=2)],
        [],
        frame.ticks,
        [(y(v), f"{v:.1f}") for v in (0.2, 0.6, 1.0)],
        frame.axis,
    )


def _sf_plot(estimates: list[Derivation], frame: _Frame) -> Plot | None:
    """S/F estimated from SpO2, on a scale of its own (S/F is not P/F)."""
    if not estimates:
        return None
    y = _scale(0.0, 500.0, 140, 12)
    sf_points = [(d.drawn_at, d.sf_ratio) for d in estimates]
    return Plot(
        "S/F estimated from SpO2 (not a blood gas; no unit)",
        PLOT_WIDTH,
        140,
        [_series("S/F estimate", "sf", sf_points, frame.x, y)],
        [],
        frame.ticks,
        [(y(v), f"{v:.0f}") for v in (0.0, 235.0, 500.0)],
        frame.axis,
    )


def _series(
    name: str,
    css: str,
    points: Sequence[tuple[datetime, float | None]],
    x: XScale,
    y: YScale,
    *,
    step: bool = False,
    digits: int = 0,
) -> Series:
    xy = [(x(t), y(v), f"{v:.{digits}f}") for t, v in points if v is not None]
    if step:
        path: list[str] = []
        for i, (a, b, _) in enumerate(xy):
            if i:
                path.append(f"{a},{xy[i - 1][1]}")
            path.append(f"{a},{b}")
        line = " ".join(path)
        xy = xy[:-1]  # the last point only carries the step to now
    else:
        line = " ".join(f"{a},{b}" for a, b, _ in xy)
    return Series(name, css, line, xy, step)


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


def _page(
    request: Request, template: str, status_code: int = 200, **values: object
) -> HTMLResponse:
    ctx: WebContext = request.app.state.ctx
    now = ctx.clock()
    return templates.TemplateResponse(
        request,
        template,
        {
            "site": ctx.site_name,
            "advisory": ADVISORY,
            "refresh": ctx.refresh_seconds,
            "now": clock_words(now, ctx.site_tz),
            "zone": zone_words(ctx.site_tz, now),
            **values,
        },
        status_code=status_code,
    )


def _missing(request: Request, what: str, hint: str = "") -> HTMLResponse:
    return _page(request, "missing.html", 404, what=what, hint=hint, refresh=None)


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


def _set_session(response: Response, security: WebSecurity) -> None:
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
    ctx: WebContext = request.app.state.ctx
    with ctx.db.begin(read_only=True) as conn:
        names = board_store.known_units(conn)
        counts = board_store.open_flag_counts(conn)
    shown = [unit_count(u, counts.get(u, {})) for u in names]
    shown.sort(key=lambda u: (-u.total, u.name))
    return _page(request, "units.html", units=shown, unplaced=sum(counts.get("", {}).values()))


@router.get("/board/unit/{unit}")
def unit_page(request: Request, unit: str) -> Response:
    if (redirect := _guarded(request)) is not None:
        return redirect
    ctx: WebContext = request.app.state.ctx
    now = ctx.clock()
    with ctx.db.begin(read_only=True) as conn:
        names = board_store.known_units(conn)
        if unit not in names:
            near = [n for n in names if n.casefold() == unit.casefold()]
            hint = f"Did you mean {near[0]}?" if near else ""
            return _missing(request, "unknown unit", hint)
        rows = unit_rows(conn, unit, ctx, now)
    open_rows = [r for r in rows if r.open_flags]
    done = _done_note(request, rows)
    return _page(
        request,
        "unit.html",
        unit=unit,
        rows=rows,
        open_rows=len(open_rows),
        open_flags=sum(len(r.open_flags) for r in rows),
        by_priority=_priority_totals(rows),
        any_adjusted=any(r.gas and r.gas.pf_adjusted for r in rows),
        back=request.url.path,
        done=done,
        acked_row=request.query_params.get("row") if done else None,
        ack_name=_ack_name(request),
        message=request.query_params.get("done"),
    )


def _priority_totals(rows: Sequence[RowView]) -> list[tuple[str, int]]:
    totals: dict[str, int] = {}
    for row in rows:
        for flag in row.open_flags:
            totals[flag.word] = totals.get(flag.word, 0) + 1
    order = ("High priority", "Medium priority", "Low priority")
    return [(w, totals[w]) for w in order if totals.get(w)]


def _done_note(request: Request, rows: Sequence[RowView]) -> str | None:
    """After an acknowledgement: which patient's flags, by whom (from the query)."""
    if request.query_params.get("done") != "acknowledged":
        return None
    target = request.query_params.get("row", "")
    row = next((r for r in rows if r.anchor == target), None)
    who = _ack_name(request)
    count = request.query_params.get("n", "")
    if row is None:
        return "Acknowledgement recorded."
    what = f"{count} flag{'' if count == '1' else 's'}" if count.isdigit() else "flags"
    by = f" as {who}" if who else ""
    return f"Acknowledged {what} for {row.display} ({row.where}){by}."


@router.get("/board/patient/{patient_key:path}")
def patient_page(request: Request, patient_key: str) -> Response:
    if (redirect := _guarded(request)) is not None:
        return redirect
    ctx: WebContext = request.app.state.ctx
    now = ctx.clock()
    with ctx.db.begin(read_only=True) as conn:
        card = board_store.patient_cards(conn, [patient_key]).get(patient_key)
        series = [s.derivation for s in current_derivations(conn, patient_key)]
        beyond = censored_for_patient(conn, patient_key)
        flags = board_store.patient_alerts(conn, patient_key)
        views = [flag_view(a, ctx.site_tz, now) for a in flags]
        for view in views:
            view.events = alerts_store.alert_events(conn, alert_id=view.alert.alert_id)
    if card is None and not series and not flags and not beyond:
        return _missing(request, "unknown patient")
    location = card.location if card else (series[-1].location if series else None)
    display = display_for(
        patient_key, card.display_key if card else None, location, ctx.display_mode
    )
    if ctx.guard is not None:
        ctx.guard.register(patient_key, display)
    where = location.label() if location else "location unknown"
    row = build_row(patient_key, display, where, flags, series, ctx.site_tz, now)
    gases = [d for d in reversed(series) if not d.estimated]
    estimates = [d for d in reversed(series) if d.estimated]
    common, notes = _notes(gases)
    return _page(
        request,
        "patient.html",
        row=row,
        display=display,
        where=where,
        flags=views,
        gases=[
            (d, clock_words(d.drawn_at, ctx.site_tz), compared_pf(d), n)
            for d, n in zip(gases, notes, strict=True)
        ],
        common_notes=common,
        estimates=[(d, clock_words(d.drawn_at, ctx.site_tz)) for d in estimates],
        beyond=[(c, clock_words(c.effective_at, ctx.site_tz)) for c in reversed(beyond)],
        any_adjusted=any(d.pf_ratio_adjusted is not None for d in gases),
        plots=patient_plots(series, now, ctx.site_tz),
        back=request.url.path,
        ack_name=_ack_name(request),
        message=request.query_params.get("done"),
        unit_url=("/board/unit/" + quote(location.unit, safe=""))
        if location and location.unit
        else "/board",
        local=lambda at: clock_words(at, ctx.site_tz),
    )


def _notes(gases: Sequence[Derivation]) -> tuple[list[str], list[list[str]]]:
    """Notes said on every gas go above the table once; the rest stay on their row."""
    per_row = []
    for d in gases:
        marks = sorted(f.value for f in d.flags)
        if d.preliminary:
            marks.insert(0, "preliminary")
        if d.specimen.value != "arterial":
            marks.insert(0, f"{d.specimen.value} sample")
        per_row.append(marks)
    common = sorted(set.intersection(*(set(m) for m in per_row))) if len(per_row) > 1 else []
    return common, [[m for m in marks if m not in common] for marks in per_row]


@router.post("/board/acknowledge")
async def acknowledge_patient(request: Request) -> Response:
    """One acknowledgement for the flags a row showed (their ids travel with the form,
    so a flag raised after the page was drawn is not acknowledged unseen)."""
    if board_user(request) is None:
        return _login_redirect(request)
    if not same_origin(request):
        return Response("form sent from another site", status_code=403)
    form = _form_lists(await request.body())
    back = _safe_next(_first(form, "back", "/board"))
    row = _first(form, "row", "")
    by = " ".join(_first(form, "by", "").split())[:MAX_NAME_LENGTH]
    if not by:
        return RedirectResponse(_with_note(back, "name-needed", row), 303)
    ctx: WebContext = request.app.state.ctx
    done = 0
    for alert_id in form.get("flag", [])[:50]:
        try:
            ctx.pipeline.acknowledge(alert_id, by, now=ctx.clock())
            done += 1
        except LookupError:
            continue
        except IllegalTransition:  # closed or already acknowledged meanwhile: nothing to do
            continue
    log.info("%d flag(s) acknowledged on the board", done)
    note = "acknowledged" if done else "not-open"
    response = RedirectResponse(_with_note(back, note, row, done), 303)
    _remember_name(response, by, request.app.state.security)
    return response


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
    ctx: WebContext = request.app.state.ctx
    try:
        ctx.pipeline.acknowledge(alert_id, by, now=ctx.clock())
    except LookupError:
        return RedirectResponse(_with_note(back, "unknown-flag"), 303)
    except IllegalTransition:
        return RedirectResponse(_with_note(back, "not-open"), 303)
    log.info("flag acknowledged on the board")
    response = RedirectResponse(_with_note(back, "acknowledged", n=1), 303)
    _remember_name(response, by, request.app.state.security)
    return response


def _ack_name(request: Request) -> str:
    return unquote(request.cookies.get(NAME_COOKIE, ""))[:MAX_NAME_LENGTH]


def _remember_name(response: Response, by: str, security: WebSecurity) -> None:
    """The acknowledger's name, kept for a shift so the next form is filled in."""
    response.set_cookie(
        NAME_COOKIE,
        quote(by, safe=" "),
        httponly=True,
        samesite="strict",
        secure=security.secure_cookies,
        max_age=NAME_COOKIE_SECONDS,
    )


def _with_note(path: str, note: str, row: str = "", n: int | None = None) -> str:
    query = f"{path}?done={note}"
    if n is not None:
        query += f"&n={n}"
    if row:
        query += f"&row={quote(row, safe='')}#{quote(row, safe='')}"
    return query


def _form(body: bytes) -> dict[str, str]:
    return {k: v[0] for k, v in _form_lists(body).items()}


def _form_lists(body: bytes) -> dict[str, list[str]]:
    return parse_qs(body.decode("utf-8", errors="replace"), keep_blank_values=True)


def _first(form: dict[str, list[str]], key: str, default: str) -> str:
    values = form.get(key)
    return values[0] if values else default


def _safe_next(target: str) -> str:
    """Only our own board pages are a place to go back to (no open redirect)."""
    if target.startswith("/board") and not target.startswith("//") and "\\" not in target:
        return target.split("?", 1)[0]
    return "/board"
