"""What the unit board and the patient page show, worked out from stored flags and
derivations: pure functions of their inputs and ``now`` (no I/O, no clock).

Three habits run through it:

- A measurement and an estimate never share a field. ``GasView`` holds only what came
  from an arterial gas; ``EstimateView`` holds only what was worked out from SpO2 and
  is always labelled as an estimate.
- Every time carries its date and its age, and old data says so in words
  (``Freshness``), so a March gas cannot pass for this morning's.
- A flag's priority is written in words; a shape repeats it. A closed flag has no
  priority words at all: it says how it closed.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime, timedelta, tzinfo
from enum import StrEnum
from urllib.parse import quote
from zoneinfo import ZoneInfo

from monitor.engine.model import Alert, AlertEvent, AlertState, Derivation, Priority

#: Words and shapes for each open priority. The word is the signal; shape and colour
#: repeat it (triangle up, diamond, circle: distinct in outline, so they survive a
#: grey-scale print and colour-blind eyes).
PRIORITY_LOOK: dict[Priority, tuple[str, str, str]] = {
    Priority.HIGH: ("High priority", "hi", "\u25b2"),
    Priority.MEDIUM: ("Medium priority", "med", "\u25c6"),
    Priority.LOW: ("Low priority", "lo", "\u25cf"),
}
NO_OPEN_FLAG = ("No open flag", "none", "\u2013")

#: Rule ids in plain words, for people. Unknown ids are shown with their dashes as spaces.
RULE_WORDS: dict[str, str] = {
    "oxygenation-band": "P/F in a low band",
    "pf-fall": "P/F fell from its 24 h best",
    "aa-room-air": "A\u2013a above normal for age (room air)",
    "aa-rise": "A\u2013a gradient widening",
    "oxygen-escalation": "Oxygen turned up",
    "sf-low": "S/F low twice, no gas (SpO2 estimate)",
}

#: How a closed flag closed, in words (never a priority).
CLOSED_WORDS: dict[AlertState, str] = {
    AlertState.RESOLVED: "Cleared",
    AlertState.RETRACTED: "Withdrawn (its result was withdrawn)",
}

#: Ages at which a result is shown as older, then as old. Common practice, no source:
#: a unit that draws gases every few hours would expect a new one within 6 h.
OLDER_AFTER = timedelta(hours=6)
STALE_AFTER = timedelta(hours=24)


class Freshness(StrEnum):
    FRESH = "fresh"
    OLDER = "older"
    STALE = "stale"


def rule_words(rule_id: str) -> str:
    return RULE_WORDS.get(rule_id, rule_id.replace("-", " ").replace("_", " ").capitalize())


def zone_words(tz: tzinfo, now: datetime) -> str:
    """The site zone for a page footer or an axis: "site time, UTC-07:00 (America/Denver)".
    Etc/GMT names are left out: their sign reads backwards (Etc/GMT-2 is UTC+2)."""
    offset = offset_words(now.astimezone(tz))
    name = getattr(tz, "key", None) if isinstance(tz, ZoneInfo) else None
    if name and not name.startswith("Etc/") and name != "UTC":
        return f"site time, {offset} ({name})"
    return f"site time, {offset}"


def offset_words(at: datetime) -> str:
    """ "UTC" or "UTC+02:00" / "UTC\u221207:00" for an aware time."""
    delta = at.utcoffset() or timedelta(0)
    if not delta:
        return "UTC"
    minutes = int(delta.total_seconds() // 60)
    sign = "+" if minutes > 0 else "\u2212"
    hours, mins = divmod(abs(minutes), 60)
    return f"UTC{sign}{hours:02d}:{mins:02d}"


def age_words(then: datetime, now: datetime) -> str:
    """ "just now", "12 min ago", "3 h 05 min ago", "2 d 4 h ago"."""
    seconds = int((now - then).total_seconds())
    if seconds < 0:
        return "in the future (clock mismatch)"
    if seconds < 60:
        return "just now"
    minutes = seconds // 60
    if minutes < 60:
        return f"{minutes} min ago"
    hours, minutes = divmod(minutes, 60)
    if hours < 24:
        return f"{hours} h {minutes:02d} min ago"
    days, hours = divmod(hours, 24)
    return f"{days} d {hours} h ago"


def clock_words(at: datetime, tz: tzinfo) -> str:
    """Site time with its date, always: "Tue 05 Mar 09:40"."""
    return at.astimezone(tz).strftime("%a %d %b %H:%M")


def freshness(at: datetime, now: datetime) -> Freshness:
    age = now - at
    if age >= STALE_AFTER:
        return Freshness.STALE
    if age >= OLDER_AFTER:
        return Freshness.OLDER
    return Freshness.FRESH


@dataclass(frozen=True)
class Moment:
    """A time as people read it: date and site time, age, and how fresh."""

    clock: str
    age: str
    freshness: Freshness
    iso: str

    @classmethod
    def of(cls, at: datetime, tz: tzinfo, now: datetime) -> Moment:
        return cls(clock_words(at, tz), age_words(at, now), freshness(at, now), at.isoformat())


def compared_pf(d: Derivation) -> tuple[float | None, bool]:
    """The P/F the rules compare: adjusted for altitude when there is one, else as
    measured; and whether it is the adjusted one."""
    if d.pf_ratio_adjusted is not None:
        return d.pf_ratio_adjusted, True
    return d.pf_ratio, False


def _is_gas(d: Derivation) -> bool:
    return not d.estimated


@dataclass(frozen=True)
class GasView:
    """The latest arterial (or other drawn) gas: measured values and what the engine
    worked out from them. Never holds an SpO2 estimate."""

    pao2: float | None
    fio2: float | None
    fio2_source: str
    pf: float | None
    pf_adjusted: bool
    aa: float | None
    drawn: Moment
    notes: tuple[str, ...]


@dataclass(frozen=True)
class EstimateView:
    """An oxygenation estimate worked out from pulse oximetry, not a blood gas."""

    sf: float | None
    spo2: float | None
    fio2: float | None
    at: Moment


@dataclass(frozen=True)
class Change:
    """One number before and after, with its unit: "P/F 290 -> 182 mmHg"."""

    name: str
    before: str
    after: str
    unit: str


def gas_view(d: Derivation, tz: tzinfo, now: datetime) -> GasView:
    pf, adjusted = compared_pf(d)
    notes: list[str] = []
    if d.fio2 is None:
        notes.append("FiO2 not recorded: no P/F, and no rule could judge this gas")
    if d.specimen.value != "arterial":
        notes.append(f"{d.specimen.value} sample, not arterial")
    if d.preliminary:
        notes.append("preliminary result")
    if d.unreliable:
        notes.append("numbers unreliable: " + "; ".join(sorted(f.value for f in d.flags)))
    return GasView(
        d.pao2,
        d.fio2,
        d.fio2_source.value,
        pf,
        adjusted,
        d.aa_gradient,
        Moment.of(d.drawn_at, tz, now),
        tuple(notes),
    )


def estimate_view(d: Derivation, tz: tzinfo, now: datetime) -> EstimateView:
    return EstimateView(d.sf_ratio, d.spo2, d.fio2, Moment.of(d.drawn_at, tz, now))


def _n(value: float | None, digits: int = 0) -> str:
    return "\u2013" if value is None else f"{value:.{digits}f}"


def changes(before: Derivation | None, after: Derivation) -> list[Change]:
    """The key numbers of the previous gas and the latest one, with units."""
    if before is None:
        return []
    out = []
    pf_b, _ = compared_pf(before)
    pf_a, _ = compared_pf(after)
    pairs = (
        ("P/F", pf_b, pf_a, 0, "mmHg"),
        ("FiO2", before.fio2, after.fio2, 2, ""),
        ("A\u2013a", before.aa_gradient, after.aa_gradient, 0, "mmHg"),
        ("PaO2", before.pao2, after.pao2, 0, "mmHg"),
    )
    for name, b, a, digits, unit in pairs:
        if a is None and b is None:
            continue
        if a is not None and b is not None and round(a, digits) == round(b, digits):
            continue
        out.append(Change(name, _n(b, digits), _n(a, digits), unit))
    return out[:3]


@dataclass
class FlagView:
    alert: Alert
    words: str
    word: str
    css: str
    shape: str
    raised: Moment
    status: str
    closed: Moment | None
    events: list[AlertEvent] = field(default_factory=list)

    @property
    def is_open(self) -> bool:
        return self.alert.state.is_open

    @property
    def needs_ack(self) -> bool:
        return self.alert.state in (AlertState.RAISED, AlertState.ESCALATED)


def flag_view(alert: Alert, tz: tzinfo, now: datetime) -> FlagView:
    closed = None
    if alert.state.is_open:
        word, css, shape = PRIORITY_LOOK[alert.priority]
        if alert.state is AlertState.ACKNOWLEDGED:
            when = alert.acknowledged_at or alert.updated_at
            status = f"acknowledged by {alert.acknowledged_by or 'someone'}, {age_words(when, now)}"
        elif alert.state is AlertState.ESCALATED:
            status = "not acknowledged in time"
        else:
            status = "not acknowledged"
    else:
        word = CLOSED_WORDS.get(alert.state, alert.state.value.capitalize())
        css, shape = "closed", ""
        closed = Moment.of(alert.closed_at or alert.updated_at, tz, now)
        status = word
    if alert.estimated:
        status += "; based on an SpO2 estimate"
    if alert.preliminary:
        status += "; based on preliminary results"
    return FlagView(
        alert,
        rule_words(alert.rule),
        word,
        css,
        shape,
        Moment.of(alert.raised_at, tz, now),
        status,
        closed,
    )


def anchor(patient_key: str) -> str:
    """A page anchor for a patient's row that does not show the patient key."""
    return "p-" + hashlib.sha256(patient_key.encode("utf-8")).hexdigest()[:12]


def patient_url(patient_key: str) -> str:
    return "/board/patient/" + quote(patient_key, safe="")


@dataclass
class RowView:
    """One patient on the unit board."""

    patient_key: str
    anchor: str
    display: str
    where: str
    open_flags: list[FlagView]
    closed_flags: list[FlagView]
    gas: GasView | None
    estimate: EstimateView | None
    changes: list[Change]
    patient_url: str

    @property
    def priority(self) -> tuple[str, str, str]:
        if not self.open_flags:
            return NO_OPEN_FLAG
        top = max(self.open_flags, key=lambda f: f.alert.priority.rank)
        return PRIORITY_LOOK[top.alert.priority]

    @property
    def to_acknowledge(self) -> list[FlagView]:
        return [f for f in self.open_flags if f.needs_ack]


def build_row(
    patient_key: str,
    display: str,
    where: str,
    flags: Sequence[Alert],
    series: Sequence[Derivation],
    tz: tzinfo,
    now: datetime,
) -> RowView:
    """A board row from the patient's flags (open and recently closed) and recent
    derivations (oldest first)."""
    views = [flag_view(a, tz, now) for a in flags]
    open_flags = sorted(
        (v for v in views if v.is_open),
        key=lambda v: (-v.alert.priority.rank, -v.alert.raised_at.timestamp()),
    )
    closed = sorted((v for v in views if not v.is_open), key=lambda v: v.raised.iso, reverse=True)
    gases = [d for d in series if _is_gas(d)]
    latest = gases[-1] if gases else None
    estimates = [
        d for d in series if d.estimated and (latest is None or d.drawn_at > latest.drawn_at)
    ]
    return RowView(
        patient_key=patient_key,
        anchor=anchor(patient_key),
        display=display,
        where=where,
        open_flags=open_flags,
        closed_flags=closed,
        gas=gas_view(latest, tz, now) if latest else None,
        estimate=estimate_view(estimates[-1], tz, now) if estimates else None,
        changes=changes(gases[-2] if len(gases) > 1 else None, latest) if latest else [],
        patient_url=patient_url(patient_key),
    )


def urgency(row: RowView) -> tuple[int, float]:
    """Sort key: the highest open priority first, then the most recent (newest open
    flag raised, or for rows with no open flag the newest draw)."""
    if row.open_flags:
        top = max(f.alert.priority.rank for f in row.open_flags)
        newest = max(f.alert.raised_at.timestamp() for f in row.open_flags)
        return (-top, -newest)
    newest_draw = max(
        (datetime.fromisoformat(m.iso).timestamp() for m in _moments(row)), default=0.0
    )
    return (0, -newest_draw)


def _moments(row: RowView) -> list[Moment]:
    found = [row.gas.drawn] if row.gas else []
    if row.estimate:
        found.append(row.estimate.at)
    return found


@dataclass(frozen=True)
class UnitCount:
    name: str
    url: str
    counts: list[tuple[str, str, str, int]]
    total: int


def unit_count(name: str, counts: dict[Priority, int]) -> UnitCount:
    order = (Priority.HIGH, Priority.MEDIUM, Priority.LOW)
    shown = [(*PRIORITY_LOOK[p], counts.get(p, 0)) for p in order]
    return UnitCount(name, "/board/unit/" + quote(name, safe=""), shown, sum(counts.values()))
