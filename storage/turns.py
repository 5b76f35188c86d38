"""First come, first served turns at a SQLite file's write lock, within one process.

SQLite has one writer at a time, and a writer that finds the file locked polls: it
sleeps and tries again (the busy handler), up to 100 ms between tries. A thread that
writes many short transactions back to back (a subscription delivery of thousands of
results, stored in parts of 50) takes the lock again within a millisecond of giving
it up, so a poller can miss every gap: a single gas sent over MLLP meanwhile was seen
to wait 3.8 s of a 4.0 s delivery. Writers of one process therefore queue here before
``BEGIN IMMEDIATE`` and are let in in the order they came; a waiter waits for the
transactions ahead of it, never for a stream of later ones. Writers in other processes
still meet SQLite's busy handler (one process serves live traffic; a historical load
in another process uses short transactions for this reason).

A thread that already holds the turn (a write opened inside another on the same
thread) goes straight on; a waiter that has waited ``timeout`` seconds goes on without
a turn, leaving it to SQLite's busy handler as before (never worse than no queue).
"""

from __future__ import annotations

import threading
from collections import deque
from collections.abc import Iterator
from contextlib import contextmanager


class WriteTurns:
    """A fair (FIFO), re-entrant turn at one database file's write lock."""

    #: What a queued writer waits on (a test gives one that is interrupted).
    event_type: type[threading.Event] = threading.Event

    def __init__(self) -> None:
        self._mutex = threading.Lock()
        self._owner: int | None = None
        self._depth = 0
        self._waiting: deque[tuple[int, threading.Event]] = deque()

    @property
    def waiting(self) -> int:
        """How many writers are queued for the turn now."""
        with self._mutex:
            return len(self._waiting)

    @contextmanager
    def turn(self, timeout: float) -> Iterator[bool]:
        """Hold the turn for the block; yields whether it was had (False: waited
        ``timeout`` seconds and went on without it)."""
        had = self._acquire(timeout)
        try:
            yield had
        finally:
            if had:
                self._release()

    def _acquire(self, timeout: float) -> bool:
        me = threading.get_ident()
        with self._mutex:
            if self._owner == me:
                self._depth += 1
                return True
            if self._owner is None and not self._waiting:
                self._owner, self._depth = me, 1
                return True
            called = self.event_type()
            self._waiting.append((me, called))
        try:
            if called.wait(timeout):
                return True
        except BaseException:  # interrupted while queued: leave no one waiting on us
            self._give_up((me, called))
            raise
        with self._mutex:
            if called.is_set():  # handed over between the wait ending and here
                return True
            self._waiting.remove((me, called))
            return False

    def _give_up(self, entry: tuple[int, threading.Event]) -> None:
        with self._mutex:
            if not entry[1].is_set():
                self._waiting.remove(entry)
                return
        self._release()  # it had been handed to us meanwhile: pass it on

    def _release(self) -> None:
        with self._mutex:
            self._depth -= 1
            if self._depth:
                return
            if self._waiting:
                # handed straight to the longest waiter: nobody arriving later can
                # take the turn in between
                owner, called = self._waiting.popleft()
                self._owner, self._depth = owner, 1
                called.set()
            else:
                self._owner = None


_BY_FILE: dict[str, WriteTurns] = {}
_BY_FILE_LOCK = threading.Lock()


def turns_for(path: str) -> WriteTurns:
    """The one ``WriteTurns`` of this process for the database file at ``path``
    (every engine on one file shares it)."""
    with _BY_FILE_LOCK:
        return _BY_FILE.setdefault(path, WriteTurns())
