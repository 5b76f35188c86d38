"""The nurses' station webhook is down (connection refused) while flags are raised, then
comes up: the notifications wait in the outbox, retried with backoff, and are then
delivered once each, in order per patient.

The service is built in-process from a site configuration (``build_service``: the same
pipeline, channels and outbox dispatcher ``gasgap serve`` runs); messages go in by the
MLLP callback (``Service.on_hl7``) and the test drives the dispatcher's rounds itself
with a backoff of seconds instead of the site default of 30 s (the service has no
configuration key for it). The webhook receiver is a real HTTP server on a fixed
loopback port that is simply not listening at first.

Invented gases (Hollowmere, 1,600 m). Which gases flag is worked independently in
tests/integration/service/test_serve_process.py (P/F altitude-adjusted by 760/PB,
Berlin bands, JAMA 2012): PaO2 55 on FiO2 0.60 medium, 40 high, 200 none.
"""

from __future__ import annotations

import time
from collections import defaultdict
from datetime import timedelta
from pathlib import Path

import pytest

from monitor.config import load_config
from monitor.outbox.retry import DispatchPolicy
from monitor.service import build_service
from tests.integration.service.test_serve_process import expected_priority
from tests.reliability.helpers import (
    API_TOKEN,
    BOARD_TOKEN,
    Receiver,
    free_port,
    gas,
    minutes_ago,
    outbox_rows,
    site_toml,
)

CHANNEL = "icu-north-station"
PATIENTS = ("HM660001", "HM660002", "HM660003")
PAO2_SERIES = (55, 40, 200, 200, 55)  # raise, worsen, resolve (after the hold), again
DOWN_FOR_S = 3.0


@pytest.mark.timeout(120)
def test_notifications_wait_for_a_down_webhook_then_arrive_once_in_order(
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    assert expected_priority(55, 0.60, 1600)[1] == "medium"
    assert expected_priority(40, 0.60, 1600)[1] == "high"
    assert expected_priority(200, 0.60, 1600)[1] is None

    monkeypatch.setenv("GASGAP_TEST_API_TOKEN", API_TOKEN)
    monkeypatch.setenv("GASGAP_TEST_BOARD_TOKEN", BOARD_TOKEN)
    receiver = Receiver()  # its port is fixed now, but nothing listens yet
    db_url = f"sqlite:///{tmp_path}/gasgap.db"
    config_path = tmp_path / "site.toml"
    config_path.write_text(
        site_toml(db_url=db_url, http_port=free_port(), mllp_port=None, webhook_url=receiver.url)
    )
    service = build_service(load_config(config_path))
    dispatcher = service.dispatcher
    dispatcher.policy = DispatchPolicy(
        max_attempts=100, base=timedelta(seconds=0.2), cap=timedelta(seconds=1), jitter=0.25
    )
    dispatcher.lease_seconds = 5
    try:
        start = minutes_ago(6 * 60)
        n = 0
        for step, pao2 in enumerate(PAO2_SERIES):
            for i, mrn in enumerate(PATIENTS):
                n += 1
                control = f"CH{n:04d}"
                text = gas(
                    control,
                    mrn,
                    f"F-{control}",
                    pao2=pao2,
                    drawn=start + timedelta(minutes=60 * step + i),
                    bed=str(i + 1),
                )
                assert service.on_hl7(text.encode()).code == "AA"

        # Down: every round fails with connection refused; items wait and retry.
        rounds = 0
        until = time.monotonic() + DOWN_FOR_S
        while time.monotonic() < until:
            report = dispatcher.run_once()
            assert report.sent == 0 and report.dead == 0
            rounds += 1
            time.sleep(0.1)
        waiting = outbox_rows(db_url, CHANNEL)
        first_per_patient = {}
        for row in waiting:
            first_per_patient.setdefault(row["patient_key"], row)
        assert set(first_per_patient) == set(PATIENTS)
        assert all(r["status"] == "pending" for r in waiting)
        # The head of each patient's queue was retried with backoff (several attempts
        # in 3 s, far fewer than the rounds); the items behind it were held back.
        for row in first_per_patient.values():
            assert 2 <= row["attempts"] < rounds, (row["attempts"], rounds)
        heads = {r["id"] for r in first_per_patient.values()}
        assert all(r["attempts"] == 0 for r in waiting if r["id"] not in heads)

        # Up: everything is delivered.
        receiver.start()
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            dispatcher.run_once()
            if all(r["status"] == "sent" for r in outbox_rows(db_url, CHANNEL)):
                break
            time.sleep(0.1)
    finally:
        receiver.stop()
        service.dispatcher.close()
        service.db.dispose()

    rows = outbox_rows(db_url, CHANNEL)
    assert rows and all(r["status"] == "sent" for r in rows)
    keys, _bodies = receiver.snapshot()
    # Once each (no process died here, so no repeat is expected at all).
    assert sorted(keys) == sorted(r["idempotency_key"] for r in rows)
    assert len(keys) == len(set(keys))
    # In order per patient: arrival order equals the outbox's (creation) order.
    patient_of = {r["idempotency_key"]: r["patient_key"] for r in rows}
    arrived: dict[str, list[str]] = defaultdict(list)
    for key in keys:
        arrived[patient_of[key]].append(key)
    queued: dict[str, list[str]] = defaultdict(list)
    for row in rows:
        queued[row["patient_key"]].append(row["idempotency_key"])
    assert arrived == queued
    assert all(len(v) >= 2 for v in queued.values()), "each patient has several changes"


@pytest.mark.slow
@pytest.mark.timeout(240)
def test_gasgap_serve_retries_a_down_webhook_on_its_own_schedule(tmp_path: Path) -> None:
    """The same outage against the real ``gasgap serve`` process with the site's own
    backoff (first retry after 22.5-30 s: base 30 s, jitter 25 %), killed and started
    again while the receiver is down: once the receiver is up, the retry comes from the
    new process's outbox timer alone (no new message arrives to wake it; before the
    scheduler fix of this issue it never came), and every notification arrives once,
    in order per patient."""
    from tests.reliability.helpers import MllpSession, ServiceProcess, wait_until

    receiver = Receiver()
    db_url = f"sqlite:///{tmp_path}/gasgap.db"
    http_port, mllp_port = free_port(), free_port()
    config = tmp_path / "site.toml"
    config.write_text(
        site_toml(db_url=db_url, http_port=http_port, mllp_port=mllp_port, webhook_url=receiver.url)
    )
    service = ServiceProcess(config, http_port, tmp_path / "service.log")
    try:
        service.start()
        session = MllpSession(mllp_port)
        start = minutes_ago(5 * 60)
        for step, pao2 in enumerate((55, 40)):
            for i, mrn in enumerate(PATIENTS[:2]):
                control = f"CS{step}{i}"
                text = gas(
                    control,
                    mrn,
                    f"F-{control}",
                    pao2=pao2,
                    drawn=start + timedelta(minutes=60 * step + i),
                    bed=str(i + 1),
                )
                assert session.send(text) == "AA"
        session.close()
        failed = wait_until(
            lambda: all(
                r["attempts"] >= 1
                for r in outbox_rows(db_url, CHANNEL)
                if r["id"] in _heads(outbox_rows(db_url, CHANNEL))
            ),
            timeout=20,
        )
        assert failed, outbox_rows(db_url, CHANNEL)
        # A restart in between (SIGKILL): the new process has only the backlog it finds
        # in the database, and no new message will come to wake its outbox.
        service.kill()
        service.start()
        receiver.start()
        delivered = wait_until(
            lambda: all(r["status"] == "sent" for r in outbox_rows(db_url, CHANNEL)),
            timeout=120,
            every=1.0,
        )
        assert delivered, outbox_rows(db_url, CHANNEL)
        service.stop()
    finally:
        service.kill()
        receiver.stop()
    rows = outbox_rows(db_url, CHANNEL)
    keys, _ = receiver.snapshot()
    assert sorted(keys) == sorted(r["idempotency_key"] for r in rows)
    assert len(keys) == len(set(keys)) and len(rows) >= 4
    assert max(r["attempts"] for r in rows) >= 2, "the first sends failed, a retry delivered"
    for mrn in PATIENTS[:2]:
        mine = [r["idempotency_key"] for r in rows if r["patient_key"] == mrn]
        assert [k for k in keys if k in mine] == mine


def _heads(rows: list[dict[str, object]]) -> set[object]:
    """The first pending item of each patient (the one the outbox may try)."""
    first: dict[object, object] = {}
    for row in rows:
        first.setdefault(row["patient_key"], row["id"])
    return set(first.values())
