"""Pairing: which readings belong to one blood-gas sample, and what was in effect at its draw.

Theory of operation. ``pair`` takes one PaO2 reading (the *sample*, drawn at ``t``)
and the patient's current readings around ``t`` (the caller passes
``[t - context_window()[0], t + context_window()[1]]``) and returns a ``Snapshot``:
the sample, the PaCO2 / pH / SaO2 / Hb of the same sample, the FiO2 in effect, the
barometric pressure, the body temperature, PEEP, mean airway pressure, SpO2 and age.
Every choice is written down as an ``InputUsed`` with its reason in plain words, and
every doubt as a ``QualityFlag``. Nothing here computes an index; ``derive`` does.

Rules, in brief (the settings hold every window):

- Same sample: same ``panel_id``, else the same patient and an effective time within
  ``same_sample_window`` (2 min) of ``t`` and the same specimen kind (a reading whose
  specimen is unknown is accepted below a known match). A reading of a *different*
  panel never joins by time.
- FiO2 in effect, first that applies: (1) reported with the gas (same panel);
  (2) the latest charted FiO2 (or ventilator setting) at or before ``t`` that is not
  stale (4 h ventilator, 2 h otherwise) and not ended by a later oxygen-therapy
  charting: room air, a low-flow device, a device of another kind (a ventilator setting
  does not carry over to a mask or a high-flow cannula), or an O2 flow of a device
  without a set FiO2 (with no device known, a flow ends a ventilator setting);
  (3) room air charted (latest O2 device, not stale); (4) an FiO2 charted up to 10 min
  *after* ``t``, only when nothing at or before ``t`` documents the FiO2 (flag
  FIO2_CHARTED_AFTER_DRAW); (5) estimated from device and flow (flag ESTIMATED_FIO2);
  (6) unknown (flag FIO2_UNKNOWN).
- FiO2 changed less than 15 min before ``t`` (flag FIO2_NOT_STEADY): the blood has not
  settled on the new value, so the snapshot carries the FiO2 in effect *before* the
  change (the one the blood reflects) and records the new one as the input
  ``fio2_set``, with its time. Every index is then computed on the value the blood
  reflects; the rules and the wording show both.
- Barometric pressure: measured with the sample > site setting > standard atmosphere
  at the site elevation (ESTIMATED_PRESSURE) > 760 mmHg (DEFAULT_PRESSURE).
- Temperature: with the sample, else charted within 4 h before ``t``, else 37 C
  (DEFAULT_TEMPERATURE).
- PEEP and mean airway pressure: latest within 1 h before ``t``. SpO2: nearest within
  15 min either side.
- Retracted readings are never used; of several versions of one logical id only the
  last received counts. Any PRELIMINARY input marks the snapshot preliminary.

Ties are broken by effective time, received time, logical id and delivery id, so the
order of ``context`` never changes the result.
"""

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field, replace
from datetime import UTC, date, datetime, timedelta

from monitor.engine import physiology
from monitor.engine.errors import InvalidInput
from monitor.engine.model import (
    FiO2Source,
    InputUsed,
    Kind,
    O2Device,
    PressureSource,
    QualityFlag,
    Reading,
    Snapshot,
    Specimen,
    Status,
    TemperatureSource,
)

__all__ = [
    "FiO2InEffect",
    "PairingSettings",
    "context_window",
    "current_readings",
    "fio2_in_effect",
    "influence_window",
    "pair",
]


@dataclass(frozen=True, slots=True)
class PairingSettings:
    """Windows and site values for pairing. Durations are ``timedelta``; pressure in
    mmHg (250-800), elevation in metres (-500 to 11000). Defaults are common practice,
    no source, except where the reference sheet says otherwise."""

    fio2_staleness: timedelta = timedelta(hours=2)
    ventilator_staleness: timedelta = timedelta(hours=4)
    charted_after_grace: timedelta = timedelta(minutes=10)
    steady_state: timedelta = timedelta(minutes=15)
    same_sample_window: timedelta = timedelta(minutes=2)
    temperature_window: timedelta = timedelta(hours=4)
    ventilator_window: timedelta = timedelta(hours=1)
    spo2_window: timedelta = timedelta(minutes=15)
    site_barometric_pressure: float | None = None
    site_elevation_m: float | None = None

    def __post_init__(self) -> None:
        for name in (
            "fio2_staleness",
            "ventilator_staleness",
            "charted_after_grace",
            "steady_state",
            "same_sample_window",
            "temperature_window",
            "ventilator_window",
            "spo2_window",
        ):
            value = getattr(self, name)
            if not isinstance(value, timedelta) or value < timedelta(0):
                raise InvalidInput(name, value, "must be a non-negative timedelta")
        pb = self.site_barometric_pressure
        if pb is not None and not 250.0 <= pb <= 800.0:
            raise InvalidInput("site_barometric_pressure", pb, "must be in [250, 800] mmHg")
        elevation = self.site_elevation_m
        if elevation is not None and not -500.0 <= elevation <= 11000.0:
            raise InvalidInput("site_elevation_m", elevation, "must be in [-500, 11000] m")


# --- choosing among readings ------------------------------------------------------------


def _order(r: Reading) -> tuple[datetime, datetime, str, str]:
    """A total order on readings, so that the input order never matters."""
    return (r.effective_at, r.known, r.logical_id, r.delivery_id)


def _usable(r: Reading) -> bool:
    if r.status is Status.RETRACTED:
        return False
    return r.code_value is not None if r.kind is Kind.O2_DEVICE else r.value is not None


def current_readings(readings: Iterable[Reading], patient_key: str) -> list[Reading]:
    """The patient's usable readings: the last-received version of each logical id,
    retracted ones dropped, sorted by effective time (then received time and ids)."""
    latest: dict[str, Reading] = {}
    for r in readings:
        if r.patient_key != patient_key:
            continue
        held = latest.get(r.logical_id)
        if held is None or (r.known, r.delivery_id) > (held.known, held.delivery_id):
            latest[r.logical_id] = r
    return sorted((r for r in latest.values() if _usable(r)), key=_order)


def _of(readings: Sequence[Reading], *kinds: Kind) -> list[Reading]:
    return [r for r in readings if r.kind in kinds]


def _latest_in(readings: Sequence[Reading], start: datetime, end: datetime) -> Reading | None:
    """Latest reading with start <= effective_at <= end (``readings`` sorted)."""
    inside = [r for r in readings if start <= r.effective_at <= end]
    return inside[-1] if inside else None


def _stale_after(r: Reading, settings: PairingSettings) -> timedelta:
    return settings.ventilator_staleness if r.from_ventilator else settings.fio2_staleness


def _fresh(r: Reading, at: datetime, settings: PairingSettings) -> bool:
    """Charted at or before ``at`` and no older than its staleness (boundary included)."""
    return r.effective_at <= at and at - r.effective_at <= _stale_after(r, settings)


# --- plain-words reasons --------------------------------------------------------------


def _span(delta: timedelta) -> str:
    minutes = round(abs(delta).total_seconds() / 60)
    hours, minutes = divmod(minutes, 60)
    if hours and minutes:
        return f"{hours} h {minutes} min"
    if hours:
        return f"{hours} h"
    return f"{minutes} min" if minutes else "less than 1 min"


def _relative(at: datetime, draw: datetime) -> str:
    if at == draw:
        return "at the draw"
    side = "before" if at < draw else "after"
    return f"{_span(at - draw)} {side} the draw"


def _clock(at: datetime) -> str:
    """Reasons are written in UTC: the engine never guesses a site's zone."""
    return f"{at.astimezone(UTC):%H:%M} UTC"


def _when(verb: str, r: Reading, draw: datetime) -> str:
    return f"{verb} {_clock(r.effective_at)}, {_relative(r.effective_at, draw)}"


def _used(role: str, r: Reading, reason: str, value: float | str | None = None) -> InputUsed:
    shown = value if value is not None else (r.value if r.value is not None else r.code_value)
    return InputUsed(
        role=role, value=shown, reason=reason, reading_id=r.logical_id, at=r.effective_at
    )


# --- the same sample --------------------------------------------------------------------


def _same_sample(
    sample: Reading,
    readings: Sequence[Reading],
    kind: Kind,
    settings: PairingSettings,
    *,
    match_specimen: bool,
) -> tuple[Reading, str] | None:
    """The reading of ``kind`` from the same sample as ``sample``, with the reason.

    Same panel first; then, within ``same_sample_window``, the same specimen kind,
    then an unknown specimen; nearest in time; never a reading of another panel.
    """
    t = sample.effective_at
    best: tuple[tuple[int, timedelta, tuple[datetime, datetime, str, str]], Reading, str] | None
    best = None
    for r in _of(readings, kind):
        gap = abs(r.effective_at - t)
        if sample.panel_id is not None and r.panel_id == sample.panel_id:
            rank, why = 0, "same panel as the PaO2"
        elif sample.panel_id is not None and r.panel_id is not None:
            continue  # belongs to another sample's panel
        elif gap > settings.same_sample_window:
            continue
        elif not match_specimen or r.specimen is sample.specimen:
            rank, why = 1, "same sample: " + _when("resulted for", r, t)
        elif Specimen.UNKNOWN in (r.specimen, sample.specimen):
            rank, why = 2, "same sample (specimen not stated): " + _when("resulted for", r, t)
        else:
            continue  # a different specimen kind is a different sample
        key = (rank, gap, _order(r))
        if best is None or key < best[0]:
            best = (key, r, why)
    return None if best is None else (best[1], best[2])


# --- FiO2 in effect ------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class FiO2InEffect:
    """The FiO2 (fraction) in effect at a time, where it came from, and why.

    When the FiO2 changed less than ``steady_state`` before the time asked about,
    ``value`` is the FiO2 in effect *before* the change (the one the blood reflects)
    and ``changed_to``/``changed_at`` say what was set and when; the inputs carry both,
    the new value under the role ``fio2_set``.
    """

    value: float | None
    source: FiO2Source
    flags: frozenset[QualityFlag] = frozenset()
    inputs: tuple[InputUsed, ...] = ()
    used: tuple[Reading, ...] = field(default=(), compare=False)
    changed_to: float | None = None
    changed_at: datetime | None = None


#: Devices that carry no set FiO2: what they give is estimated from their flow.
_LOW_FLOW = frozenset({O2Device.NASAL_CANNULA, O2Device.SIMPLE_MASK, O2Device.RESERVOIR_MASK})
#: Devices whose FiO2 is a ventilator setting.
_VENTILATOR = frozenset({O2Device.NON_INVASIVE_VENTILATION, O2Device.INVASIVE_VENTILATION})


def _device(r: Reading) -> O2Device:
    try:
        return O2Device(r.code_value or "")
    except ValueError:
        return O2Device.OTHER


def _is_room_air(r: Reading) -> bool:
    return r.code_value == O2Device.ROOM_AIR.value


def _later(r: Reading, than: Reading, settings: PairingSettings) -> bool:
    """``r`` was charted after ``than`` as a separate charting: more than the
    same-sample window later (readings charted together document one therapy)."""
    return r.effective_at - than.effective_at > settings.same_sample_window


def _device_ends(fio2: Reading, device: Reading) -> bool:
    """A device charted after a FiO2 ends it unless it is the kind of device that FiO2
    belongs to: room air and the low-flow devices have no set FiO2; a ventilator setting
    does not carry over to a mask or high-flow cannula, nor a mask's FiO2 to a
    ventilator."""
    kind = _device(device)
    if kind is O2Device.ROOM_AIR or kind in _LOW_FLOW:
        return True
    return (kind in _VENTILATOR) is not fio2.from_ventilator


def _flow_ends(fio2: Reading, device: Reading | None) -> bool:
    """An O2 flow charted after a FiO2 ends it when it belongs to a device without a set
    FiO2 (room air, low-flow), or, with no device known, when the FiO2 was a ventilator
    setting (a ventilator is not charted by an O2 flow)."""
    if device is None:
        return fio2.from_ventilator
    return _is_room_air(device) or _device(device) in _LOW_FLOW


@dataclass(frozen=True, slots=True)
class _Therapy:
    """What one moment's charting says about the FiO2 (no after-draw or with-gas value)."""

    value: float | None
    source: FiO2Source
    inputs: tuple[InputUsed, ...]
    used: tuple[Reading, ...]
    notes: tuple[InputUsed, ...] = ()


def _in_effect(
    at: datetime,
    charted: Sequence[Reading],
    devices: Sequence[Reading],
    flows: Sequence[Reading],
    settings: PairingSettings,
) -> _Therapy:
    """The FiO2 in effect at ``at`` from what was charted at or before it.

    The latest charted FiO2 (or ventilator setting) that is not stale holds until a
    later oxygen-therapy charting ends it: a device (``_device_ends``), an O2 flow
    (``_flow_ends``), room air. Then the latest device decides: room air (unless an O2
    flow was charted after it), or an estimate from a low-flow device and the latest
    flow. Readings are sorted, so the order of the context never matters.
    """
    fio2 = next((r for r in reversed(charted) if r.effective_at <= at), None)
    device = next((d for d in reversed(devices) if d.effective_at <= at), None)
    if device is not None and not _fresh(device, at, settings):
        device = None
    flow = next((f for f in reversed(flows) if _fresh(f, at, settings)), None)
    notes: list[InputUsed] = []
    if fio2 is not None and _fresh(fio2, at, settings):
        ended_by = _ended_by(fio2, at, device, devices, flows, settings)
        if ended_by is None:
            setting = " (ventilator setting)" if fio2.from_ventilator else ""
            why = _when("charted", fio2, at) + setting + ", no later change before the draw"
            return _Therapy(fio2.value, FiO2Source.CHARTED, (_used("fio2", fio2, why),), (fio2,))
        what = "device" if ended_by.kind is Kind.O2_DEVICE else "O2 flow"
        notes.append(
            _used(
                "fio2",
                fio2,
                f"{_when('charted', fio2, at)}, no longer in effect: ended by the {what} "
                f"{_when('charted', ended_by, at)}",
            )
        )
    if device is not None and _is_room_air(device):
        if flow is not None and _later(flow, device, settings) and (flow.value or 0.0) > 0.0:
            notes.append(_used("fio2", device, "room air charted, then an O2 flow: device unknown"))
            return _Therapy(None, FiO2Source.UNKNOWN, (), (), tuple(notes))
        why = _when("room air charted", device, at)
        return _Therapy(
            physiology.ROOM_AIR_FIO2,
            FiO2Source.ROOM_AIR,
            (_used("fio2", device, why, physiology.ROOM_AIR_FIO2),),
            (device,),
        )
    if device is not None:
        return _device_estimate(device, flow, at, notes)
    return _Therapy(None, FiO2Source.UNKNOWN, (), (), tuple(notes))


def _ended_by(
    fio2: Reading,
    at: datetime,
    device: Reading | None,
    devices: Sequence[Reading],
    flows: Sequence[Reading],
    settings: PairingSettings,
) -> Reading | None:
    """The later charting (device, else O2 flow) at or before ``at`` that ends a charted
    FiO2 (``_device_ends``, ``_flow_ends``), or None while it still holds."""
    if device is not None and _later(device, fio2, settings) and _device_ends(fio2, device):
        return device
    for f in flows:
        if not (f.effective_at <= at and _later(f, fio2, settings)):
            continue
        owner = next((d for d in reversed(devices) if d.effective_at <= f.effective_at), None)
        if owner is not None and not _fresh(owner, at, settings):
            owner = None
        if _flow_ends(fio2, owner):
            return f
    return None


def _device_estimate(
    device: Reading, flow: Reading | None, at: datetime, notes: list[InputUsed]
) -> _Therapy:
    """The FiO2 estimated from a low-flow device and its latest flow (a rule of thumb,
    ``physiology.estimated_fio2``), or unknown with a note saying why not."""
    try:
        value = physiology.estimated_fio2(
            str(device.code_value), flow.value if flow is not None else None
        )
    except (InvalidInput, ValueError) as exc:
        notes.append(_used("fio2", device, f"not estimated from the device: {exc}"))
        return _Therapy(None, FiO2Source.UNKNOWN, (), (), tuple(notes))
    used = (device,) if flow is None else (device, flow)
    inputs = [_used("o2_device", device, _when("device charted", device, at))]
    if flow is not None:
        inputs.append(_used("o2_flow", flow, _when("flow charted", flow, at)))
    given = f" at {flow.value:g} L/min" if flow is not None else ""
    why = f"estimated from {device.code_value}{given}: a rule of thumb, uncertain by 0.1 or more"
    inputs.append(InputUsed("fio2", value, why, None, at))
    return _Therapy(value, FiO2Source.DEVICE_ESTIMATE, tuple(inputs), used, tuple(notes))


def _recent_change(
    at: datetime,
    charted: Sequence[Reading],
    devices: Sequence[Reading],
    flows: Sequence[Reading],
    settings: PairingSettings,
) -> tuple[datetime, _Therapy, _Therapy] | None:
    """The latest change of the FiO2 in effect less than ``steady_state`` before ``at``:
    (when, what was in effect before, what after). A value counts as a change only
    against a previous value still in effect (not stale) just before it: a first value,
    or one after a gap, says nothing about a change. Chartings within the same-sample
    window of each other count as one."""
    moments = sorted(
        {
            r.effective_at
            for r in (*charted, *devices, *flows)
            if r.effective_at <= at and at - r.effective_at < settings.steady_state
        },
        reverse=True,
    )
    tick = timedelta(microseconds=1)
    for moment in moments:
        after = _in_effect(moment, charted, devices, flows, settings)
        before = _in_effect(
            moment - settings.same_sample_window - tick, charted, devices, flows, settings
        )
        if after.value is None or before.value is None:
            continue
        if abs(after.value - before.value) > 1e-9:
            return moment, before, after
    return None


def _reflected(
    change: tuple[datetime, _Therapy, _Therapy],
    with_gas: Reading | None,
    at: datetime,
    settings: PairingSettings,
) -> FiO2InEffect:
    """After a change less than the steady-state time before the draw, the lung had no
    time to settle: the blood reflects the FiO2 in effect before the change. Judge on
    that one and show the new one (the gas's own, if it carries one) beside it."""
    moment, before, after = change
    new_value = after.value if with_gas is None else with_gas.value
    flags = {QualityFlag.FIO2_NOT_STEADY}
    if before.source is FiO2Source.DEVICE_ESTIMATE:
        flags.add(QualityFlag.ESTIMATED_FIO2)
    why_set = (
        f"set {_clock(moment)}, {_relative(moment, at)}: not used for the indices, "
        f"the blood reflects the FiO2 before the change (less than "
        f"{_span(settings.steady_state)} to settle)"
    )
    until = f"; in effect until {_clock(moment)}, the value the blood reflects"
    inputs = (
        *(replace(i, reason=i.reason + until) if i.role == "fio2" else i for i in before.inputs),
        InputUsed("fio2_set", new_value, why_set, None, moment),
    )
    return FiO2InEffect(
        before.value,
        before.source,
        frozenset(flags),
        inputs,
        before.used + after.used,
        changed_to=new_value,
        changed_at=moment,
    )


def _choose_fio2(
    at: datetime, readings: Sequence[Reading], settings: PairingSettings, panel_id: str | None
) -> FiO2InEffect:
    fio2s = _of(readings, Kind.FIO2)
    with_gas = [r for r in fio2s if panel_id is not None and r.panel_id == panel_id]
    charted = [r for r in fio2s if r not in with_gas]
    devices = _of(readings, Kind.O2_DEVICE)
    flows = _of(readings, Kind.O2_FLOW)
    change = _recent_change(at, charted, devices, flows, settings)
    nearest_with_gas = (
        min(with_gas, key=lambda x: (abs(x.effective_at - at), _order(x))) if with_gas else None
    )
    if change is not None:
        return _reflected(change, nearest_with_gas, at, settings)
    if nearest_with_gas is not None:
        r = nearest_with_gas
        why = "reported with the gas (same panel)"
        used = (_used("fio2", r, why),)
        return FiO2InEffect(r.value, FiO2Source.WITH_GAS, frozenset(), used, (r,))
    therapy = _in_effect(at, charted, devices, flows, settings)
    if therapy.value is not None and therapy.source is not FiO2Source.DEVICE_ESTIMATE:
        return FiO2InEffect(
            therapy.value,
            therapy.source,
            frozenset(),
            therapy.notes + therapy.inputs,
            therapy.used,
        )
    after_draw = [r for r in charted if at < r.effective_at <= at + settings.charted_after_grace]
    if after_draw:
        r = after_draw[0]
        why = _when("charted", r, at) + ": nothing valid at or before the draw"
        return FiO2InEffect(
            r.value,
            FiO2Source.CHARTED_AFTER,
            frozenset({QualityFlag.FIO2_CHARTED_AFTER_DRAW}),
            therapy.notes + (_used("fio2", r, why),),
            (r,),
        )
    if therapy.value is not None:
        return FiO2InEffect(
            therapy.value,
            therapy.source,
            frozenset({QualityFlag.ESTIMATED_FIO2}),
            therapy.notes + therapy.inputs,
            therapy.used,
        )
    note = InputUsed(
        "fio2", None, "no FiO2, room air or device charted within its staleness limit", None, at
    )
    return FiO2InEffect(
        None,
        FiO2Source.UNKNOWN,
        frozenset({QualityFlag.FIO2_UNKNOWN}),
        (*therapy.notes, note),
        (),
    )


def fio2_in_effect(
    patient_key: str,
    at: datetime,
    context: Iterable[Reading],
    settings: PairingSettings,
    *,
    panel_id: str | None = None,
    current: bool = False,
) -> FiO2InEffect:
    """The FiO2 (fraction 0.21-1.0) in effect for ``patient_key`` at ``at``, by the
    priority in this module's docstring. ``panel_id`` names the panel whose own FiO2
    counts as "reported with the gas". ``current``: see ``pair``."""
    readings = list(context) if current else current_readings(context, patient_key)
    return _choose_fio2(at, readings, settings, panel_id)


# --- pressure, temperature, ventilator, SpO2, age ------------------------------------------


def _pressure(
    sample: Reading, readings: Sequence[Reading], settings: PairingSettings
) -> tuple[float, PressureSource, InputUsed, QualityFlag | None, Reading | None]:
    t = sample.effective_at
    found = _same_sample(sample, readings, Kind.BAROMETRIC_PRESSURE, settings, match_specimen=False)
    if found is not None:
        r, why = found
        measured = _used("barometric_pressure", r, why)
        return float(r.value or 0.0), PressureSource.MEASURED, measured, None, r
    if settings.site_barometric_pressure is not None:
        pb = settings.site_barometric_pressure
        note = InputUsed("barometric_pressure", pb, f"site setting {pb:g} mmHg", None, t)
        return pb, PressureSource.SITE_SETTING, note, None, None
    if settings.site_elevation_m is not None:
        pb = physiology.barometric_pressure_at_elevation(settings.site_elevation_m)
        why = (
            f"standard atmosphere at the site elevation {settings.site_elevation_m:g} m "
            "(yearly average; weather moves it 10-20 mmHg)"
        )
        note = InputUsed("barometric_pressure", pb, why, None, t)
        return pb, PressureSource.STANDARD_ATMOSPHERE, note, QualityFlag.ESTIMATED_PRESSURE, None
    pb = physiology.STANDARD_PRESSURE_MMHG
    note = InputUsed(
        "barometric_pressure", pb, "no measured or site pressure: default 760 mmHg", None, t
    )
    return pb, PressureSource.DEFAULT, note, QualityFlag.DEFAULT_PRESSURE, None


def _temperature(
    sample: Reading, readings: Sequence[Reading], settings: PairingSettings
) -> tuple[float, TemperatureSource, InputUsed, Reading | None]:
    t = sample.effective_at
    found = _same_sample(sample, readings, Kind.BODY_TEMPERATURE, settings, match_specimen=False)
    if found is not None:
        r, why = found
        return float(r.value or 0.0), TemperatureSource.WITH_SAMPLE, _used("temperature", r, why), r
    temps = _of(readings, Kind.BODY_TEMPERATURE)
    charted = _latest_in(temps, t - settings.temperature_window, t)
    if charted is not None:
        why = _when("charted", charted, t)
        used = _used("temperature", charted, why)
        return float(charted.value or 0.0), TemperatureSource.CHARTED, used, charted
    limit = _span(settings.temperature_window)
    note = InputUsed(
        "temperature",
        physiology.DEFAULT_TEMPERATURE_C,
        f"none with the sample or charted within {limit} before: default 37 C",
        None,
        t,
    )
    return physiology.DEFAULT_TEMPERATURE_C, TemperatureSource.DEFAULT, note, None


def _latest_before(
    role: str, kind: Kind, readings: Sequence[Reading], t: datetime, window: timedelta
) -> tuple[Reading, InputUsed] | None:
    r = _latest_in(_of(readings, kind), t - window, t)
    return None if r is None else (r, _used(role, r, _when("charted", r, t)))


def _nearest_spo2(
    readings: Sequence[Reading], t: datetime, settings: PairingSettings
) -> tuple[Reading, InputUsed] | None:
    near = [r for r in _of(readings, Kind.SPO2) if abs(r.effective_at - t) <= settings.spo2_window]
    if not near:
        return None
    r = min(near, key=lambda x: (abs(x.effective_at - t), _order(x)))
    return r, _used("spo2", r, _when("recorded", r, t) + " (nearest to the draw)")


def _completed_years(born: date, on: date) -> int:
    return on.year - born.year - ((on.month, on.day) < (born.month, born.day))


def _age(sample: Reading, readings: Sequence[Reading]) -> tuple[float | None, InputUsed | None]:
    """Completed years at the draw, from the sample's birth date or, failing that, the
    last-received reading of the patient that carries one."""
    t = sample.effective_at
    carrier = sample if sample.birth_date is not None else None
    if carrier is None:
        dated = [r for r in readings if r.birth_date is not None]
        carrier = max(dated, key=lambda r: (r.known, r.logical_id, r.delivery_id), default=None)
    if carrier is None or carrier.birth_date is None:
        return None, None
    born = carrier.birth_date
    on = t.astimezone(UTC).date()
    if born > on:
        why = "recorded birth date is after the draw: age not used"
        return None, InputUsed("age", None, why, carrier.logical_id, t)
    years = float(_completed_years(born, on))
    # The birth date itself stays out of the reason: it identifies the patient.
    why = f"{years:g} completed years at the draw, from the recorded birth date"
    return years, InputUsed("age", years, why, carrier.logical_id, t)


# --- the snapshot ----------------------------------------------------------------------------

_LAB_ROLES: tuple[tuple[str, Kind], ...] = (
    ("paco2", Kind.PACO2),
    ("ph", Kind.PH),
    ("sao2", Kind.SAO2),
    ("haemoglobin", Kind.HAEMOGLOBIN),
)


@dataclass(slots=True)
class _Provenance:
    """What pairing used for one sample, as it goes: the readings, why each was chosen,
    and the quality marks."""

    used: list[Reading]
    inputs: list[InputUsed]
    flags: set[QualityFlag] = field(default_factory=set)

    def take(self, reading: Reading, why: InputUsed) -> float | None:
        self.used.append(reading)
        self.inputs.append(why)
        return reading.value


def _sample_provenance(sample: Reading) -> _Provenance:
    t = sample.effective_at
    arterial = sample.specimen is Specimen.ARTERIAL
    note = "" if arterial else ": not arterial, no A-a or P/F"
    why = _used("pao2", sample, f"the sample, {sample.specimen} blood drawn {_clock(t)}{note}")
    prov = _Provenance(used=[sample], inputs=[why])
    if not arterial:
        prov.flags.add(QualityFlag.NOT_ARTERIAL)
    return prov


def _lab_values(
    sample: Reading, readings: Sequence[Reading], settings: PairingSettings, prov: _Provenance
) -> dict[str, float | None]:
    """PaCO2, pH, SaO2 and Hb of the same sample (``_LAB_ROLES``)."""
    lab: dict[str, float | None] = {}
    for role, kind in _LAB_ROLES:
        found = _same_sample(sample, readings, kind, settings, match_specimen=True)
        lab[role] = None if found is None else prov.take(found[0], _used(role, *found))
    return lab


def _nearby_values(
    readings: Sequence[Reading], t: datetime, settings: PairingSettings, prov: _Provenance
) -> dict[str, float | None]:
    """PEEP and mean airway pressure (latest in the ventilator window) and SpO2 (nearest)."""
    window = settings.ventilator_window
    nearby: dict[str, float | None] = {}
    for role, found in (
        ("peep", _latest_before("peep", Kind.PEEP, readings, t, window)),
        (
            "mean_airway_pressure",
            _latest_before("mean_airway_pressure", Kind.MEAN_AIRWAY_PRESSURE, readings, t, window),
        ),
        ("spo2", _nearest_spo2(readings, t, settings)),
    ):
        nearby[role] = None if found is None else prov.take(*found)
    return nearby


def _conditions(
    sample: Reading, readings: Sequence[Reading], settings: PairingSettings, prov: _Provenance
) -> tuple[float, PressureSource, float, TemperatureSource]:
    """The barometric pressure and the body temperature of the sample, with sources."""
    pb, pb_source, pb_input, pb_flag, pb_reading = _pressure(sample, readings, settings)
    prov.inputs.append(pb_input)
    if pb_flag is not None:
        prov.flags.add(pb_flag)
    if pb_reading is not None:
        prov.used.append(pb_reading)
    temp, temp_source, temp_input, temp_reading = _temperature(sample, readings, settings)
    prov.inputs.append(temp_input)
    if temp_reading is None:
        prov.flags.add(QualityFlag.DEFAULT_TEMPERATURE)
    else:
        prov.used.append(temp_reading)
    return pb, pb_source, temp, temp_source


def pair(
    sample: Reading,
    context: Sequence[Reading],
    settings: PairingSettings,
    *,
    current: bool = False,
) -> Snapshot:
    """Pair one PaO2 reading with everything in effect at its draw.

    ``sample`` is a PaO2 reading (mmHg) of any specimen; anything but ARTERIAL gives a
    snapshot flagged NOT_ARTERIAL (an unknown specimen is not assumed arterial:
    reference sheet section 10, LOINC 11556-8). ``context`` holds the patient's readings
    around the draw (see ``context_window``); other patients' readings, retracted
    readings and superseded versions are ignored. Raises ``InvalidInput`` only when
    ``sample`` is not a usable PaO2 reading.

    ``current``: the caller vouches that ``context`` is already what
    ``current_readings`` would make of it (only the sample's patient, one reading per
    logical id, none retracted or unusable, sorted by effective time, then known time
    and ids), as a patient timeline's context is; the sorting and filtering are then
    not done again. The result is the same either way.
    """
    if sample.kind is not Kind.PAO2 or sample.value is None or sample.status is Status.RETRACTED:
        raise InvalidInput("sample", sample.logical_id, "must be a PaO2 reading with a value")
    t = sample.effective_at
    held = context if current else current_readings(context, sample.patient_key)
    readings = [r for r in held if r.logical_id != sample.logical_id]
    prov = _sample_provenance(sample)
    lab = _lab_values(sample, readings, settings, prov)

    fio2 = _choose_fio2(t, readings, settings, sample.panel_id)
    prov.flags |= fio2.flags
    prov.used.extend(fio2.used)
    prov.inputs.extend(fio2.inputs)

    pb, pb_source, temp, temp_source = _conditions(sample, readings, settings, prov)
    nearby = _nearby_values(readings, t, settings, prov)
    age, age_input = _age(sample, readings)
    if age_input is not None:
        prov.inputs.append(age_input)
    if age is None:
        prov.flags.add(QualityFlag.AGE_UNKNOWN)

    preliminary = any(r.status is Status.PRELIMINARY for r in prov.used)
    if preliminary:
        prov.flags.add(QualityFlag.PRELIMINARY_INPUTS)

    return Snapshot(
        patient_key=sample.patient_key,
        sample_id=sample.logical_id,
        drawn_at=t,
        specimen=sample.specimen,
        pao2=sample.value,
        fio2=fio2.value,
        fio2_source=fio2.source,
        barometric_pressure=pb,
        pressure_source=pb_source,
        temperature_c=temp,
        temperature_source=temp_source,
        paco2=lab["paco2"],
        ph=lab["ph"],
        sao2=lab["sao2"],
        haemoglobin=lab["haemoglobin"],
        peep=nearby["peep"],
        mean_airway_pressure=nearby["mean_airway_pressure"],
        spo2=nearby["spo2"],
        age_years=age,
        location=sample.location,
        preliminary=preliminary,
        inputs=tuple(prov.inputs),
        flags=frozenset(prov.flags),
    )


# --- which samples a reading can affect -------------------------------------------------------


def context_window(settings: PairingSettings) -> tuple[timedelta, timedelta]:
    """How far (before, after) the draw time ``t`` the caller must fetch readings for
    ``pair``: the longest look-back of any rule (the longest FiO2 staleness plus the
    steady-state window, so the value a recent change replaced is seen), and the
    longest look-ahead (after-draw grace, same-sample and SpO2 windows)."""
    staleness = max(settings.fio2_staleness, settings.ventilator_staleness)
    before = max(
        # the value a recent change replaced, looked up just before that charting
        staleness + settings.steady_state + settings.same_sample_window,
        settings.temperature_window,
        settings.ventilator_window,
        settings.spo2_window,
        settings.same_sample_window,
    )
    after = max(settings.charted_after_grace, settings.same_sample_window, settings.spo2_window)
    return before, after


def influence_window(kind: Kind, settings: PairingSettings) -> tuple[timedelta, timedelta]:
    """For a reading of ``kind`` effective at ``x``: ``(before, after)`` such that only
    samples drawn in ``[x - before, x + after]`` can pair differently when the reading
    arrives late, is corrected or is withdrawn. The pipeline re-pairs those samples.

    - PaCO2, pH, SaO2, Hb, barometric pressure: the same-sample window either side.
      A panel member joins its PaO2 by ``panel_id`` whatever the times, so the caller
      also re-pairs the samples of the reading's own panel.
    - FiO2: ``charted_after_grace`` before (charted after the draw); after, the
      longest staleness plus ``steady_state`` plus the same-sample window (it stays in
      effect that long, and a change from it within that time raises FIO2_NOT_STEADY;
      the value before a change is looked up just before that charting).
    - O2 device and O2 flow: nothing before, the same after (a device or a flow can
      end a charted FiO2, give room air or an estimate, and make a change).
    - Body temperature: the same-sample window before, the temperature window after.
    - PEEP, mean airway pressure: nothing before, the ventilator window after.
    - SpO2: the SpO2 window either side.
    - PaO2: (0, 0): a PaO2 is its own sample and pairs with no other.
    A reading's ``birth_date`` can change the age of any sample of the patient; the
    pipeline treats a new birth date as a reason to re-pair all of them.
    """
    held = _INFLUENCE.get(id(settings))
    if held is None or held[0] is not settings:
        if len(_INFLUENCE) > 64:
            _INFLUENCE.clear()
        held = _INFLUENCE[id(settings)] = (settings, _influence_windows(settings))
    return held[1][Kind(kind)]


#: The windows of each settings object (frozen), by its id: a timeline asks for every
#: reading it steps, and building them cost more than the pairing they decide.
_INFLUENCE: dict[int, tuple[PairingSettings, dict[Kind, tuple[timedelta, timedelta]]]] = {}


def _influence_windows(settings: PairingSettings) -> dict[Kind, tuple[timedelta, timedelta]]:
    staleness = max(settings.fio2_staleness, settings.ventilator_staleness)
    same = settings.same_sample_window
    therapy = staleness + settings.steady_state + same
    windows: dict[Kind, tuple[timedelta, timedelta]] = {
        Kind.PAO2: (timedelta(0), timedelta(0)),
        Kind.PACO2: (same, same),
        Kind.PH: (same, same),
        Kind.SAO2: (same, same),
        Kind.HAEMOGLOBIN: (same, same),
        Kind.BAROMETRIC_PRESSURE: (same, same),
        Kind.FIO2: (settings.charted_after_grace, therapy),
        Kind.O2_DEVICE: (timedelta(0), therapy),
        Kind.O2_FLOW: (timedelta(0), therapy),
        Kind.BODY_TEMPERATURE: (same, max(same, settings.temperature_window)),
        Kind.PEEP: (timedelta(0), settings.ventilator_window),
        Kind.MEAN_AIRWAY_PRESSURE: (timedelta(0), settings.ventilator_window),
        Kind.SPO2: (settings.spo2_window, settings.spo2_window),
    }
    return windows
