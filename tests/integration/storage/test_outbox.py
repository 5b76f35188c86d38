"""The outbox: idempotent enqueue, claims, retries, per-patient order, concurrency."""

from __future__ import annotations

import threading
import time
from collections import defaultdict
from collections.abc import Iterator
from datetime import timedelta

import pytest
import sqlalchemy as sa

from storage.db import Database, open_database
from storage.outbox import (
    OutboxStatus,
    backlog,
    claim_due,
    enqueue,
    mark_failed,
    mark_sent,
    outbox_items,
)
from tests.integration.storage import T0, database, minutes, notification  # noqa: F401

WEBHOOK, EMAIL = "icu-webhook", "charge-email"


def test_enqueue_is_idempotent_per_key_and_channel(database: Database) -> None:
    raised = notification()
    with database.begin() as conn:
        added = enqueue(conn, raised, [WEBHOOK, EMAIL, WEBHOOK], at=T0)
        again = enqueue(conn, raised, [WEBHOOK, EMAIL], at=T0 + minutes(1))
        nowhere = enqueue(conn, raised, [], at=T0)
        items = outbox_items(conn)
    assert (added, again, nowhere) == (2, 0, 0)
    assert [(i.channel, i.status, i.attempts) for i in items] == [
        (WEBHOOK, OutboxStatus.PENDING, 0),
        (EMAIL, OutboxStatus.PENDING, 0),
    ]
    assert all(i.notification == raised for i in items)
    assert items[0].created_at == T0 and items[0].created_at.tzinfo is not None


def test_a_claimed_item_is_leased_then_sent(database: Database) -> None:
    with database.begin() as conn:
        enqueue(conn, notification(), [WEBHOOK], at=T0)
        early = claim_due(conn, T0 - minutes(1))
        [item] = claim_due(conn, T0)
        during_lease = claim_due(conn, T0 + timedelta(seconds=30))
        mark_sent(conn, item.id, T0 + timedelta(seconds=2))
        left = backlog(conn)
        [sent] = outbox_items(conn, status="sent")
    assert early == [] and during_lease == []
    assert item.attempts == 1 and item.notification == notification()
    assert left == 0
    assert sent.sent_at == T0 + timedelta(seconds=2)


def test_an_expired_lease_makes_the_item_due_again(database: Database) -> None:
    with database.begin() as conn:
        enqueue(conn, notification(), [WEBHOOK], at=T0)
        claim_due(conn, T0, lease_seconds=60)
        [again] = claim_due(conn, T0 + timedelta(seconds=61), lease_seconds=60)
    assert again.attempts == 2


def test_a_patients_later_message_waits_for_the_earlier_one(database: Database) -> None:
    raised = notification("A-1:raised")
    resolved = notification("A-1:resolved", event="resolved", created_at=T0 + minutes(1))
    with database.begin() as conn:
        enqueue(conn, raised, [WEBHOOK, EMAIL], at=T0)
        enqueue(conn, resolved, [WEBHOOK, EMAIL], at=T0 + minutes(1))
        first = claim_due(conn, T0 + minutes(2))
        webhook_first = next(i for i in first if i.channel == WEBHOOK)
        email_first = next(i for i in first if i.channel == EMAIL)
        mark_sent(conn, email_first.id, T0 + minutes(2))
        mark_failed(
            conn,
            webhook_first.id,
            T0 + minutes(2),
            "HTTP 503 from receiver",
            next_attempt_at=T0 + minutes(7),
            dead=False,
        )
        # The e-mail queue moves on; the webhook's "resolved" waits for its "raised".
        second = claim_due(conn, T0 + minutes(3))
        mark_sent(conn, second[0].id, T0 + minutes(3))
        retry = claim_due(conn, T0 + minutes(7))
        mark_sent(conn, retry[0].id, T0 + minutes(7))
        third = claim_due(conn, T0 + minutes(8))
    assert [(i.channel, i.notification.event) for i in first] == [
        (WEBHOOK, "raised"),
        (EMAIL, "raised"),
    ]
    assert [(i.channel, i.notification.event) for i in second] == [(EMAIL, "resolved")]
    assert [(i.channel, i.notification.event, i.attempts) for i in retry] == [
        (WEBHOOK, "raised", 2)
    ]
    assert [(i.channel, i.notification.event) for i in third] == [(WEBHOOK, "resolved")]


def test_a_dead_item_no_longer_holds_the_queue(database: Database) -> None:
    with database.begin() as conn:
        enqueue(conn, notification("A-1:raised"), [WEBHOOK], at=T0)
        enqueue(conn, notification("A-1:resolved", event="resolved"), [WEBHOOK], at=T0)
        [first] = claim_due(conn, T0)
        mark_failed(conn, first.id, T0, "receiver refused the body", next_attempt_at=T0, dead=True)
        [after] = claim_due(conn, T0)
        [dead] = outbox_items(conn, status=OutboxStatus.DEAD)
    assert after.notification.event == "resolved"
    assert dead.last_error == "receiver refused the body"
    assert dead.last_attempt_at == T0


def test_claim_limit_and_other_patients_are_independent(database: Database) -> None:
    with database.begin() as conn:
        for n in range(5):
            enqueue(
                conn,
                notification(f"A-{n}:raised", alert_id=f"A-{n}", patient_key=f"HMG-00010{n}"),
                [WEBHOOK],
                at=T0,
            )
        some = claim_due(conn, T0, limit=3)
        rest = claim_due(conn, T0, limit=10)
    assert [i.notification.alert_id for i in some] == ["A-0", "A-1", "A-2"]
    assert [i.notification.alert_id for i in rest] == ["A-3", "A-4"]


@pytest.fixture
def pg_database(pg_url: str) -> Iterator[Database]:
    db = open_database(pg_url)
    yield db
    db.dispose()


@pytest.mark.postgres
def test_two_connections_skip_each_others_locked_items(pg_database: Database) -> None:
    with pg_database.begin() as conn:
        for n in range(6):
            enqueue(
                conn,
                notification(f"A-{n}:raised", alert_id=f"A-{n}", patient_key=f"HMG-00020{n}"),
                [WEBHOOK],
                at=T0,
            )
    with pg_database.engine.connect() as a, pg_database.engine.connect() as b:
        a.begin()
        b.begin()
        # Without SKIP LOCKED, b would wait for a's row locks: fail fast instead of hanging.
        b.execute(sa.text("SET LOCAL lock_timeout = '5s'"))
        claimed_a = {i.id for i in claim_due(a, T0, limit=3)}
        claimed_b = {i.id for i in claim_due(b, T0, limit=10)}
        a.commit()
        b.commit()
    with pg_database.begin() as conn:
        all_ids = {i.id for i in outbox_items(conn)}
    assert len(claimed_a) == 3 and len(claimed_b) == 3
    assert claimed_a.isdisjoint(claimed_b) and claimed_a | claimed_b == all_ids


def test_concurrent_senders_deliver_each_item_once_in_patient_order(database: Database) -> None:
    patients = [f"HMG-0003{n:02d}" for n in range(8)]
    with database.begin() as conn:
        for key in patients:
            for event in ("raised", "escalated", "resolved"):
                enqueue(
                    conn,
                    notification(
                        f"{key}:{event}", alert_id=f"{key}-A", patient_key=key, event=event
                    ),
                    [WEBHOOK],
                    at=T0,
                )
    sent: list[tuple[int, str, str]] = []
    errors: list[BaseException] = []
    lock = threading.Lock()

    def sender() -> None:
        try:
            for _ in range(200):  # bounded: 24 items, 4 senders
                with database.begin() as conn:
                    items = claim_due(conn, T0, limit=3)
                    if not items and backlog(conn) == 0:
                        return
                for item in items:
                    with database.begin() as conn:
                        mark_sent(conn, item.id, T0)
                    with lock:
                        sent.append(
                            (item.id, item.notification.patient_key, item.notification.event)
                        )
                if not items:
                    time.sleep(0.005)
        except BaseException as exc:  # reported to the main thread below
            errors.append(exc)

    threads = [threading.Thread(target=sender, daemon=True) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert not any(t.is_alive() for t in threads), "a sender is stuck"
    assert errors == []
    ids = [s[0] for s in sent]
    assert len(ids) == 24 and len(set(ids)) == 24
    per_patient: dict[str, list[str]] = defaultdict(list)
    for _, key, event in sent:
        per_patient[key].append(event)
    assert all(events == ["raised", "escalated", "resolved"] for events in per_patient.values())


def test_a_rolled_back_alert_change_leaves_no_notification(database: Database) -> None:
    from storage.alerts import get_alert, save_alert
    from tests.integration.storage import alert

    with pytest.raises(RuntimeError), database.begin() as conn:
        save_alert(conn, alert())
        enqueue(conn, notification(), [WEBHOOK], at=T0)
        raise RuntimeError("the step failed after queueing")
    with database.begin(read_only=True) as conn:
        assert get_alert(conn, "A-1") is None
        assert outbox_items(conn) == [] and backlog(conn) == 0
