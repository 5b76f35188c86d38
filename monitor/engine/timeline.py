"""A patient's timeline: the one place where readings become derivations and flags.

Theory of operation
-------------------
Patients are independent. Everything gasgap concludes about one patient is a function
of that patient's readings, each carrying three times (``Reading.effective_at``, when
drawn or charted; ``Reading.known``, when the result became available;
``Reading.received_at``, when gasgap got it). ``PatientTimeline`` holds those readings
and steps through them in known-time order:

- **Derivations** follow the readings by drawn time only. At every step the samples a
  new, corrected or withdrawn reading can affect (``pairing.influence_window``) are
  paired and derived again from the current readings, so the same readings give the
  same derivations whatever order they were delivered in, repeats and corrections
  included. The current version of a result is chosen by ``precedence`` (known time,
  then status, then delivery id), never by arrival.
- **Flags** are judged in known-time order. A step is every reading known at one
  instant and drawn at one time (a gas panel, a charting); at each step the rules judge
  the patient's newest gas and newest SpO2 estimate as of that instant. Windows,
  cooldown and hysteresis run on the clinical clock (draw times). The clock never runs
  back: a reading known before the last instant already judged (a late delivery) is
  judged at that last instant.
- **Late results.** A result drawn before the newest sample raises nothing of its own,
  but when it changes what the newest sample's trend rules see, the newest sample is
  judged again: a flag raised that way says so. Such a re-judgement never resolves a
  flag, and never takes one back: only a change of the newest sample's own derivation
  can.
- **Withdrawals** retract the derivations of the withdrawn samples and the open flags
  that stood on any withdrawn result.
- **History.** A flag standing on a sample drawn longer than
  ``TimelineSettings.historical_after`` before the moment it was computed (``seen_at``:
  the wall clock live, the record time in a replay) is recorded as historical: it is
  kept and shown, never sent.

The live service keeps a bounded cache of timelines and steps one per arriving unit;
historical loads build each timeline from all of a patient's readings. Both call the
same ``advance``, so both write the same rows.

Pure: no I/O, no clock; time comes in as arguments.
"""

from __future__ import annotations

import bisect
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field, replace
from datetime import date, datetime, timedelta

from monitor.engine import alerts, rules
from monitor.engine.alerts import AlertSettings
from monitor.engine.derive import DerivationSettings, derive, derive_spo2_series
from monitor.engine.model import (
    Alert,
    AlertState,
    Derivation,
    FiO2Source,
    Kind,
    Reading,
    Status,
)
from monitor.engine.pairing import PairingSettings, context_window, influence_window, pair
from monitor.engine.rules import RuleSet, default_rules

#: Which delivery of a result wins when two say different things: the later known,
#: then the more final status, then the delivery id (a total order, so any arrival
#: order picks the same one).
_STATUS_RANK = {
    Status.PRELIMINARY: 0,
    Status.FINAL: 1,
    Status.CORRECTED: 2,
    Status.RETRACTED: 3,
}


def precedence(r: Reading) -> tuple[datetime, int, str]:
    """The order in which deliveries of one result supersede each other."""
    return (r.known, _STATUS_RANK.get(r.status, 1), r.delivery_id)


def _by_time(r: Reading) -> tuple[datetime, datetime, str, str]:
    return (r.effective_at, r.known, r.logical_id, r.delivery_id)


def step_key(r: Reading) -> tuple[datetime, datetime]:
    """Readings known at one instant and drawn at one time are judged as one step."""
    return (r.known, r.effective_at)


def _usable(r: Reading) -> bool:
    if r.status is Status.RETRACTED:
        return False
    return r.code_value is not None if r.kind is Kind.O2_DEVICE else r.value is not None


@dataclass(frozen=True, slots=True)
class TimelineSettings:
    """Everything a timeline needs from the site configuration.

    ``history``: how far back the rules look (the P/F fall window, default 24 h).
    ``historical_after``: a flag on a sample drawn longer than this before it was
    computed is historical (never sent); None: no flag is historical.
    ``simulate_escalation``: escalate unacknowledged flags on the timeline's own clock
    (replay: nobody acknowledges, so every medium and high flag still raised
    ``escalate_after`` after it could first be seen is escalated).
    """

    pairing: PairingSettings = field(default_factory=PairingSettings)
    derivation: DerivationSettings = field(default_factory=DerivationSettings)
    rules: RuleSet = field(default_factory=default_rules)
    alerts: AlertSettings = field(default_factory=AlertSettings)
    history: timedelta = timedelta(hours=24)
    historical_after: timedelta | None = None
    simulate_escalation: bool = False


@dataclass(frozen=True, slots=True)
class DerivedVersion:
    """A new current version of a sample's derivation (``retracted``: the sample was
    withdrawn or can no longer be derived; ``derivation`` is then its last values)."""

    derivation: Derivation
    at: datetime
    reason: str
    retracted: bool = False


@dataclass(frozen=True, slots=True)
class FlagChange:
    """One alert decision, with the derivation and numbers behind it, to be stored
    (and, unless historical, notified)."""

    decision: alerts.Decision
    derivation: Derivation | None
    numbers: dict[str, object]
    at: datetime
    historical: bool = False


@dataclass(slots=True)
class StepResult:
    """What stepping a timeline changed, in the order it happened."""

    derivations: list[DerivedVersion] = field(default_factory=list)
    flags: list[FlagChange] = field(default_factory=list)
    duplicates: int = 0

    def extend(self, other: StepResult) -> None:
        self.derivations.extend(other.derivations)
        self.flags.extend(other.flags)
        self.duplicates += other.duplicates


#: The kinds an SpO2 estimate reads besides the SpO2 itself: the FiO2 in effect comes
#: from charted FiO2, O2 devices and O2 flows only (``pairing.fio2_in_effect``).
_THERAPY_KINDS = frozenset({Kind.FIO2, Kind.O2_DEVICE, Kind.O2_FLOW})


@dataclass(slots=True)
class _EstimateInputs:
    """What changed in one step that an SpO2 estimate can read: the SpO2 results
    themselves (``spo2s``, logical ids), and the influence windows and panels of the
    changed FiO2, O2 device and O2 flow readings. An SpO2 touched by none of them
    estimates as it did (``derive._spo2_derivation`` reads the SpO2 and the FiO2 in
    effect, which reads only those kinds, in its context window or its panel), so
    it is not estimated again."""

    spo2s: set[str] = field(default_factory=set)
    windows: list[tuple[datetime, datetime]] = field(default_factory=list)
    panels: set[str] = field(default_factory=set)

    def touch(self, r: Reading) -> bool:
        if r.logical_id in self.spo2s or (r.panel_id is not None and r.panel_id in self.panels):
            return True
        t = r.effective_at
        return any(s <= t <= e for s, e in self.windows)


@dataclass(slots=True)
class _Judged:
    derivation: Derivation
    own_change: bool


class PatientTimeline:
    """One patient's readings, derivations and flags, stepped in known-time order.

    Build it empty (a new patient, a historical load) or from stored state
    (``restore``), then call ``advance`` with new readings. The object only grows by
    ``advance`` and shrinks by ``forget_before``; it never reads a clock.
    """

    def __init__(
        self,
        patient_key: str,
        settings: TimelineSettings,
        *,
        birth_date: date | None = None,
    ) -> None:
        self.patient_key = patient_key
        self.settings = settings
        self.birth_date = birth_date
        #: Every delivery seen, by delivery id (repeats change nothing).
        self._deliveries: set[str] = set()
        #: Every delivery of each result, and the current one.
        self._versions: dict[str, list[Reading]] = {}
        self._current: dict[str, Reading] = {}
        #: Usable current readings by drawn time, and their sort keys (for bisect).
        self._timeline: list[Reading] = []
        self._keys: list[tuple[datetime, datetime, str, str]] = []
        self._panels: dict[str, set[str]] = {}
        #: Current derivations (gases and estimates) by sample id, not retracted, and
        #: their (drawn time, sample id) keys in order, gases and estimates apart.
        self.derivations: dict[str, Derivation] = {}
        self._order: dict[bool, list[tuple[datetime, str]]] = {False: [], True: []}
        self.open: dict[str, Alert] = {}
        self.last_closed: dict[str, Alert] = {}
        #: The last known instant judged; the clinical clock never runs back past it.
        self.instant: datetime | None = None
        #: Readings drawn before this were left out when the timeline was restored or
        #: trimmed: a new reading that needs them requires a fuller restore.
        self.covers_from: datetime | None = None

    # --- building -------------------------------------------------------------------

    @classmethod
    def restore(
        cls,
        patient_key: str,
        settings: TimelineSettings,
        *,
        readings: Iterable[Reading],
        derivations: Iterable[Derivation],
        open_alerts: Iterable[Alert],
        last_closed: Iterable[Alert],
        birth_date: date | None,
        instant: datetime | None,
        covers_from: datetime | None,
    ) -> PatientTimeline:
        """A timeline in the state storage holds: its readings (every delivery),
        current derivations, open flags and the last closed flag of each rule."""
        t = cls(patient_key, settings, birth_date=birth_date)
        for r in readings:
            t._add_delivery(r)
        for d in derivations:
            t._put(d)
        t.open = {a.rule: a for a in open_alerts}
        t.last_closed = {a.rule: a for a in last_closed}
        t.instant = instant
        t.covers_from = covers_from
        return t

    def needs_from(self, readings: Sequence[Reading]) -> datetime:
        """The earliest draw time whose readings must be held to step ``readings``."""
        before, _ = context_window(self.settings.pairing)
        earliest = min(
            r.effective_at - influence_window(r.kind, self.settings.pairing)[0] for r in readings
        )
        return earliest - before - self.settings.history

    def forget_before(self, cutoff: datetime) -> None:
        """Drop readings and derivations drawn before ``cutoff`` (bounded memory for a
        long-lived cache); a later reading that needs them asks for a restore."""
        keep = [r for r in self._timeline if r.effective_at >= cutoff]
        if len(keep) == len(self._timeline):
            return
        dropped = {r.logical_id for r in self._timeline if r.effective_at < cutoff}
        for lid in dropped:
            for v in self._versions.pop(lid, []):
                self._deliveries.discard(v.delivery_id)
            self._current.pop(lid, None)
        self._timeline = keep
        self._keys = [_by_time(r) for r in keep]
        for sid in [k for k, d in self.derivations.items() if d.drawn_at < cutoff]:
            self._drop(sid)
        self.covers_from = max(cutoff, self.covers_from) if self.covers_from else cutoff

    # --- stepping ---------------------------------------------------------------------

    def advance(self, readings: Iterable[Reading], *, seen_at: datetime | None) -> StepResult:
        """Take ``readings`` (any order, repeats allowed), step through them in
        known-time order, and return what changed. ``seen_at``: when this is computed
        (the wall clock live), for deciding whether a flag is historical and when it
        could first be seen; None: each step is seen at its own known instant (a replay
        of a feed at its own pace)."""
        fresh: list[Reading] = []
        result = StepResult()
        seen: set[str] = set()
        for r in readings:
            if r.patient_key != self.patient_key:
                raise ValueError(
                    f"reading {r.delivery_id!r}: patient {r.patient_key!r} is not this timeline's"
                )
            if r.delivery_id in self._deliveries or r.delivery_id in seen:
                result.duplicates += 1
                continue
            seen.add(r.delivery_id)
            fresh.append(r)
        fresh.sort(key=lambda r: (step_key(r), r.logical_id, r.delivery_id))
        i = 0
        while i < len(fresh):
            j = i
            key = step_key(fresh[i])
            while j < len(fresh) and step_key(fresh[j]) == key:
                j += 1
            result.extend(self._step(fresh[i:j], seen_at))
            i = j
        return result

    def escalate_until(self, until: datetime) -> StepResult:
        """Escalate, each at the moment it fell due, the raised medium and high flags
        not acknowledged ``escalate_after`` after they could first be seen, up to
        ``until`` (replay; historical flags never escalate)."""
        result = StepResult()
        for rule in sorted(self.open):
            alert = self.open[rule]
            due = alerts.escalation_due_at(alert, self.settings.alerts)
            if due is None or due > until:
                continue
            for decision in alerts.escalate_due([alert], due, self.settings.alerts):
                self._keep(decision)
                result.flags.append(FlagChange(decision, None, {}, due))
        return result

    # --- one step -----------------------------------------------------------------------

    def _step(self, group: Sequence[Reading], seen: datetime | None) -> StepResult:
        result = StepResult()
        known = group[0].known
        instant = known if self.instant is None or known > self.instant else self.instant
        seen_at = instant if seen is None else seen
        if self.settings.simulate_escalation:
            result.extend(self.escalate_until(instant))
        self.instant = instant
        ps = self.settings.pairing

        windows: list[tuple[datetime, datetime]] = []
        panels: set[str] = set()
        withdrawn: set[str] = set()
        touched_times: list[datetime] = []
        direct: set[str] = set()
        estimates = _EstimateInputs()
        for r in group:
            before = self._current.get(r.logical_id)
            self._add_delivery(r)
            after = self._current.get(r.logical_id)
            if after is before:
                continue  # an older delivery: it changes nothing
            for version in (before, after):
                if version is None:
                    continue
                if version.kind is Kind.PAO2:
                    # a PaO2 is its own sample and pairs with no other (influence_window)
                    direct.add(version.logical_id)
                    touched_times.append(version.effective_at)
                    continue
                lo, hi = influence_window(version.kind, ps)
                window = (version.effective_at - lo, version.effective_at + hi)
                windows.append(window)
                touched_times.append(version.effective_at)
                if version.panel_id:
                    panels.add(version.panel_id)
                if version.kind is Kind.SPO2:
                    estimates.spo2s.add(version.logical_id)
                elif version.kind in _THERAPY_KINDS:
                    estimates.windows.append(window)
                    if version.panel_id:
                        estimates.panels.add(version.panel_id)
            if after is not None and after.status is Status.RETRACTED:
                withdrawn.add(r.logical_id)
            if r.birth_date is not None and r.birth_date != self.birth_date:
                self.birth_date = r.birth_date
                # a birth date can change the age, and so the expected A-a, of any sample
                # (an estimate reads no age: estimated again all the same, to be plain)
                everything = (
                    datetime.min.replace(tzinfo=known.tzinfo),
                    datetime.max.replace(tzinfo=known.tzinfo),
                )
                windows.append(everything)
                estimates.windows.append(everything)
        if not windows and not direct:
            return result
        result.extend(
            self._follow(
                windows, panels, withdrawn, touched_times, instant, seen_at, direct, estimates
            )
        )
        return result

    def refresh(self, *, seen_at: datetime | None) -> StepResult:
        """Derive every held sample again and judge, at the last instant (readings of
        another key were joined to this patient: the pairing may now find more)."""
        if self.instant is None:
            return StepResult()
        tz = self.instant.tzinfo
        everything = [(datetime.min.replace(tzinfo=tz), datetime.max.replace(tzinfo=tz))]
        return self._follow(
            everything,
            set(),
            set(),
            [],
            self.instant,
            self.instant if seen_at is None else seen_at,
        )

    def _follow(
        self,
        windows: list[tuple[datetime, datetime]],
        panels: set[str],
        withdrawn: set[str],
        touched_times: list[datetime],
        instant: datetime,
        seen_at: datetime,
        direct: set[str] | None = None,
        estimates: _EstimateInputs | None = None,
    ) -> StepResult:
        """Re-derive what changed readings can affect (``direct``: samples changed
        themselves; ``estimates``: what changed that SpO2 estimates read, None: every
        SpO2 in ``windows`` and ``panels`` is estimated again), withdraw, judge."""
        result = StepResult()
        stood = (
            {
                sid
                for sid, d in self.derivations.items()
                if sid in withdrawn or any(i.reading_id in withdrawn for i in d.inputs)
            }
            if withdrawn
            else set()
        )
        changed: dict[str, Derivation] = {}
        changed_times: list[datetime] = list(touched_times)
        for d, reason, retracted in self._rederive(
            windows, panels, withdrawn, direct or set(), estimates
        ):
            result.derivations.append(DerivedVersion(d, instant, reason, retracted))
            changed_times.append(d.drawn_at)
            if not retracted:
                changed[d.sample_id] = d

        self._withdraw_flags(stood, instant, result)
        for judged in self._to_judge(changed, changed_times):
            self._judge(judged, instant, seen_at, result)
        return result

    def _add_delivery(self, r: Reading) -> None:
        self._deliveries.add(r.delivery_id)
        self._versions.setdefault(r.logical_id, []).append(r)
        held = self._current.get(r.logical_id)
        if held is not None and precedence(held) >= precedence(r):
            return
        if held is not None and _usable(held):
            k = _by_time(held)
            i = bisect.bisect_left(self._keys, k)
            if i < len(self._keys) and self._keys[i] == k:
                del self._keys[i]
                del self._timeline[i]
        self._current[r.logical_id] = r
        if _usable(r):
            k = _by_time(r)
            i = bisect.bisect_left(self._keys, k)
            self._keys.insert(i, k)
            self._timeline.insert(i, r)
            if r.panel_id:
                self._panels.setdefault(r.panel_id, set()).add(r.logical_id)

    def _put(self, d: Derivation) -> None:
        held = self.derivations.get(d.sample_id)
        if held is not None:
            self._drop(d.sample_id)
        self.derivations[d.sample_id] = d
        bisect.insort(self._order[d.estimated], (d.drawn_at, d.sample_id))

    def _drop(self, sample_id: str) -> Derivation | None:
        held = self.derivations.pop(sample_id, None)
        if held is not None:
            order = self._order[held.estimated]
            i = bisect.bisect_left(order, (held.drawn_at, held.sample_id))
            if i < len(order) and order[i] == (held.drawn_at, held.sample_id):
                del order[i]
        return held

    def _window(self, estimated: bool, lo: datetime, hi: datetime) -> list[tuple[datetime, str]]:
        order = self._order[estimated]
        i = bisect.bisect_left(order, (lo, ""))
        j = bisect.bisect_right(order, (hi, "\U0010ffff"))
        return order[i:j]

    def _between(self, lo: datetime, hi: datetime) -> list[Reading]:
        i = bisect.bisect_left(self._keys, (lo,))
        j = bisect.bisect_right(self._keys, (hi, datetime.max.replace(tzinfo=hi.tzinfo)))
        return self._timeline[i:j]

    def _context(self, at: datetime, panel_id: str | None) -> list[Reading]:
        """The readings pairing needs around ``at`` (and the panel's own), already what
        ``pairing.current_readings`` would make of them: only current, usable readings
        of this patient (``advance`` refuses another's; ``restore`` is given the
        patient's own), one per logical id, sorted by ``_by_time`` (pairing's order)."""
        before, after = context_window(self.settings.pairing)
        # A PaO2 pairs with no other PaO2 (pairing.influence_window): leaving the other
        # samples out keeps a pathological feed (thousands of gases at one time) linear.
        context = [r for r in self._between(at - before, at + after) if r.kind is not Kind.PAO2]
        if panel_id:
            inside = {r.logical_id for r in context}
            extra = [
                self._current[lid]
                for lid in sorted(self._panels.get(panel_id, ()))
                if lid not in inside and lid in self._current and _usable(self._current[lid])
            ]
            if extra:
                context = sorted([*context, *extra], key=_by_time)
        return context

    def _rederive(
        self,
        windows: list[tuple[datetime, datetime]],
        panels: set[str],
        withdrawn: set[str],
        direct: set[str],
        estimates: _EstimateInputs | None = None,
    ) -> list[tuple[Derivation, str, bool]]:
        """Derive again every sample the changed readings can affect; returns the new
        versions (derivation, reason, retracted)."""
        gases, spo2s = self._affected(windows, panels, direct, estimates)
        out = self._rederive_gases(gases)
        out += self._rederive_estimates(spo2s)
        # Samples whose own result was withdrawn (they are no longer in the timeline).
        for lid in sorted(withdrawn):
            gone = self._drop(lid)
            if gone is not None:
                out.append((gone, "result withdrawn", True))
        return out

    def _affected(
        self,
        windows: list[tuple[datetime, datetime]],
        panels: set[str],
        direct: set[str],
        estimates: _EstimateInputs | None = None,
    ) -> tuple[dict[str, Reading], dict[str, Reading]]:
        """The current gases (PaO2) and SpO2 readings, by logical id, that fall in one of
        ``windows``, belong to one of ``panels`` or are named in ``direct``; of the SpO2
        readings only those ``estimates`` touches, when given (``_EstimateInputs``)."""

        def inside(r: Reading) -> bool:
            return (
                (r.panel_id is not None and r.panel_id in panels)
                or any(s <= r.effective_at <= e for s, e in windows)
                or r.logical_id in direct
            )

        def current(lids: Iterable[str]) -> list[Reading]:
            return [
                self._current[lid]
                for lid in lids
                if lid in self._current and _usable(self._current[lid])
            ]

        candidates: list[Reading] = []
        if windows:
            candidates = self._between(min(w[0] for w in windows), max(w[1] for w in windows))
        candidates += current(sorted(direct))
        for panel in panels:
            candidates += current(self._panels.get(panel, ()))
        gases = {r.logical_id: r for r in candidates if r.kind is Kind.PAO2 and inside(r)}
        spo2s = {
            r.logical_id: r
            for r in candidates
            if r.kind is Kind.SPO2 and inside(r) and (estimates is None or estimates.touch(r))
        }
        return gases, spo2s

    def _rederive_gases(self, gases: dict[str, Reading]) -> list[tuple[Derivation, str, bool]]:
        out: list[tuple[Derivation, str, bool]] = []
        for lid in sorted(gases, key=lambda k: _by_time(gases[k])):
            sample = gases[lid]
            context = self._context(sample.effective_at, sample.panel_id)
            derivation = derive(
                pair(sample, context, self.settings.pairing, current=True),
                self.settings.derivation,
            )
            if self.derivations.get(lid) != derivation:
                self._put(derivation)
                out.append((derivation, "new or changed readings", False))
        return out

    def _rederive_estimates(self, spo2s: dict[str, Reading]) -> list[tuple[Derivation, str, bool]]:
        estimated: dict[str, Derivation] = {}
        for r in sorted(spo2s.values(), key=_by_time):
            for d in derive_spo2_series(
                [r],
                self._context(r.effective_at, r.panel_id),
                self.settings.derivation,
                self.settings.pairing,
                current=True,
            ):
                estimated[d.sample_id] = d
        out: list[tuple[Derivation, str, bool]] = []
        for lid in sorted(spo2s, key=lambda k: _by_time(spo2s[k])):
            new = estimated.get(lid)
            held = self.derivations.get(lid)
            if new is not None and held != new:
                self._put(new)
                out.append((new, "SpO2 between gases", False))
            elif new is None and held is not None:
                # what it stood on changed (a device charted, FiO2 corrected): an
                # estimate that can no longer be made must not stay current
                self._drop(lid)
                out.append((held, "no longer estimable from what is charted", True))
        return out

    def _withdraw_flags(self, stood: set[str], instant: datetime, result: StepResult) -> None:
        """Take back the open flags raised on samples that stood on a withdrawn result
        (``stood``: those samples, read before they were derived again)."""
        for rule in sorted(self.open):
            alert = self.open[rule]
            if alert.sample_id in stood:
                decision = alerts.retract(
                    alert, instant, "a result this flag stood on was withdrawn", alert.sample_id
                )
                self._keep(decision)
                result.flags.append(
                    FlagChange(decision, None, {}, instant, historical=_is_historical(alert))
                )

    def _to_judge(self, changed: dict[str, Derivation], times: list[datetime]) -> list[_Judged]:
        """The newest gas and the newest estimate, when this step changed them or
        anything their rules look back at."""
        out: list[_Judged] = []
        for estimated in (False, True):
            order = self._order[estimated]
            if not order:
                continue
            newest = self.derivations[order[-1][1]]
            own = newest.sample_id in changed
            since = newest.drawn_at - self.settings.history
            if own or any(since <= t <= newest.drawn_at for t in times):
                out.append(_Judged(newest, own))
        out.sort(key=lambda j: (j.derivation.drawn_at, j.derivation.sample_id))
        return out

    def _history(self, d: Derivation) -> rules.PatientHistory:
        since = d.drawn_at - self.settings.history
        stored = sorted(
            (
                self.derivations[sid]
                for estimated in (False, True)
                for _, sid in self._window(estimated, since, d.drawn_at)
            ),
            key=lambda p: (p.drawn_at, p.sample_id),
        )
        points = [
            rules.FiO2Point(r.effective_at, r.value, FiO2Source.CHARTED, r.logical_id)
            for r in self._between(since, d.drawn_at)
            if r.kind is Kind.FIO2 and r.value is not None
        ]
        points += [
            rules.FiO2Point(p.drawn_at, p.fio2, p.fio2_source, p.sample_id)
            for p in stored
            if p.fio2 is not None
        ]
        return rules.PatientHistory(
            derivations=[p for p in stored if not p.estimated],
            fio2_points=sorted(points, key=lambda p: p.at),
            estimated=[p for p in stored if p.estimated],
        )

    def _judge(
        self, judged: _Judged, instant: datetime, seen_at: datetime, result: StepResult
    ) -> None:
        d = judged.derivation
        historical = (
            self.settings.historical_after is not None
            and seen_at - d.drawn_at > self.settings.historical_after
        )
        outcomes = rules.evaluate(self.settings.rules, d, self._history(d), d.drawn_at)
        for outcome in outcomes:
            open_alert = self._take_back_unsupported(judged, outcome, instant, result)
            if not _is_news(judged.own_change, outcome, open_alert):
                continue
            last_closed = self.last_closed.get(outcome.rule_id) if open_alert is None else None
            decision = alerts.apply_outcome(
                open_alert, last_closed, outcome, d, instant, self.settings.alerts
            )
            if decision.alert is None:
                continue
            decision = _stamped(decision, judged, seen_at, historical)
            self._keep(decision)
            result.flags.append(
                FlagChange(
                    decision,
                    d,
                    outcome.numbers,
                    instant,
                    historical=historical or _is_historical(open_alert),
                )
            )

    def _take_back_unsupported(
        self, judged: _Judged, outcome: rules.RuleOutcome, instant: datetime, result: StepResult
    ) -> Alert | None:
        """The rule's open flag, or None when there is none or it was just taken back:
        the sample it stands on was derived anew (a correction, a late input) and no
        longer supports any flag of this rule. (Still firing at another priority, the
        flag worsens or is lowered instead.)"""
        d = judged.derivation
        open_alert = self.open.get(outcome.rule_id)
        if (
            not judged.own_change
            or open_alert is None
            or open_alert.sample_id != d.sample_id
            or outcome.fired
        ):
            return open_alert
        decision = alerts.retract(
            open_alert, instant, "the result behind this flag changed", d.sample_id
        )
        self._keep(decision)
        result.flags.append(
            FlagChange(decision, d, outcome.numbers, instant, _is_historical(open_alert))
        )
        return None

    def _keep(self, decision: alerts.Decision) -> None:
        alert = decision.alert
        if alert is None:
            return
        if alert.state.is_open:
            self.open[alert.rule] = alert
        else:
            self.open.pop(alert.rule, None)
            self.last_closed[alert.rule] = alert


def _is_news(own_change: bool, outcome: rules.RuleOutcome, open_alert: Alert | None) -> bool:
    """Whether an outcome may change the rule's flag. A judgement of a newer sample again
    (a late result, ``own_change`` False) never resolves a flag (only a new sample can)
    nor lowers one: only a worse state is news."""
    if not outcome.fired and not (outcome.cleared and own_change):
        return False
    if outcome.cleared and open_alert is None:
        return False
    return not (
        not own_change
        and open_alert is not None
        and outcome.priority is not None
        and outcome.priority.rank <= open_alert.priority.rank
    )


def _stamped(
    decision: alerts.Decision, judged: _Judged, seen_at: datetime, historical: bool
) -> alerts.Decision:
    """The decision with what the timeline knows and the state machine does not: a note
    on its events when a late result made the judgement, when the flag could first be
    seen (escalation counts from then), and whether it is historical."""
    d = judged.derivation
    if not judged.own_change:
        note = f"judged again when a late result arrived (sample drawn {d.drawn_at.isoformat()})"
        decision = replace(
            decision, events=[replace(e, note=e.note or note) for e in decision.events]
        )
    changed = decision.alert
    assert changed is not None
    if changed.state is AlertState.RAISED and decision.notify:
        # raised or worsened: escalation counts from when it could be seen
        changed = replace(changed, seen_at=seen_at)
    if historical and changed.state.is_open:
        changed = replace(changed, historical=True)
    return replace(decision, alert=changed)


def _is_historical(alert: Alert | None) -> bool:
    return alert is not None and alert.historical


def time_problem(
    r: Reading, *, tolerance: timedelta, max_age: timedelta, birth_date: date | None
) -> str | None:
    """Why ``r``'s draw time cannot be right, or None. A result cannot be drawn after
    it was known or received (beyond ``tolerance`` for clocks that differ), before the
    patient was born, or longer than ``max_age`` before it was received. Such a time
    would move the patient's clinical clock and mute every real result after it."""
    drawn = r.effective_at
    field_name = "drawn time (OBR-7/OBX-14, Observation.effective)"
    if drawn > r.received_at + tolerance:
        return (
            f"draw time in the future: {field_name} {drawn.isoformat()} is after the "
            f"result was received ({r.received_at.isoformat()})"
        )
    if r.known_at is not None and drawn > r.known_at + tolerance:
        return (
            f"draw time in the future: {field_name} {drawn.isoformat()} is after the "
            f"result was known ({r.known_at.isoformat()})"
        )
    if birth_date is not None and drawn.date() < birth_date:
        return (
            f"draw time before birth: {field_name} {drawn.isoformat()} is before the "
            f"patient's birth ({birth_date})"
        )
    if drawn < r.received_at - max_age:
        return (
            f"draw time not plausible: {field_name} {drawn.isoformat()} is more than "
            f"{max_age.days} days before it was received"
        )
    return None


def run_timeline(
    patient_key: str,
    readings: Iterable[Reading],
    settings: TimelineSettings,
    *,
    seen_at: datetime | None = None,
    until: datetime | None = None,
    birth_date: date | None = None,
) -> tuple[PatientTimeline, StepResult]:
    """A whole timeline at once (historical loads, tests): every reading of one
    patient stepped in known-time order from an empty state. ``seen_at``: when this is
    computed (None: each step is seen at its own known instant, as a replay does);
    ``until``: with simulated escalation, escalate what fell due up to then."""
    timeline = PatientTimeline(patient_key, settings, birth_date=birth_date)
    result = timeline.advance(readings, seen_at=seen_at)
    if settings.simulate_escalation and until is not None:
        result.extend(timeline.escalate_until(until))
    return timeline, result
