"""Structured logging for the service: one JSON object a line, on stderr.

Patient identifiers must never reach a log line beyond the site's configured display
key. Two things keep that promise:

- the modules that log are written to name patients by their display key (``log_ref``
  and friends) or not at all;
- ``IdentifierGuard``, a logging filter installed on the root handler, is the safety
  net: the service tells it every patient key it meets (with the display key that may
  stand for it), and the guard replaces any of those keys found in a formatted message,
  exception text or extra field by the display key before the line is written. A key
  it has not been told about cannot be recognised, which is why the first measure
  matters most; the guard catches slips, it does not license them.

Access logs of the HTTP server are replaced by ``gasgap.http`` lines that carry the
route's template (``/board/patient/{patient_key}``), never the concrete path.
"""

from __future__ import annotations

import json
import logging
import sys
import threading
from collections import OrderedDict
from datetime import UTC, datetime
from typing import TextIO

#: ``LogRecord`` attributes that are the record's own, not "extra" fields.
_RECORD_FIELDS = frozenset(
    vars(logging.LogRecord("n", logging.INFO, "p", 1, "m", None, None)).keys()
) | {"message", "asctime", "taskName"}

#: Extra field names that would carry an identifier by their very name: dropped.
FORBIDDEN_FIELDS = frozenset({"patient_key", "mrn", "patient_id", "birth_date", "name"})
#: Extras dropped as noise (uvicorn's terminal colour codes).
_DROPPED_FIELDS = frozenset({"color_message"})

#: Identifiers shorter than this are not replaced (they would match inside ordinary words
#: and numbers); the parsers refuse empty keys and real MRNs are longer.
_MIN_KEY_LENGTH = 4


class IdentifierGuard(logging.Filter):
    """Replace known patient keys in log records by their display key.

    Bounded (least recently used keys are forgotten past ``capacity``) so a long-running
    service does not grow without end. Thread-safe: the scheduler, the MLLP listener and
    the web server log from different threads.
    """

    def __init__(self, capacity: int = 50_000) -> None:
        super().__init__()
        self._capacity = capacity
        self._known: OrderedDict[str, str] = OrderedDict()
        self._lock = threading.Lock()

    def register(self, patient_key: str, display: str) -> None:
        """Remember that ``patient_key`` (and its bare value after ``|``) is shown as
        ``display`` in logs."""
        values = {patient_key, patient_key.rsplit("|", 1)[-1]}
        with self._lock:
            for value in values:
                if len(value) < _MIN_KEY_LENGTH or value == display:
                    continue
                self._known[value] = display
                self._known.move_to_end(value)
            while len(self._known) > self._capacity:
                self._known.popitem(last=False)

    def scrub(self, text: str) -> str:
        """``text`` with every known patient key replaced by its display key."""
        with self._lock:
            # Longest first, so "system|value" goes before its own "value".
            known = sorted(self._known.items(), key=lambda kv: -len(kv[0]))
        for key, display in known:
            if key in text:
                text = text.replace(key, display)
        return text

    def filter(self, record: logging.LogRecord) -> bool:
        message = record.getMessage()
        record.msg = self.scrub(message)
        record.args = None
        if record.exc_info and not record.exc_text:
            record.exc_text = logging.Formatter().formatException(record.exc_info)
        if record.exc_text:
            record.exc_text = self.scrub(record.exc_text)
            record.exc_info = None
        for name in list(vars(record)):
            if name in _RECORD_FIELDS:
                continue
            if name in FORBIDDEN_FIELDS:
                delattr(record, name)
            elif isinstance(getattr(record, name), str):
                setattr(record, name, self.scrub(getattr(record, name)))
        return True


class JsonFormatter(logging.Formatter):
    """One JSON object a line: time (UTC, ISO 8601), level, logger, message, extras."""

    def format(self, record: logging.LogRecord) -> str:
        out: dict[str, object] = {
            "time": datetime.fromtimestamp(record.created, UTC).isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        for name, value in vars(record).items():
            if name not in _RECORD_FIELDS | FORBIDDEN_FIELDS | _DROPPED_FIELDS:
                out[name] = value if isinstance(value, int | float | bool | None) else str(value)
        if record.exc_info and not record.exc_text:
            record.exc_text = self.formatException(record.exc_info)
        if record.exc_text:
            out["error"] = record.exc_text
        return json.dumps(out, ensure_ascii=False)


def setup_logging(
    level: str = "INFO",
    *,
    stream: TextIO | None = None,
    guard: IdentifierGuard | None = None,
    json_lines: bool = True,
) -> IdentifierGuard:
    """Send every logger's records to ``stream`` (stderr) through the guard: JSON lines,
    or plain text lines when ``json_lines`` is False.

    Replaces the root logger's handlers (idempotent: calling twice leaves one handler).
    Returns the guard, which the service feeds with patient keys as it meets them.
    """
    guard = guard or IdentifierGuard()
    handler = logging.StreamHandler(stream or sys.stderr)
    handler.setFormatter(
        JsonFormatter()
        if json_lines
        else logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s")
    )
    handler.addFilter(guard)
    root = logging.getLogger()
    for old in list(root.handlers):
        root.removeHandler(old)
    root.addHandler(handler)
    root.setLevel(level.upper())
    # The server's own access log would write concrete paths (which may hold a patient
    # key); gasgap.http writes the route template instead.
    logging.getLogger("uvicorn.access").disabled = True
    logging.getLogger("uvicorn.error").propagate = True
    logging.getLogger("apscheduler").setLevel(logging.WARNING)
    logging.getLogger("httpx").setLevel(logging.WARNING)
    return guard
