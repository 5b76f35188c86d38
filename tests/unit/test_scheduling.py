"""The in-process scheduler: a job triggered while it is running runs once more right
after, instead of waiting for its next interval (the outbox must not sit for 5 s because
a wake-up came while the previous drain was finishing)."""

from __future__ import annotations

import logging
import threading
import time
from datetime import timedelta

import pytest

from monitor.scheduling import Job, Scheduler
from storage.errors import StorageUnavailable


def test_a_trigger_during_a_run_gives_one_more_run_soon() -> None:
    started = threading.Event()
    release = threading.Event()
    runs: list[float] = []

    def work() -> None:
        runs.append(time.monotonic())
        if len(runs) == 1:
            started.set()
            release.wait(10)

    scheduler = Scheduler(None, [Job("drain", timedelta(hours=1), work)])  # type: ignore[arg-type]
    scheduler.start()
    try:
        assert scheduler.trigger("drain")
        assert started.wait(10), "the first run did not start"
        assert scheduler.trigger("drain")  # while the first run is still busy
        time.sleep(0.5)  # APScheduler sees it due now, finds the run busy and skips it
        release.set()
        deadline = time.monotonic() + 10
        while len(runs) < 2 and time.monotonic() < deadline:
            time.sleep(0.02)
    finally:
        scheduler.shutdown()
    # One more run soon after, not the next hourly one.
    assert len(runs) == 2
    assert runs[1] - runs[0] < 10


def test_an_idle_job_is_not_run_twice_by_one_trigger() -> None:
    runs: list[float] = []
    scheduler = Scheduler(None, [Job("drain", timedelta(hours=1), lambda: runs.append(1.0))])  # type: ignore[arg-type]
    scheduler.start()
    try:
        scheduler.trigger("drain")
        time.sleep(1.0)
    finally:
        scheduler.shutdown()
    assert runs == [1.0]


def test_a_database_outage_is_one_log_line_and_the_job_stays_scheduled(
    caplog: pytest.LogCaptureFixture,
) -> None:
    # An outage is expected operation, not a bug: one warning naming the job, no
    # traceback in the log; another kind of failure still gets its traceback.
    def down() -> None:
        raise StorageUnavailable("sqlite:///gasgap.db", "BEGIN failed", "database is locked")

    def broken() -> None:
        raise KeyError("bug")

    scheduler = Scheduler(None, [Job("drain", timedelta(hours=1), down)])  # type: ignore[arg-type]
    with caplog.at_level(logging.WARNING, logger="gasgap"):
        scheduler._run_once(scheduler.jobs["drain"])
        scheduler._run_once(Job("poll:x", timedelta(hours=1), broken))
    [outage] = [r for r in caplog.records if "drain" in r.getMessage()]
    assert outage.levelno == logging.WARNING and outage.exc_info is None
    assert "database is locked" in outage.getMessage()
    [bug] = [r for r in caplog.records if "poll:x" in r.getMessage()]
    assert bug.exc_info is not None
    assert "drain" in scheduler.jobs
