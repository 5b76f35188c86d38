"""The pipeline end to end on a real database (SQLite and PostgreSQL): readings in,
derivations, flags and queued notifications out, in one transaction per batch.

Patients, ids and values are invented (Hollowmere General Hospital, 1,600 m). Expected
priorities are worked out in the test from the published thresholds, not read from
the code: Berlin bands 300/200/100 (ARDS Definition Task Force, JAMA 2012; reference
sheet s.5), altitude adjustment P/F x 760/PB with PB 626.51 mmHg at 1,600 m (US
Standard Atmosphere 1976, sheet s.3).
"""

from __future__ import annotations

from dataclasses import replace
from datetime import timedelta

import pytest

from monitor.engine.model import FiO2Source, Kind, QualityFlag, Specimen, Status
from monitor.engine.pairing import PairingSettings
from monitor.pipeline import Inbound, Pipeline, PipelineSettings, RejectedInput, Routing
from storage import alerts as alerts_store
from storage import derivations as derivations_store
from storage import outbox
from storage.db import open_database
from tests.unit.engine.readings_factory import (
    BIRTH_DATE,
    PATIENT,
    T0,
    fio2,
    hours,
    lab,
    minutes,
    pao2,
    reading,
)

PB_1600_M = 626.51  # sheet s.3 (US Standard Atmosphere 1976), mmHg


def band_priority(pf: float, pb: float) -> str | None:
    """The issue's rule 1, written from its text: adjusted above 1000 m (PB < 674)."""
    ratio = pf * 760 / pb if pb < 674 else pf
    if ratio <= 100:
        return "high"
    if ratio <= 200:
        return "medium"
    if ratio <= 300:
        return "low"
    return None


@pytest.fixture
def pipeline(db_url: str) -> Pipeline:
    settings = PipelineSettings(
        pairing=PairingSettings(site_elevation_m=1600.0),
        routing=Routing(
            by_unit={"ICU-North": ["icu-webhook"]}, default=["log"], escalation=["pager"]
        ),
    )
    db = open_database(db_url)
    yield Pipeline(db, settings)
    db.dispose()


def gas(at, po2, paco2=40.0, *, panel, fio2_value=None, peep=None, **kw):
    """An arterial panel; FiO2 (and PEEP) reported with the gas when given."""
    items = [
        pao2(po2, at, panel_id=panel, birth_date=BIRTH_DATE, **kw),
        lab(Kind.PACO2, paco2, at, panel_id=panel),
    ]
    if fio2_value is not None:
        items.append(reading(Kind.FIO2, fio2_value, at, panel_id=panel, logical_id=f"fio2-{panel}"))
    if peep is not None:
        items.append(
            reading(
                Kind.PEEP, peep, at - minutes(5), logical_id=f"peep-{panel}", from_ventilator=True
            )
        )
    return items


def events(p: Pipeline):
    with p.db.begin() as conn:
        return alerts_store.alert_events(conn, patient_key=PATIENT)


def test_a_worsening_ventilated_patient_is_flagged_with_a_queued_notification(
    pipeline: Pipeline,
) -> None:
    first = pipeline.accept(
        Inbound(gas(T0, 130, panel="A1", fio2_value=0.40, peep=8)), now=T0 + minutes(20)
    )
    assert band_priority(130 / 0.40, PB_1600_M) is None
    assert not [e for e in first.alert_events if e.rule == "oxygenation-band"]

    later = T0 + hours(6)
    report = pipeline.accept(
        Inbound(gas(later, 60, panel="A2", fio2_value=0.60, peep=10)), now=later + minutes(20)
    )
    expected = band_priority(60 / 0.60, PB_1600_M)
    assert expected == "medium"  # 100 x 760/626.51 = 121.3
    band = [e for e in report.alert_events if e.rule == "oxygenation-band"]
    assert [(e.event, e.priority.value) for e in band] == [("raised", expected)]
    # P/F fell from 325 to 100 (-69 %), >= 25 % of the best in 24 h -> medium (rule 2);
    # FiO2 rose 0.20 in 6 h -> medium (rule 5).
    raised = {e.rule: e.priority.value for e in report.alert_events if e.event == "raised"}
    assert raised.get("pf-fall") == "medium"
    assert raised.get("oxygen-escalation") == "medium"

    with pipeline.db.begin() as conn:
        queued = outbox.outbox_items(conn)
    band_notes = [q for q in queued if q.notification.rule == "oxygenation-band"]
    assert {q.channel for q in band_notes} == {"icu-webhook"}  # routed by unit
    note = band_notes[0].notification
    assert "clinicians decide" in note.advisory  # said once, beside the detail
    assert "Berlin moderate" in note.summary  # PEEP 10 >= 5: Berlin words apply
    assert note.patient_display and PATIENT not in note.summary.replace(note.patient_display, "")


def test_the_same_batch_twice_changes_nothing(pipeline: Pipeline) -> None:
    batch = gas(T0, 60, panel="B1", fio2_value=0.6, peep=10)
    first = pipeline.accept(Inbound(list(batch)), now=T0 + minutes(20))
    again = pipeline.accept(Inbound(list(batch)), now=T0 + minutes(40))
    assert first.stored == len(batch) and first.derivations >= 1
    assert (again.stored, again.duplicates, again.derivations) == (0, len(batch), 0)
    assert again.alert_events == []
    with pipeline.db.begin() as conn:
        assert len(outbox.outbox_items(conn)) == first.notifications


def test_a_correction_supersedes_and_keeps_the_history(pipeline: Pipeline) -> None:
    original = gas(T0, 60, panel="C1", fio2_value=0.5)
    pipeline.accept(Inbound(original), now=T0 + minutes(20))
    corrected = replace(
        original[0],
        value=80.0,
        status=Status.CORRECTED,
        delivery_id="pao2-C1#2",
        received_at=T0 + hours(1),
    )
    report = pipeline.accept(Inbound([corrected]), now=T0 + hours(1))
    assert report.derivations == 1
    with pipeline.db.begin() as conn:
        history = derivations_store.derivation_history(conn, PATIENT, original[0].logical_id)
    assert [h.version for h in history] == [1, 2]
    assert history[0].derivation.pf_ratio == pytest.approx(60 / 0.5)
    assert history[1].derivation.pf_ratio == pytest.approx(80 / 0.5)


def test_a_withdrawn_result_retracts_its_derivation_and_its_flag(pipeline: Pipeline) -> None:
    batch = gas(T0, 50, panel="D1", fio2_value=0.6, peep=10)
    first = pipeline.accept(Inbound(batch), now=T0 + minutes(20))
    expected = band_priority(50 / 0.6, PB_1600_M)  # 83.3 x 760/626.51 = 101.1 -> medium
    raised = [e for e in first.alert_events if e.rule == "oxygenation-band"]
    assert [(e.event, e.priority.value) for e in raised] == [("raised", expected)]
    withdrawn = replace(
        batch[0],
        value=None,
        status=Status.RETRACTED,
        delivery_id="pao2-D1#wrong",
        received_at=T0 + hours(2),
    )
    report = pipeline.accept(Inbound([withdrawn]), now=T0 + hours(2))
    assert report.retracted_derivations == 1
    retracted = [e for e in report.alert_events if e.event == "retracted"]
    assert {e.rule for e in retracted} >= {"oxygenation-band"}
    with pipeline.db.begin() as conn:
        assert alerts_store.open_alerts(conn, PATIENT) == []
        current = derivations_store.current_derivations(conn, PATIENT)
        notes = [q.notification.event for q in outbox.outbox_items(conn)]
    assert all(s.retracted for s in current if s.derivation.sample_id == batch[0].logical_id)
    assert "retracted" in notes  # the withdrawal is told too


def test_a_venous_gas_never_gives_an_aa_gradient_or_a_flag(pipeline: Pipeline) -> None:
    venous = [
        pao2(38, T0, panel_id="V1", specimen=Specimen.VENOUS),
        lab(Kind.PACO2, 46, T0, panel_id="V1", specimen=Specimen.VENOUS),
        reading(Kind.FIO2, 0.21, T0, panel_id="V1", logical_id="fio2-V1"),
    ]
    report = pipeline.accept(Inbound(venous), now=T0 + minutes(20))
    assert report.alert_events == []
    with pipeline.db.begin() as conn:
        (stored,) = derivations_store.current_derivations(conn, PATIENT)
    d = stored.derivation
    assert (d.aa_gradient, d.pf_ratio, d.alveolar_po2) == (None, None, None)
    assert QualityFlag.NOT_ARTERIAL in d.flags


def test_fio2_charted_after_the_gas_re_derives_it(pipeline: Pipeline) -> None:
    pipeline.accept(Inbound(gas(T0, 70, panel="E1")), now=T0 + minutes(20))
    with pipeline.db.begin() as conn:
        (before,) = derivations_store.current_derivations(conn, PATIENT)
    assert before.derivation.pf_ratio is None
    assert QualityFlag.FIO2_UNKNOWN in before.derivation.flags
    late = fio2(0.35, T0 + minutes(5), logical_id="fio2-late")
    pipeline.accept(Inbound([late]), now=T0 + minutes(30))
    with pipeline.db.begin() as conn:
        (after,) = derivations_store.current_derivations(conn, PATIENT)
    assert after.version == 2
    assert after.derivation.fio2_source is FiO2Source.CHARTED_AFTER
    assert after.derivation.pf_ratio == pytest.approx(70 / 0.35)


def test_an_unacknowledged_medium_flag_escalates_and_an_acknowledged_one_does_not(
    pipeline: Pipeline,
) -> None:
    report = pipeline.accept(
        Inbound(gas(T0, 60, panel="F1", fio2_value=0.6, peep=10)), now=T0 + minutes(20)
    )
    band = next(e for e in report.alert_events if e.rule == "oxygenation-band")
    assert pipeline.escalate_due(now=T0 + minutes(30)) == []  # 10 min: not yet
    escalated = pipeline.escalate_due(now=T0 + minutes(51))  # 31 min after the raise
    assert band.alert_id in {e.alert_id for e in escalated if e.event == "escalated"}
    with pipeline.db.begin() as conn:
        channels = {
            q.channel for q in outbox.outbox_items(conn) if q.notification.event == "escalated"
        }
    assert channels == {"icu-webhook", "pager"}
    acked = pipeline.acknowledge(band.alert_id, "Nurse Quill", now=T0 + minutes(60))
    assert acked.acknowledged_by == "Nurse Quill"
    # Escalated and then acknowledged: nothing further to escalate for this flag.
    later = pipeline.escalate_due(now=T0 + hours(3))
    assert band.alert_id not in {e.alert_id for e in later}
    with pytest.raises(LookupError):
        pipeline.acknowledge("no-such-flag", "Nurse Quill", now=T0 + hours(3))


def test_rejected_input_is_kept_with_its_reason_and_the_rest_is_stored(
    pipeline: Pipeline,
) -> None:
    from storage.quarantine import list_quarantine

    inbound = Inbound(
        gas(T0, 90, panel="G1", fio2_value=0.21),
        rejected=[RejectedInput("hl7:lab", b"MSH|broken", "OBX[2]-5: value 'x' is not a number")],
    )
    report = pipeline.accept(inbound, now=T0 + minutes(20))
    assert report.quarantined == 1 and report.stored == 3
    with pipeline.db.begin() as conn:
        kept = list_quarantine(conn, 10)
    assert len(kept) == 1 and "not a number" in kept[0].reason


def test_a_late_gas_is_derived_but_raises_nothing_of_its_own(pipeline: Pipeline) -> None:
    pipeline.accept(Inbound(gas(T0, 130, panel="H2", fio2_value=0.4)), now=T0 + minutes(20))
    early = gas(T0 - timedelta(hours=3), 50, panel="H1", fio2_value=0.6, peep=10)
    report = pipeline.accept(Inbound(early), now=T0 + hours(1))
    assert report.derivations >= 1
    assert not [e for e in report.alert_events if e.event == "raised"]
