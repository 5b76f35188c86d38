"""The in-process scheduler: a job triggered while it is running runs once more right
after, instead of waiting for its next interval (the outbox must not sit for 5 s because
a wake-up came while the previous drain was finishing)."""

from __future__ import annotations

import threading
import time
from datetime import timedelta

from monitor.scheduling import Job, Scheduler


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
