"""The patient timeline: derivations by drawn time whatever the delivery order, flags
in known-time order on the clinical clock.

Patients, ids and values are invented (Hollowmere General Hospital, sea level here).
Expected flags are worked out from the published thresholds, not read from the code:
the Berlin oxygenation bands 300/200/100 mmHg (ARDS Definition Task Force, JAMA 2012;
docs/reference.md) and the P/F fall rule's 25 % from the day's best (common practice,
no source; the rule's documented default).
"""

from __future__ import annotations

import random
from dataclasses import replace
from datetime import datetime, timedelta

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.engine.model import Kind, Reading, Status
from monitor.engine.timeline import (
    PatientTimeline,
    StepResult,
    TimelineSettings,
    run_timeline,
    step_key,
    time_problem,
)
from tests.unit.engine.readings_factory import BIRTH_DATE, PATIENT, T0, hours, lab, minutes, pao2
from tests.unit.engine.readings_factory import reading as make_reading

SETTINGS = TimelineSettings()


def gas(
    at: datetime, po2: float, fio2: float, *, panel: str, known: datetime | None = None
) -> list[Reading]:
    """An arterial panel (PaO2, PaCO2 40, FiO2 reported with the gas), known at
    ``known`` (default 10 min after the draw)."""
    known = known or at + minutes(10)
    return [
        pao2(po2, at, panel_id=panel, birth_date=BIRTH_DATE, received_at=known),
        lab(Kind.PACO2, 40.0, at, panel_id=panel, received_at=known),
        make_reading(
            Kind.FIO2, fio2, at, panel_id=panel, logical_id=f"fio2-{panel}", received_at=known
        ),
    ]


def events(result: StepResult) -> list[tuple[object, ...]]:
    return [
        (e.alert_id, e.rule, e.event, e.at, e.priority.value, e.state.value, e.sample_id, e.note)
        for change in result.flags
        for e in change.decision.events
    ]


def derived(timeline: PatientTimeline) -> dict[str, object]:
    return dict(sorted(timeline.derivations.items()))


# --- a feed to permute: gases, charted FiO2, SpO2, repeats and corrections -------------


@st.composite
def feeds(draw: st.DrawFn) -> list[Reading]:
    n = draw(st.integers(min_value=2, max_value=6))
    out: list[Reading] = []
    for i in range(n):
        at = T0 + hours(3 * i) + minutes(draw(st.integers(0, 90)))
        delay = minutes(draw(st.integers(5, 8 * 60)))  # known 5 min to 8 h after drawn
        po2 = draw(st.floats(min_value=45, max_value=130, allow_nan=False))
        fio2 = draw(st.sampled_from([0.3, 0.4, 0.5, 0.6, 0.8]))
        panel = f"ABG-{i}"
        out += gas(at, round(po2, 1), fio2, panel=panel, known=at + delay)
        if draw(st.booleans()):  # a correction of the PaO2, known later still
            original = out[-3]
            out.append(
                replace(
                    original,
                    value=round(po2 * 0.8, 1),
                    status=Status.CORRECTED,
                    delivery_id=f"{original.logical_id}#2",
                    received_at=original.received_at + hours(1),
                )
            )
        if draw(st.booleans()):  # SpO2 charted between gases
            out.append(
                make_reading(
                    Kind.SPO2,
                    draw(st.sampled_from([88.0, 91.0, 94.0])),
                    at + minutes(70),
                    logical_id=f"spo2-{i}",
                    received_at=at + minutes(71),
                )
            )
    repeats = draw(st.lists(st.sampled_from(out), max_size=3))
    return out + repeats  # a delivery received twice changes nothing


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(feed=feeds(), seed=st.integers(0, 2**32 - 1))
def test_any_delivery_order_gives_the_same_derivations(feed: list[Reading], seed: int) -> None:
    baseline, _ = run_timeline(PATIENT, feed, SETTINGS)
    shuffled = feed[:]
    random.Random(seed).shuffle(shuffled)
    timeline = PatientTimeline(PATIENT, SETTINGS)
    cut = random.Random(seed + 1)
    i = 0
    while i < len(shuffled):  # delivered in random order, in random-sized units
        n = cut.randint(1, 4)
        timeline.advance(shuffled[i : i + n], seen_at=None)
        i += n
    assert derived(timeline) == derived(baseline)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(feed=feeds(), seed=st.integers(0, 2**32 - 1))
def test_flags_are_those_of_known_time_order_whatever_the_file_order(
    feed: list[Reading], seed: int
) -> None:
    in_order = sorted(feed, key=lambda r: (r.known, r.effective_at, r.delivery_id))
    _, expected = run_timeline(PATIENT, in_order, SETTINGS)
    shuffled = feed[:]
    random.Random(seed).shuffle(shuffled)
    _, got = run_timeline(PATIENT, shuffled, SETTINGS)
    assert events(got) == events(expected)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(feed=feeds())
def test_a_backlog_flush_flags_like_the_same_results_at_their_own_pace(
    feed: list[Reading],
) -> None:
    # Own pace: each result stepped as it becomes known. Flush: all at once, after an
    # interface outage. The clinical clock drives both, so they must agree.
    in_order = sorted(feed, key=lambda r: (r.known, r.effective_at, r.delivery_id))
    paced = PatientTimeline(PATIENT, SETTINGS)
    paced_result = StepResult()
    units: dict[tuple[datetime, datetime], list[Reading]] = {}
    for r in in_order:  # one unit per message: what was known together, drawn together
        units.setdefault(step_key(r), []).append(r)
    for unit in units.values():
        paced_result.extend(paced.advance(unit, seen_at=None))
    flushed = PatientTimeline(PATIENT, SETTINGS)
    flushed_result = flushed.advance(in_order, seen_at=None)
    assert events(flushed_result) == events(paced_result)
    assert derived(flushed) == derived(paced)


# --- late results --------------------------------------------------------------------------


def test_a_late_earlier_gas_completes_a_fall_on_the_newest_gas_and_never_resolves_it() -> None:
    # 10:30 P/F 320 (PaO2 128 on FiO2 0.40) arrives six hours late; 11:00 P/F 220
    # (PaO2 88 on 0.40) arrives at 11:10. The fall 320 -> 220 is 31 % >= 25 %.
    t1030 = T0.replace(hour=10, minute=30)
    t1100 = T0.replace(hour=11)
    newest = gas(t1100, 88.0, 0.40, panel="ABG-B", known=t1100 + minutes(10))
    late = gas(t1030, 128.0, 0.40, panel="ABG-A", known=t1100 + hours(6))
    timeline = PatientTimeline(PATIENT, SETTINGS)
    first = timeline.advance(newest, seen_at=None)
    assert [e[1:3] for e in events(first) if e[1] == "pf-fall"] == []
    assert ("oxygenation-band", "raised", "low") in {(e[1], e[2], e[4]) for e in events(first)}
    second = timeline.advance(late, seen_at=None)
    fall = [e for e in events(second) if e[1] == "pf-fall"]
    assert [(e[2], e[4]) for e in fall] == [("raised", "medium")]
    assert fall[0][3] == t1100 + hours(6)  # raised when the late result arrived
    assert fall[0][6] == "pao2-ABG-B"  # on the newest gas
    assert "late result" in str(fall[0][7])
    assert not [e for e in events(second) if e[2] == "resolved"]


def test_a_late_result_that_clears_never_resolves_a_newer_flag() -> None:
    # 11:00 P/F 150 (moderate) is flagged; a late 10:00 gas with P/F 160 changes the
    # history but the 11:00 gas still stands: no resolution, no retraction.
    t1000 = T0.replace(hour=10)
    t1100 = T0.replace(hour=11)
    timeline = PatientTimeline(PATIENT, SETTINGS)
    timeline.advance(gas(t1100, 60.0, 0.40, panel="B"), seen_at=None)
    result = timeline.advance(
        gas(t1000, 64.0, 0.40, panel="A", known=t1100 + hours(3)), seen_at=None
    )
    assert {e[2] for e in events(result)} <= {"raised", "worsened"}
    assert "oxygenation-band" in timeline.open


def test_a_withdrawn_gas_takes_its_flag_down() -> None:
    readings = gas(T0, 60.0, 0.50, panel="W")  # P/F 120: moderate band
    timeline = PatientTimeline(PATIENT, SETTINGS)
    timeline.advance(readings, seen_at=None)
    assert timeline.open["oxygenation-band"].priority.value == "medium"
    wrong = replace(
        readings[0],
        status=Status.RETRACTED,
        value=None,
        delivery_id="pao2-W#wrong",
        received_at=T0 + hours(2),
    )
    result = timeline.advance([wrong], seen_at=None)
    assert ("oxygenation-band", "retracted") in {(e[1], e[2]) for e in events(result)}
    assert "pao2-W" not in timeline.derivations


# --- clinical clock: cooldown and history ---------------------------------------------------


def test_historical_flags_are_marked_when_computed_long_after_the_draw() -> None:
    settings_ = replace(SETTINGS, historical_after=hours(6))
    timeline = PatientTimeline(PATIENT, settings_)
    result = timeline.advance(gas(T0, 60.0, 0.50, panel="H"), seen_at=T0 + timedelta(days=30))
    assert result.flags and all(c.historical for c in result.flags)
    assert timeline.open["oxygenation-band"].historical
    fresh = PatientTimeline(PATIENT, settings_)
    now = fresh.advance(gas(T0, 60.0, 0.50, panel="H"), seen_at=T0 + minutes(15))
    assert now.flags and not any(c.historical for c in now.flags)


# --- times that cannot be right ---------------------------------------------------------------


def test_a_draw_time_in_the_future_is_refused_with_the_field_named() -> None:
    typo = make_reading(Kind.PAO2, 70.0, T0 + timedelta(days=730), received_at=T0)
    problem = time_problem(
        typo, tolerance=minutes(10), max_age=timedelta(days=3650), birth_date=None
    )
    assert problem is not None and "drawn time" in problem and "in the future" in problem
    # within the clock tolerance (an analyser 5 min ahead) it is taken
    ahead = make_reading(Kind.PAO2, 70.0, T0 + minutes(5), received_at=T0)
    assert (
        time_problem(ahead, tolerance=minutes(10), max_age=timedelta(days=3650), birth_date=None)
        is None
    )


def test_a_draw_before_birth_or_absurdly_old_is_refused() -> None:
    before_birth = make_reading(Kind.PAO2, 70.0, datetime(1960, 1, 1, tzinfo=T0.tzinfo))
    assert "birth" in (
        time_problem(
            before_birth,
            tolerance=minutes(10),
            max_age=timedelta(days=365 * 100),
            birth_date=BIRTH_DATE,
        )
        or ""
    )
    ancient = make_reading(Kind.PAO2, 70.0, datetime(1901, 1, 1, tzinfo=T0.tzinfo), received_at=T0)
    assert "plausible" in (
        time_problem(
            ancient, tolerance=minutes(10), max_age=timedelta(days=365 * 30), birth_date=None
        )
        or ""
    )


def test_a_known_time_after_receipt_counts_as_the_receipt() -> None:
    # a sender whose clock runs ahead cannot make a result known after we had it
    r = replace(make_reading(Kind.PAO2, 70.0, T0), known_at=T0 + hours(5))
    assert r.known == r.received_at
