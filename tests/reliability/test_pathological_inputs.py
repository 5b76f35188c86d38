"""Each pathological input of the hostile test leaves a normal sender's message ACKed AA
within one second, and what gasgap keeps of a refused input is at most twice its size.

A real ``gasgap serve`` (SQLite file, loopback) takes, one at a time:
- an ORU^R01 of 5,000 OBX sharing OBR-3, OBX-3 and OBX-4 (every OBX ambiguous);
- a message over the MLLP size limit;
- a FHIR hook Bundle of 2,500 Observations;
- a FHIR resource nested 900 levels deep, posted to the hook.
While each is being handled, a lab system on another connection sends one ordinary
gas and times its AA. The one-second bound and "twice its size" are the project's
goals (issue: hardening), not published figures; sizes are measured as the SQLite
file's growth on disk (its own page accounting), outside the code under test.
Everything is invented (Hollowmere, MRN system urn:oid:2.999.1.1.1).
"""

from __future__ import annotations

import json
import os
import sqlite3
import statistics
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests import fhir_samples as fs
from tests import hl7_samples as h
from tests.reliability.helpers import (
    API_TOKEN,
    MllpSession,
    Receiver,
    ServiceProcess,
    free_port,
    gas,
    minutes_ago,
    site_toml,
    stored_control_ids,
)

HOOK_SOURCE = "ehr-hook"
HOOK_SECRET = "hook-secret-pathological-7c1e"
_counter = iter(range(10_000))


def _normal() -> tuple[str, str]:
    n = next(_counter)
    control = f"NORM{n:04d}"
    return control, gas(
        control,
        f"HM5500{n % 10:02d}",
        f"F-{control}",
        pao2=92,
        fio2_percent=30,
        drawn=minutes_ago(120 - n),
        unit="Ward-5B",
    )


def ambiguous_oru(obx_count: int = 5000) -> bytes:
    obxs = [
        h.obx(n, "2703-7", str(80 + n % 9), "mm[Hg]", text="PO2 arterial")
        for n in range(1, obx_count + 1)
    ]
    when = minutes_ago(200).strftime("%Y%m%d%H%M%S+0000")
    return h.message(
        h.msh("PATH5000", when=when), h.pid("HM559999"), h.obr("F-PATH5000", collected=when), *obxs
    ).encode()


def big_bundle(n: int = 2500) -> bytes:
    when = minutes_ago(90).isoformat()
    resources: list[dict[str, Any]] = [
        fs.patient("hg-big", mrn="HM558888"),
        fs.encounter("hg-big-enc", pid="hg-big"),
    ]
    resources += [
        fs.quantity_obs(
            f"hg-big-{i}",
            "2703-7",
            70 + i % 30,
            "mm[Hg]",
            pid="hg-big",
            eid="hg-big-enc",
            when=when,
        )
        for i in range(n)
    ]
    return json.dumps(fs.bundle("history", resources)).encode()


def deep_resource(levels: int = 900) -> bytes:
    return (
        b'{"resourceType": "Observation", "id": "hg-deep", "status": "final", '
        b'"extension": ' + b"[" * levels + b"]" * levels + b"}"
    )


def _db_bytes(path: Path) -> int:
    plain = sqlite3.connect(path, isolation_level=None, timeout=30)
    try:
        plain.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    finally:
        plain.close()
    wal = Path(f"{path}-wal")
    return path.stat().st_size + (wal.stat().st_size if wal.exists() else 0)


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[ServiceProcess, int, Path]]:
    tmp = tmp_path_factory.mktemp("pathological")
    db_path = tmp / "gasgap.db"
    receiver = Receiver()
    receiver.start()
    http_port, mllp_port = free_port(), free_port()
    text = site_toml(
        db_url=f"sqlite:///{db_path}",
        http_port=http_port,
        mllp_port=mllp_port,
        webhook_url=receiver.url,
        fhir=[(HOOK_SOURCE, "http://127.0.0.1:9/fhir", 3600)],
    )
    text = text.replace("max_request_bytes = 65536", "max_request_bytes = 4000000")
    text = text.replace("[http]\n", '[http]\nhook_secret_env = "GASGAP_TEST_HOOK"\n')
    config = tmp / "site.toml"
    config.write_text(text)
    os.environ["GASGAP_TEST_HOOK"] = HOOK_SECRET
    service = ServiceProcess(config, http_port, tmp / "service.log")
    service.start()
    try:
        yield service, mllp_port, db_path
    finally:
        service.kill()
        receiver.stop()


@dataclass(frozen=True)
class Span:
    """When something was sent and when its answer came (``time.monotonic``)."""

    sent: float
    answered: float

    @property
    def seconds(self) -> float:
        return self.answered - self.sent


def not_held_up(normal: Span, hostile: Span, alone: float) -> bool:
    """A normal gas sent while a hostile input was being handled was not queued behind
    it: it took under a quarter of the hostile input's own time, or, for a hostile input
    handled about as fast as a normal gas, under 20 times a normal gas alone (``alone``,
    the median of three sent just before; room for the machine's hiccups). Everything is
    measured in the same run, so a slow or loaded machine moves the bound with the
    figures (no fixed seconds). A gas sent after the hostile input was answered cannot
    have waited for it."""
    if normal.sent >= hostile.answered:
        return True
    return normal.seconds < max(hostile.seconds / 4, 20 * alone)


def normal_alone(port: int) -> float:
    """The median time to the AA of three normal gases sent one after another."""
    return statistics.median(_send_normal(port)[1].seconds for _ in range(3))


@dataclass(frozen=True)
class Contest:
    """A hostile input and a normal gas sent while it was being handled."""

    result: Any  # what the hostile sender got back
    hostile: Span
    normal: Span
    alone: float  # a normal gas's time on its own, just before (normal_alone)
    control: str  # the normal gas's control id

    @property
    def normal_was_not_held_up(self) -> bool:
        return not_held_up(self.normal, self.hostile, self.alone)


def _send_normal(port: int) -> tuple[str, Span]:
    control, text = _normal()
    session = MllpSession(port, ack_timeout=30)
    sent = time.monotonic()
    code = session.send(text)
    span = Span(sent, time.monotonic())
    session.close()
    assert code == "AA", (control, code)
    return control, span


def _while(hostile: Callable[[], Any], port: int, lead: float = 0.3) -> Contest:
    """Time normal gases alone; start ``hostile`` in a thread; ``lead`` seconds later
    send a normal gas on another connection and time its AA."""
    alone = normal_alone(port)
    result: dict[str, Any] = {}

    def run() -> None:
        sent = time.monotonic()
        result["value"] = hostile()
        result["span"] = Span(sent, time.monotonic())

    thread = threading.Thread(target=run, daemon=True)
    thread.start()
    time.sleep(lead)
    control, normal = _send_normal(port)
    thread.join(120)
    return Contest(result.get("value"), result["span"], normal, alone, control)


def _mllp_send(port: int, payload: bytes) -> str | None:
    session = MllpSession(port, ack_timeout=60)
    try:
        return session.send(payload.decode("latin-1"))
    finally:
        session.close()


@pytest.mark.slow
@pytest.mark.timeout(300)
def test_5000_ambiguous_obx(served: tuple[ServiceProcess, int, Path]) -> None:
    service, port, db_path = served
    raw = ambiguous_oru()
    before = _db_bytes(db_path)
    contest = _while(lambda: _mllp_send(port, raw), port)
    growth = _db_bytes(db_path) - before
    assert contest.result == "AE"  # every OBX refused: kept in quarantine, the sender told
    assert contest.normal_was_not_held_up, contest
    # The normal gas is a few KB; the rest is what the refused message cost.
    assert growth <= 2 * len(raw), f"{growth} bytes kept for a {len(raw)}-byte message"
    assert stored_control_ids(f"sqlite:///{db_path}").get(contest.control) == 3


@pytest.mark.slow
@pytest.mark.timeout(300)
def test_oversized_message(served: tuple[ServiceProcess, int, Path]) -> None:
    service, port, db_path = served
    raw = h.msh("PATHBIG").encode() + b"\r" + b"NTE|1||" + b"z" * 2_000_000 + b"\r"
    before = _db_bytes(db_path)
    contest = _while(lambda: _mllp_send(port, raw), port)
    assert contest.result == "AE" and contest.normal_was_not_held_up, contest
    assert _db_bytes(db_path) - before <= 2 * len(raw)
    kept = httpx.get(
        service.base + "/api/quarantine",
        params={"source": "hl7:lab"},
        headers={"Authorization": f"Bearer {API_TOKEN}"},
        timeout=10,
    ).json()
    heads = [i for i in kept["items"] if "limit" in i["reason"]]
    assert heads and heads[0]["payload_bytes"] <= 65536  # its head, bounded


def _hook(service: ServiceProcess, body: bytes) -> int:
    response = httpx.post(
        f"{service.base}/hooks/fhir/{HOOK_SOURCE}",
        content=body,
        headers={"X-Gasgap-Hook-Secret": HOOK_SECRET, "Content-Type": "application/fhir+json"},
        timeout=120,
    )
    return response.status_code


@pytest.mark.slow
@pytest.mark.timeout(400)
def test_bundle_of_2500_observations(served: tuple[ServiceProcess, int, Path]) -> None:
    # The bundle is stored in short transactions of 50 resources (monitor/web/hooks.py),
    # and the service's writers take turns at SQLite's lock in the order they came
    # (storage/turns.py), so a normal sender waits for one part at most, not for the
    # whole bundle (before the turns it was seen to wait 3.8 s of a 4.0 s bundle).
    service, port, _ = served
    alone = normal_alone(port)
    normals: list[Span] = []
    done: dict[str, Any] = {}

    def post_bundle() -> None:
        sent = time.monotonic()
        done["status"] = _hook(service, big_bundle())
        done["span"] = Span(sent, time.monotonic())

    thread = threading.Thread(target=post_bundle, daemon=True)
    thread.start()
    for pause in (0.3, 1.0, 1.0, 1.0):  # early, and while the later parts are stored
        time.sleep(pause)
        normals.append(_send_normal(port)[1])
    thread.join(300)
    assert done.get("status") == 200
    bundle = done["span"]
    assert normals[0].sent < bundle.answered, "the bundle was done before the first gas"
    assert all(not_held_up(normal, bundle, alone) for normal in normals), (normals, bundle)


@pytest.mark.slow
@pytest.mark.timeout(300)
def test_resource_nested_900_deep(served: tuple[ServiceProcess, int, Path]) -> None:
    service, port, db_path = served
    body = deep_resource()
    json.loads(body)  # valid JSON for Python's own parser
    before = _db_bytes(db_path)
    contest = _while(lambda: _hook(service, body), port, lead=0.05)
    assert contest.result == 422 and contest.normal_was_not_held_up, contest
    assert _db_bytes(db_path) - before <= 2 * len(body) + 65536  # + the normal gas
    health = httpx.get(service.base + "/health", timeout=10)
    assert health.status_code == 200
    assert (
        httpx.get(
            service.base + "/api/quarantine", headers={"Authorization": f"Bearer {API_TOKEN}"}
        ).status_code
        == 200
    )
