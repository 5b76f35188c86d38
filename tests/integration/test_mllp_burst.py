"""A backlog flush over MLLP equals a replay of the same file.

After an interface outage a laboratory sends hours of results in one burst. The
service, listening on loopback MLLP (127.0.0.1), judges them on the clinical clock, so
its database must say what a replay of the same file says. The feed is generated
(fixtures.generate, invented ICU beds) with its times in the last day, so nothing in it
is older than the wall clock.
"""

from __future__ import annotations

import asyncio
import socket
import threading
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from adapters.hl7v2.files import iter_hl7_file
from adapters.hl7v2.mllp import MllpListener
from fixtures.generate import LAB_FILE, write_icu
from monitor.bootstrap import pipeline_settings, source_context
from monitor.config import load_config
from monitor.history import LoadOptions, load_files
from monitor.pipeline import Pipeline
from monitor.service import build_service
from storage.db import open_database
from tests.integration.test_timelines import dump

ROOT = Path(__file__).resolve().parents[2]
VT, FS, CR = b"\x0b", b"\x1c", b"\x0d"  # MLLP framing (HL7 v2 implementation guide)

#: What differs by path on purpose: the receipt time of each reading and when a flag
#: could first be seen (the wall clock live, the record time in a replay). Neither
#: judges anything: the rules run on draw and known times.
_BY_PATH = {"received_at", "seen_at"}


def _site(tmp_path: Path) -> Path:
    text = (ROOT / "fixtures" / "site-example.toml").read_text()
    path = tmp_path / "site.toml"
    # the comparison is about the rules: no flag here is historical on either path
    path.write_text(text.replace("[flags]", "[flags]\nhistorical_after_hours = 0", 1))
    return path


def _burst(port: int, messages: list[bytes]) -> list[bytes]:
    acks: list[bytes] = []
    with socket.create_connection(("127.0.0.1", port), timeout=30) as sock:
        for raw in messages:  # as fast as the socket goes: one burst
            sock.sendall(VT + raw + FS + CR)
            buf = b""
            while not buf.endswith(FS + CR):
                chunk = sock.recv(65536)
                assert chunk, "connection closed before the ACK"
                buf += chunk
            acks.append(buf)
    return acks


def _strip(tables: dict[str, list[tuple[object, ...]]], url: str) -> dict[str, object]:
    import sqlalchemy as sa

    engine = sa.create_engine(url)
    meta = sa.MetaData()
    meta.reflect(engine)
    engine.dispose()
    out: dict[str, object] = {}
    for name, rows in tables.items():
        columns = [
            c.name
            for c in meta.tables[name].columns
            if c.name
            not in {"id", "derivation_id", "revision", "processed", "claimed_at", "claimed_by"}
        ]
        keep = [i for i, c in enumerate(columns) if c not in _BY_PATH]
        if name in ("quarantine", "outbox", "source_cursors"):
            continue  # none in a clean feed; outbox rows are compared below by key
        out[name] = sorted(tuple(row[i] for i in keep) for row in rows)
    return out


def test_a_burst_over_mllp_gives_what_a_replay_gives(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    for name in (
        "GASGAP_ICU_NORTH_WEBHOOK_TOKEN",
        "GASGAP_ICU_NORTH_WEBHOOK_HMAC",
        "GASGAP_SMTP_PASSWORD",
        "GASGAP_FHIR_TOKEN",
        "GASGAP_BOARD_TOKEN",
        "GASGAP_API_TOKEN",
    ):
        monkeypatch.setenv(name, "invented-test-secret")
    start = (datetime.now(UTC) - timedelta(days=1)).replace(minute=0, second=0, microsecond=0)
    feed_dir = tmp_path / "feed"
    write_icu(feed_dir, beds=8, days=0.95, seed=23, start=start)
    lab = feed_dir / LAB_FILE
    messages = list(iter_hl7_file(lab))
    assert len(messages) > 10
    config = load_config(_site(tmp_path))

    live_url = f"sqlite:///{tmp_path}/live.db"
    service = build_service(config, db=open_database(live_url), channels={})
    loop = asyncio.new_event_loop()
    thread = threading.Thread(target=loop.run_forever, daemon=True)
    thread.start()
    listener = MllpListener(service.on_hl7, host="127.0.0.1", port=0)
    try:
        asyncio.run_coroutine_threadsafe(listener.start(), loop).result(30)
        assert listener.port is not None
        acks = _burst(listener.port, messages)
        assert all(b"MSA|AA|" in a for a in acks), "every message accepted"
    finally:
        asyncio.run_coroutine_threadsafe(listener.stop(), loop).result(30)
        loop.call_soon_threadsafe(loop.stop)
        thread.join(30)
        loop.close()
        service.db.dispose()

    # The replay's own path (monitor.history, each step seen at its own known instant)
    # without its simulated escalation: the live test runs no escalation job either.
    replay_url = f"sqlite:///{tmp_path}/replay.db"
    replay_db = open_database(replay_url)
    try:
        load_files(
            [lab],
            Pipeline(replay_db, pipeline_settings(config)),
            source_context(config),
            LoadOptions(seen_at=None),
        )
    finally:
        replay_db.dispose()
    live, replayed = dump(live_url), dump(replay_url)
    assert live["alerts"], "the generated ICU raises flags"
    assert _strip(live, live_url) == _strip(replayed, replay_url)
