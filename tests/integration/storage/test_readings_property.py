"""Property: the current set depends on the deliveries, not on how they arrive.

Whatever the order, however often a delivery repeats and however the stream is cut
into batches, each result's current delivery is the one the documented rule picks:
received last; on a tie the stronger status (retracted > corrected > final >
preliminary); then the greater delivery id. The expected value is worked out here from
that rule, independently of the storage code.
"""

from __future__ import annotations

from datetime import timedelta

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.engine.model import Reading, Status
from storage.db import Database
from storage.readings import reading_by_logical_id, store_readings
from tests.integration.storage import T0, database, reading  # noqa: F401

RANK = {Status.PRELIMINARY: 0, Status.FINAL: 1, Status.CORRECTED: 2, Status.RETRACTED: 3}
LOGICAL_IDS = ("OBR-7^PAO2", "OBR-7^PACO2", "OBR-8^PAO2")


@st.composite
def deliveries(draw: st.DrawFn) -> list[Reading]:
    count = draw(st.integers(min_value=1, max_value=8))
    made = []
    for n in range(count):
        status = draw(st.sampled_from(list(Status)))
        value = None if status is Status.RETRACTED else draw(st.floats(40.0, 120.0))
        made.append(
            reading(
                draw(st.sampled_from(LOGICAL_IDS)),
                f"MSG-{n:03d}",
                value=value,
                status=status,
                # Few distinct times, so ties on received_at are common.
                received_at=T0 + timedelta(minutes=draw(st.integers(0, 3))),
            )
        )
    return made


def _expected_current(batch: list[Reading]) -> dict[str, str]:
    best: dict[str, Reading] = {}
    for r in batch:
        key = (r.received_at, RANK[r.status], r.delivery_id)
        old = best.get(r.logical_id)
        if old is None or key > (old.received_at, RANK[old.status], old.delivery_id):
            best[r.logical_id] = r
    return {lid: r.delivery_id for lid, r in best.items()}


@settings(
    max_examples=40,
    deadline=None,
    # Each example runs in its own transaction, rolled back at the end.
    suppress_health_check=[HealthCheck.function_scoped_fixture],
)
@given(batch=deliveries(), data=st.data())
def test_any_batch_stored_twice_in_any_order_gives_the_same_current_set(
    database: Database, batch: list[Reading], data: st.DataObject
) -> None:
    first_order = data.draw(st.permutations(batch))
    second_order = data.draw(st.permutations(batch))
    cut = data.draw(st.integers(0, len(batch)))
    with database.engine.connect() as conn:
        transaction = conn.begin()
        try:
            once = store_readings(conn, first_order)
            again_a = store_readings(conn, second_order[:cut])
            again_b = store_readings(conn, second_order[cut:])
            current = {
                lid: found.delivery_id
                for lid in LOGICAL_IDS
                if (found := reading_by_logical_id(conn, lid)) is not None
            }
        finally:
            transaction.rollback()
    assert once.stored == len(batch)
    assert again_a.stored + again_b.stored == 0
    assert current == _expected_current(batch)


@settings(
    max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(batch=deliveries(), data=st.data())
def test_two_orders_in_separate_databases_agree(
    database: Database, batch: list[Reading], data: st.DataObject
) -> None:
    results = []
    for order in (data.draw(st.permutations(batch)), data.draw(st.permutations(batch))):
        with database.engine.connect() as conn:
            transaction = conn.begin()
            try:
                for one in order:  # one delivery per call: the most arrival orders
                    store_readings(conn, [one])
                results.append(
                    {
                        lid: r.delivery_id
                        for lid in LOGICAL_IDS
                        if (r := reading_by_logical_id(conn, lid)) is not None
                    }
                )
            finally:
                transaction.rollback()
    assert results[0] == results[1] == _expected_current(batch)
