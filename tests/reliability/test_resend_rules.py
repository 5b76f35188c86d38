"""An interface engine that follows the acknowledgement rules loses nothing through a
storage outage.

HL7 v2 original acknowledgement mode (Table 0008; shared/reference section 12): AA
accepted; AE application error, "resending it unchanged will fail again"; AR
application reject, "the receiver could not process it now ... senders commonly
retry". The engine written here does what such senders do: it resends on AR and on no
ACK, and does not resend on AE (it parks the message for a person). ACKs are read with
hl7apy (a reference implementation of the standard's message structures).

``gasgap serve`` runs on a SQLite file; mid-feed another process takes the database's
write lock (``BEGIN EXCLUSIVE``) for longer than gasgap's busy timeout, which is a
transient storage failure. Afterwards: every message the engine considers done is
either stored (AA) or in gasgap's quarantine (AE); nothing was answered AE for the
outage; and the outage was answered AR, not left to chance. Messages are invented
(Hollowmere, MRN system urn:oid:2.999.1.1.1).
"""

from __future__ import annotations

import sqlite3
import threading
import time
from pathlib import Path

import pytest
import sqlalchemy as sa
from hl7apy.parser import parse_message

from storage.db import SQLITE_BUSY_TIMEOUT_MS
from storage.tables import quarantine_payloads
from tests import hl7_samples as h
from tests.reliability.helpers import (
    CR,
    EB,
    SB,
    MllpSession,
    Receiver,
    ServiceProcess,
    free_port,
    gas,
    minutes_ago,
    site_toml,
    stored_control_ids,
)

MESSAGES = 45


def _plan() -> list[tuple[str, str, str]]:
    """(control id, message, what a correct receiver must make of it)."""
    out = []
    for n in range(MESSAGES):
        control = f"RS{n:04d}"
        drawn = minutes_ago(MESSAGES + 30 - n)
        if n % 9 == 4:  # every value unreadable: refused result by result (AE)
            when = drawn.strftime("%Y%m%d%H%M%S+0000")
            text = h.message(
                h.msh(control, when=when),
                h.pid(f"HM66{n:04d}"),
                h.obr(f"F-{control}", collected=when),
                h.obx(1, "2703-7", "abc", "mm[Hg]", text="PO2 arterial"),
            )
            out.append((control, text, "AE"))
        elif n % 9 == 7:  # no OBX-3 code anywhere: nothing readable (AE, kept whole)
            text = h.message(
                h.msh(control),
                h.pid(f"HM66{n:04d}"),
                h.obr(f"F-{control}"),
                "OBX|1|NM|||91|mm[Hg]|||||F",
            )
            out.append((control, text, "AE"))
        else:
            out.append(
                (
                    control,
                    gas(
                        control,
                        f"HM66{n % 3:04d}",
                        f"F-{control}",
                        pao2=90,
                        fio2_percent=30,
                        drawn=drawn,
                        unit="Ward-5B",
                    ),
                    "AA",
                )
            )
    return out


class InterfaceEngine:
    """Sends in order; resends on AR or no ACK (after a pause); accepts AA; parks AE."""

    def __init__(self, port: int) -> None:
        self.session = MllpSession(port, ack_timeout=30)
        self.final: dict[str, str] = {}
        self.answers: list[tuple[str, str]] = []

    def ack(self, text: str) -> str | None:
        sock = self.session
        try:
            s = sock._connect()
            s.sendall(SB + text.encode() + EB + CR)
            while EB + CR not in sock._buffer:
                chunk = s.recv(65536)
                if not chunk:
                    raise ConnectionError("closed before the ACK")
                sock._buffer += chunk
        except OSError:
            sock.close()
            return None
        frame, _, sock._buffer = sock._buffer.partition(EB + CR)
        ack = parse_message(frame.strip(SB).decode(), find_groups=False)
        return str(ack.msa.msa_1.to_er7())

    def run(self, plan: list[tuple[str, str, str]], deadline: float) -> None:
        for control, text, _ in plan:
            while time.monotonic() < deadline:
                code = self.ack(text)
                self.answers.append((control, code or "no ACK"))
                if code in ("AA", "AE"):
                    self.final[control] = code
                    break
                time.sleep(0.5)
            time.sleep(0.05)
        self.session.close()


@pytest.mark.slow
@pytest.mark.timeout(300)
def test_an_engine_resending_ar_and_silence_loses_nothing_through_a_lock(tmp_path: Path) -> None:
    path = tmp_path / "gasgap.db"
    db_url = f"sqlite:///{path}"
    receiver = Receiver()
    receiver.start()
    http_port, mllp_port = free_port(), free_port()
    config = tmp_path / "site.toml"
    config.write_text(
        site_toml(db_url=db_url, http_port=http_port, mllp_port=mllp_port, webhook_url=receiver.url)
    )
    service = ServiceProcess(config, http_port, tmp_path / "service.log")
    plan = _plan()
    engine = InterfaceEngine(mllp_port)
    lock_seconds = SQLITE_BUSY_TIMEOUT_MS / 1000 + 4
    try:
        service.start()
        sender = threading.Thread(target=engine.run, args=(plan, time.monotonic() + 200))
        sender.start()
        time.sleep(2.0)
        locker = sqlite3.connect(path, isolation_level=None, timeout=30)
        locker.execute("BEGIN EXCLUSIVE")  # another writer holds the database
        time.sleep(lock_seconds)
        locker.execute("ROLLBACK")
        locker.close()
        sender.join(220)
        service.stop()
    finally:
        service.kill()
        receiver.stop()

    expected = {control: want for control, _, want in plan}
    assert engine.final == expected, {
        c: (engine.final.get(c), w) for c, w in expected.items() if engine.final.get(c) != w
    }
    outage_answers = {code for _, code in engine.answers} - {"AA", "AE"}
    assert "AR" in outage_answers, engine.answers  # the outage was said, and said as AR
    stored = stored_control_ids(db_url)
    assert {c: stored.get(c) for c, w in expected.items() if w == "AA" and stored.get(c) != 3} == {}
    engine_sa = sa.create_engine(db_url)
    with engine_sa.connect() as conn:
        kept = [
            r.raw_text or bytes(r.raw_bytes).decode("utf-8", "replace")
            for r in conn.execute(sa.select(quarantine_payloads))
        ]
    engine_sa.dispose()
    for control, want in expected.items():
        if want == "AE":
            assert any(f"|{control}|" in raw for raw in kept), f"{control} answered AE, not kept"
