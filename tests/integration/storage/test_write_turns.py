"""Writers of one process take turns at a SQLite file's write lock in the order they
came (storage/turns.py): a writer waits for the transaction ahead of it, never for a
stream of later ones. Checked by counting, not timing."""

from __future__ import annotations

import threading
import time
from pathlib import Path

import pytest

from storage.db import create_engine, open_database, write_turns_for
from storage.turns import WriteTurns, turns_for


def _wait_until(condition: object, what: str) -> None:
    deadline = time.monotonic() + 30
    while not condition():  # type: ignore[operator]
        assert time.monotonic() < deadline, f"never: {what}"
        time.sleep(0.001)


def _taken_by_another_thread(turns: WriteTurns, timeout: float) -> bool:
    """Whether a writer on another thread had the turn (waiting at most ``timeout``)."""
    had: list[bool] = []

    def take() -> None:
        with turns.turn(timeout=timeout) as got:
            had.append(got)

    thread = threading.Thread(target=take)
    thread.start()
    thread.join(30)
    return had == [True]


def test_a_writer_is_let_in_after_the_transaction_ahead_not_after_a_stream(
    tmp_path: Path,
) -> None:
    url = f"sqlite:///{tmp_path / 'turns.db'}"
    hog_db, other_db = open_database(url), open_database(url)  # two engines, one file
    with hog_db.begin() as conn:
        conn.exec_driver_sql("create table written (by text)")
    committed = [0]
    stop = threading.Event()

    def hog() -> None:
        # back-to-back short write transactions, as a large delivery stored in parts
        while not stop.is_set():
            with hog_db.begin() as conn:
                conn.exec_driver_sql("insert into written values ('hog')")
                time.sleep(0.005)
            committed[0] += 1

    thread = threading.Thread(target=hog, daemon=True)
    thread.start()
    try:
        _wait_until(lambda: committed[0] >= 3, "the stream of writes started")
        asked = committed[0]
        with other_db.begin() as conn:
            let_in = committed[0]
            conn.exec_driver_sql("insert into written values ('other')")
    finally:
        stop.set()
        thread.join(30)
        hog_db.dispose()
        other_db.dispose()
    # at most the transaction in progress when it asked finished before it
    assert let_in - asked <= 1, (asked, let_in)


def test_waiters_are_let_in_in_the_order_they_came() -> None:
    turns = WriteTurns()
    order: list[str] = []
    threads = []
    with turns.turn(timeout=30):
        for name in ("first", "second", "third"):

            def wait(name: str = name) -> None:
                with turns.turn(timeout=30) as had:
                    assert had
                    order.append(name)

            thread = threading.Thread(target=wait, daemon=True)
            queued = turns.waiting
            thread.start()
            _wait_until(lambda q=queued: turns.waiting == q + 1, f"{name} queued")
            threads.append(thread)
    for thread in threads:
        thread.join(30)
    assert order == ["first", "second", "third"]
    assert turns.waiting == 0


def test_a_thread_holding_the_turn_may_open_another_write() -> None:
    turns = WriteTurns()
    with turns.turn(timeout=1) as outer, turns.turn(timeout=1) as inner:
        assert outer and inner
    assert _taken_by_another_thread(turns, timeout=1)  # released fully once both ended


def test_a_waiter_that_waited_too_long_goes_on_without_the_turn() -> None:
    turns = WriteTurns()
    results: list[bool] = []

    def take() -> None:
        with turns.turn(timeout=0.05) as had:
            results.append(had)

    with turns.turn(timeout=30):
        thread = threading.Thread(target=take, daemon=True)
        thread.start()
        thread.join(30)
        assert results == [False] and turns.waiting == 0
    with turns.turn(timeout=0) as had:  # free again, nobody left queued
        assert had


@pytest.mark.parametrize("url", ["sqlite://", "postgresql+psycopg://postgres@127.0.0.1/test"])
def test_turns_are_only_for_a_sqlite_file(url: str) -> None:
    engine = create_engine(url)  # PostgreSQL's engine connects only when used
    try:
        assert write_turns_for(engine) is None
    finally:
        engine.dispose()


def test_every_engine_on_one_file_shares_its_turns(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'shared.db'}"
    first, second = open_database(url), open_database(url)
    try:
        assert first.write_turns is not None and first.write_turns is second.write_turns
        assert first.write_turns is turns_for(str((tmp_path / "shared.db").resolve()))
    finally:
        first.dispose()
        second.dispose()


class _Interrupt(BaseException):
    """As a KeyboardInterrupt or a cancellation would arrive, mid-wait."""


class _InterruptedEvent(threading.Event):
    def wait(self, timeout: float | None = None) -> bool:
        raise _Interrupt


def test_a_waiter_interrupted_while_queued_leaves_nobody_waiting_on_it() -> None:
    turns = WriteTurns()
    raised: list[BaseException] = []

    def interrupted() -> None:
        try:
            with turns.turn(timeout=30):
                pass
        except _Interrupt as exc:
            raised.append(exc)

    with turns.turn(timeout=30):
        turns.event_type = _InterruptedEvent
        thread = threading.Thread(target=interrupted)
        thread.start()
        thread.join(30)
        turns.event_type = threading.Event
        assert len(raised) == 1 and turns.waiting == 0
    # the holder released it, and it is free: nobody gone from the queue holds it
    assert _taken_by_another_thread(turns, timeout=1)
