"""Helpers for the reliability tests: a ``gasgap serve`` process that can be killed and
started again on the same database, a webhook receiver that can be down and come up
on a fixed port, an MLLP sender that resends what was not acknowledged (as a lab
system does), a throwaway PostgreSQL cluster, and a few read-only database queries.

Everything listens on 127.0.0.1 only; every loop is bounded in time. Patients and
numbers are invented (Hollowmere General Hospital, 1,600 m; MRN system
urn:oid:2.999.1.1.1).
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import socket
import subprocess
import tempfile
import threading
import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from glob import glob
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import httpx
import sqlalchemy as sa

from tests import hl7_samples as h
from tests.integration.service import (
    API_TOKEN,
    BOARD_TOKEN,
    IDEMPOTENCY_HEADER,
    REPO,
    ack_code,
    free_port,
    serve_command,
    site_toml,
)

__all__ = [
    "API_TOKEN",
    "BOARD_TOKEN",
    "REPO",
    "ack_code",
    "free_port",
    "site_toml",
    "Receiver",
    "ServiceProcess",
    "MllpSession",
    "gas",
    "PgCluster",
    "pg_binaries",
    "stored_control_ids",
    "count_rows",
    "outbox_rows",
    "notifying_events",
    "wait_until",
    "minutes_ago",
    "SB",
    "EB",
    "CR",
]

# MLLP framing (HL7 v2.5.1 Appendix C, minimal lower layer protocol): VT ... FS CR.
SB, EB, CR = b"\x0b", b"\x1c", b"\x0d"


def wait_until(predicate: Callable[[], Any], timeout: float, every: float = 0.2) -> Any:
    """Poll ``predicate`` until truthy or ``timeout`` seconds pass; its last value."""
    deadline = time.monotonic() + timeout
    while True:
        value = predicate()
        if value or time.monotonic() > deadline:
            return value
        time.sleep(every)


# --- HL7 messages ----------------------------------------------------------------------------


def gas(
    control_id: str,
    mrn: str,
    filler: str,
    *,
    pao2: float,
    fio2_percent: float = 60,
    drawn: datetime,
    unit: str = "ICU-North",
    bed: str = "1",
) -> str:
    """A small ORU^R01: PaO2, PaCO2 and FiO2 of one arterial sample (invented)."""
    when = drawn.astimezone(UTC).strftime("%Y%m%d%H%M%S+0000")
    return h.message(
        h.msh(control_id, when=when),
        h.pid(mrn),
        h.pv1(unit, "7", bed),
        h.obr(filler, collected=when),
        h.obx(1, "2703-7", f"{pao2:g}", "mm[Hg]", text="PO2 arterial"),
        h.obx(2, "2019-8", "40", "mm[Hg]", text="PCO2 arterial"),
        h.obx(3, "3150-0", f"{fio2_percent:g}", "%", text="Inhaled O2 concentration"),
        h.spm(),
    )


# --- MLLP sender -------------------------------------------------------------------------------


class MllpSession:
    """One lab-system connection: send a message, wait for its ACK (bounded), reconnect
    after any failure. ``send`` returns the ACK code, or None when no ACK came."""

    def __init__(self, port: int, *, ack_timeout: float = 20.0) -> None:
        self.port = port
        self.ack_timeout = ack_timeout
        self._sock: socket.socket | None = None
        self._buffer = b""

    def close(self) -> None:
        if self._sock is not None:
            try:
                self._sock.close()
            finally:
                self._sock = None
                self._buffer = b""

    def _connect(self) -> socket.socket:
        if self._sock is None:
            self._sock = socket.create_connection(("127.0.0.1", self.port), timeout=2.0)
            self._sock.settimeout(self.ack_timeout)
            self._buffer = b""
        return self._sock

    def send(self, message: str) -> str | None:
        try:
            sock = self._connect()
            sock.sendall(SB + message.encode("utf-8") + EB + CR)
            while EB + CR not in self._buffer:
                chunk = sock.recv(65536)
                if not chunk:
                    raise ConnectionError("closed before the ACK")
                self._buffer += chunk
        except OSError:
            self.close()
            return None
        frame, _, self._buffer = self._buffer.partition(EB + CR)
        return ack_code(frame.strip(SB).decode("utf-8", "replace"))


# --- the webhook receiver -------------------------------------------------------------------------


@dataclass
class Receiver:
    """A webhook receiver on a fixed loopback port that can be down (connection refused)
    and come up later. Records each POST's idempotency key and body in arrival order."""

    port: int = field(default_factory=free_port)
    keys: list[str] = field(default_factory=list)
    bodies: list[dict[str, Any]] = field(default_factory=list)
    lock: threading.Lock = field(default_factory=threading.Lock)
    _server: ThreadingHTTPServer | None = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}/station"

    def start(self) -> None:
        received = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802 - the http.server hook name
                length = int(self.headers.get("Content-Length", "0"))
                body = self.rfile.read(length)
                with received.lock:
                    received.keys.append(self.headers.get(IDEMPOTENCY_HEADER, ""))
                    received.bodies.append(json.loads(body or b"{}"))
                self.send_response(200)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, format: str, *args: Any) -> None:  # quiet
                return

        self._server = ThreadingHTTPServer(("127.0.0.1", self.port), Handler)
        threading.Thread(target=self._server.serve_forever, daemon=True).start()

    def stop(self) -> None:
        if self._server is not None:
            self._server.shutdown()
            self._server.server_close()
            self._server = None

    def counts(self) -> Counter[str]:
        with self.lock:
            return Counter(self.keys)

    def snapshot(self) -> tuple[list[str], list[dict[str, Any]]]:
        with self.lock:
            return list(self.keys), list(self.bodies)


# --- the service process ----------------------------------------------------------------------


class ServiceProcess:
    """``gasgap serve --config FILE`` as a child process that can be SIGKILLed and
    started again on the same configuration (and so the same database and ports)."""

    def __init__(self, config: Path, http_port: int, log_path: Path) -> None:
        self.config = config
        self.base = f"http://127.0.0.1:{http_port}"
        self.log_path = log_path
        self.process: subprocess.Popen[bytes] | None = None
        self.starts = 0

    def start(self, timeout: float = 60.0) -> None:
        env = {
            **os.environ,
            "GASGAP_TEST_API_TOKEN": API_TOKEN,
            "GASGAP_TEST_BOARD_TOKEN": BOARD_TOKEN,
            "PYTHONUNBUFFERED": "1",
        }
        with open(self.log_path, "ab") as log_file:
            self.process = subprocess.Popen(
                serve_command(self.config),
                cwd=REPO,
                env=env,
                stdout=log_file,
                stderr=subprocess.STDOUT,
            )
        self.starts += 1
        deadline = time.monotonic() + timeout
        while True:
            if self.process.poll() is not None:
                raise AssertionError(
                    f"service exited with {self.process.returncode}:\n{self.log_text()[-3000:]}"
                )
            try:
                if httpx.get(self.base + "/health", timeout=2).status_code in (200, 503):
                    return
            except httpx.TransportError:
                pass
            if time.monotonic() > deadline:
                self.kill()
                raise AssertionError(
                    f"service not answering in {timeout}s:\n{self.log_text()[-3000:]}"
                )
            time.sleep(0.1)

    def kill(self) -> None:
        """SIGKILL: no chance to finish anything (a power cut, the OOM killer)."""
        if self.process is not None and self.process.poll() is None:
            self.process.send_signal(signal.SIGKILL)
            self.process.wait(10)

    def stop(self, timeout: float = 15.0) -> int | None:
        if self.process is None:
            return None
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
            try:
                return self.process.wait(timeout)
            except subprocess.TimeoutExpired:
                self.kill()
                raise AssertionError(f"service did not stop within {timeout}s") from None
        return self.process.returncode

    def log_text(self) -> str:
        return self.log_path.read_text(encoding="utf-8", errors="replace")


# --- a throwaway PostgreSQL cluster -----------------------------------------------------------


def pg_binaries() -> Path | None:
    """The newest ``/usr/lib/postgresql/*/bin`` that has pg_ctl and initdb."""
    found = sorted(
        glob("/usr/lib/postgresql/*/bin/pg_ctl"),
        key=lambda p: int(p.split("/")[4]) if p.split("/")[4].isdigit() else 0,
    )
    for pg_ctl in reversed(found):
        folder = Path(pg_ctl).parent
        if (folder / "initdb").exists():
            return folder
    if shutil.which("pg_ctl") and shutil.which("initdb"):
        return Path(shutil.which("pg_ctl")).parent  # type: ignore[arg-type]
    return None


class PgCluster:
    """A temporary PostgreSQL cluster on 127.0.0.1 (trust auth), owned by the postgres
    user when the tests run as root (initdb refuses root)."""

    def __init__(self, bindir: Path) -> None:
        self.bindir = bindir
        self.port = free_port()
        self.root = Path(tempfile.mkdtemp(prefix="gasgap-pg-"))
        self.data = self.root / "data"
        self.logfile = self.root / "server.log"
        self._as_postgres = os.geteuid() == 0
        if self._as_postgres:
            shutil.chown(self.root, "postgres", "postgres")
            os.chmod(self.root, 0o700)

    @property
    def url(self) -> str:
        return f"postgresql+psycopg://postgres@127.0.0.1:{self.port}/postgres"

    def _run(self, *args: str, timeout: float = 60) -> subprocess.CompletedProcess[str]:
        command = [str(self.bindir / args[0]), *args[1:]]
        if self._as_postgres:
            runner = shutil.which("runuser")
            command = (
                [runner, "-u", "postgres", "--", *command]
                if runner
                else ["su", "postgres", "-c", " ".join(command)]
            )
        return subprocess.run(
            command, capture_output=True, text=True, timeout=timeout, cwd=self.root
        )

    def init(self) -> None:
        done = self._run(
            "initdb",
            "-D",
            str(self.data),
            "-U",
            "postgres",
            "--auth=trust",
            "-E",
            "UTF8",
            "--no-sync",
            timeout=120,
        )
        if done.returncode != 0:
            raise RuntimeError(f"initdb failed: {done.stderr[-2000:]}")

    def start(self) -> None:
        options = (
            f"-p {self.port} -c listen_addresses=127.0.0.1 -k {self.root} "
            "-c fsync=off -c max_connections=50"
        )
        done = self._run(
            "pg_ctl",
            "-D",
            str(self.data),
            "-l",
            str(self.logfile),
            "-w",
            "-t",
            "60",
            "-o",
            options,
            "start",
            timeout=90,
        )
        if done.returncode != 0:
            raise RuntimeError(f"pg_ctl start failed: {done.stderr[-2000:]} {self._log_tail()}")

    def stop(self, mode: str = "fast") -> None:
        self._run("pg_ctl", "-D", str(self.data), "-m", mode, "-w", "-t", "60", "stop", timeout=90)

    def _log_tail(self) -> str:
        try:
            return self.logfile.read_text(errors="replace")[-1500:]
        except OSError:
            return ""

    def remove(self) -> None:
        self.stop("immediate")
        shutil.rmtree(self.root, ignore_errors=True)


# --- read-only looks at the database (SQLAlchemy expressions over storage's tables) -----------


def _engine(url: str) -> sa.Engine:
    return sa.create_engine(
        url, connect_args={"connect_timeout": 5} if "postgresql" in url else {"timeout": 30}
    )


def stored_control_ids(url: str, source_prefix: str = "hl7:") -> Counter[str]:
    """How many readings each HL7 message control id put in the database. The delivery
    id of an HL7 reading ends ``@<control id>:<OBX set id>`` (design: delivery id)."""
    from storage.tables import readings

    engine = _engine(url)
    try:
        with engine.connect() as conn:
            ids = conn.execute(
                sa.select(readings.c.delivery_id).where(
                    readings.c.delivery_id.like(f"{source_prefix}%")
                )
            ).scalars()
            return Counter(d.rsplit("@", 1)[1].rsplit(":", 1)[0] for d in ids)
    finally:
        engine.dispose()


def count_rows(url: str, table_name: str, **where: Any) -> int:
    from storage import tables

    table = getattr(tables, table_name)
    engine = _engine(url)
    try:
        with engine.connect() as conn:
            query = sa.select(sa.func.count()).select_from(table)
            for column, value in where.items():
                query = query.where(table.c[column] == value)
            return int(conn.execute(query).scalar_one())
    finally:
        engine.dispose()


def outbox_rows(url: str, channel: str | None = None) -> list[dict[str, Any]]:
    """Outbox rows in queue order (id, key, channel, patient, alert, status, attempts)."""
    from storage.tables import outbox

    engine = _engine(url)
    try:
        with engine.connect() as conn:
            query = sa.select(
                outbox.c.id,
                outbox.c.idempotency_key,
                outbox.c.channel,
                outbox.c.patient_key,
                outbox.c.alert_id,
                outbox.c.status,
                outbox.c.attempts,
            ).order_by(outbox.c.id)
            if channel is not None:
                query = query.where(outbox.c.channel == channel)
            return [dict(row._mapping) for row in conn.execute(query)]
    finally:
        engine.dispose()


def historical_alert_ids(url: str) -> set[str]:
    """Ids of the flags recorded as historical (never sent)."""
    from storage.tables import alerts

    engine = _engine(url)
    try:
        with engine.connect() as conn:
            query = sa.select(alerts.c.alert_id).where(alerts.c.historical)
            return set(conn.execute(query).scalars())
    finally:
        engine.dispose()


def notifying_events(url: str) -> list[dict[str, Any]]:
    """Alert audit events whose kind sends a notification (the alert state machine's
    NOTIFYING set), in order."""
    from monitor.engine.alerts import NOTIFYING
    from storage.tables import alert_events

    kinds = sorted(str(t) for t in NOTIFYING)
    engine = _engine(url)
    try:
        with engine.connect() as conn:
            query = (
                sa.select(
                    alert_events.c.alert_id,
                    alert_events.c.patient_key,
                    alert_events.c.event,
                    alert_events.c.at,
                )
                .where(alert_events.c.event.in_(kinds))
                .order_by(alert_events.c.id)
            )
            return [dict(row._mapping) for row in conn.execute(query)]
    finally:
        engine.dispose()


def minutes_ago(n: float) -> datetime:
    return datetime.now(UTC) - timedelta(minutes=n)
