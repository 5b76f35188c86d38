"""The database goes away under a running ``gasgap serve`` and comes back.

A PostgreSQL cluster of the test's own (so stopping it touches nobody else) serves
one ``gasgap serve`` process that takes HL7 over MLLP and polls a tiny loopback FHIR
endpoint. Mid-feed the cluster is stopped:
- MLLP answers AR (never AA, never AE) while nothing can be stored, so the lab system
  resends the message (HL7 v2 original acknowledgement mode, Table 0008: AR "the
  receiver could not process it now; senders commonly retry", while AE says the
  message itself is at fault and is commonly not resent; the listener's contract: "an
  AA always means stored");
- /health says the database is unreachable;
- the FHIR poll fails (logged), and nothing is lost: after the cluster starts again
  the same process (no restart) stores every re-sent message and the poll's
  observations, each once.
Patients and values are invented (Hollowmere, MRN system urn:oid:2.999.1.1.1).
"""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests import fhir_samples as fs
from tests.reliability.helpers import (
    MllpSession,
    PgCluster,
    Receiver,
    ServiceProcess,
    count_rows,
    free_port,
    gas,
    minutes_ago,
    site_toml,
    stored_control_ids,
    wait_until,
)

FHIR_SOURCE = "ehr-outage"


@contextmanager
def fhir_endpoint() -> Iterator[tuple[str, dict[str, Any]]]:
    """A loopback FHIR R4 search endpoint: ``state["observations"]`` is what the next
    Observation search returns (a searchset Bundle, FHIR R4 3.1.1.4.1); Patient and
    Encounter searches return the invented patient's context. Counts the searches."""
    state: dict[str, Any] = {"observations": [], "searches": 0}
    when = minutes_ago(15).isoformat()

    class Handler(BaseHTTPRequestHandler):
        def do_GET(self) -> None:  # noqa: N802 - the http.server hook name
            path = self.path.split("?", 1)[0]
            if path.endswith("/Observation"):
                state["searches"] += 1
                found = [
                    dict(o, meta={"versionId": "1", "lastUpdated": when})
                    for o in state["observations"]
                ]
            elif path.endswith("/Patient"):
                found = [fs.patient("hg-out-1", mrn="HM880001")]
            elif path.endswith("/Encounter"):
                found = [fs.encounter("hg-out-enc", pid="hg-out-1")]
            else:
                found = []
            body = json.dumps(fs.bundle("searchset", found)).encode()
            self.send_response(200)
            self.send_header("Content-Type", "application/fhir+json")
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def log_message(self, format: str, *args: Any) -> None:  # quiet
            return

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}/fhir", state
    finally:
        server.shutdown()
        server.server_close()


def _message(n: int) -> tuple[str, str]:
    control = f"DB{n:04d}"
    mrn = f"HM88{n % 4:04d}"
    return control, gas(
        control,
        mrn,
        f"F-{control}",
        pao2=70 + n % 20,
        fio2_percent=40,
        drawn=minutes_ago(200 - n),
        bed=str(n % 4),
    )


def _observations() -> list[dict[str, Any]]:
    when = minutes_ago(20).isoformat()
    return [
        fs.quantity_obs(
            "hg-out-po2", "2703-7", 72, "mm[Hg]", pid="hg-out-1", eid="hg-out-enc", when=when
        ),
        fs.quantity_obs(
            "hg-out-fio2", "3150-0", 40, "%", pid="hg-out-1", eid="hg-out-enc", when=when
        ),
    ]


@pytest.mark.slow
@pytest.mark.postgres
@pytest.mark.timeout(400)
def test_database_outage_answers_ar_then_recovers_without_restart(
    pg_cluster: PgCluster,
    tmp_path: Path,
) -> None:
    receiver = Receiver()
    receiver.start()
    http_port, mllp_port = free_port(), free_port()
    with fhir_endpoint() as (fhir_url, fhir_state):
        config = tmp_path / "site.toml"
        text = site_toml(
            db_url=pg_cluster.url,
            http_port=http_port,
            mllp_port=mllp_port,
            webhook_url=receiver.url,
            fhir=[(FHIR_SOURCE, fhir_url, 5)],
        )
        # Logs may show only the last four of the MRN, also in the error tracebacks.
        config.write_text(text.replace('display_key = "mrn"', 'display_key = "mrn-last4"'))
        service = ServiceProcess(config, http_port, tmp_path / "service.log")
        acked: set[str] = set()
        during: dict[str, str] = {}
        try:
            service.start()
            pid = service.process.pid  # type: ignore[union-attr]
            session = MllpSession(mllp_port, ack_timeout=30)

            # Before: all taken.
            for n in range(20):
                control, text = _message(n)
                assert session.send(text) == "AA", control
                acked.add(control)

            # The database goes away; the FHIR source now has new results.
            pg_cluster.stop("fast")
            fhir_state["observations"] = _observations()
            for n in range(20, 35):
                control, text = _message(n)
                code = session.send(text) or "no ACK"
                during[control] = code
                if code == "AA":
                    acked.add(control)
            health = httpx.get(service.base + "/health", timeout=10)
            time.sleep(6)  # at least one FHIR poll interval passes during the outage
            log_during = service.log_text()

            # The database comes back; the lab system resends what was not taken.
            pg_cluster.start()
            deadline = time.monotonic() + 90
            for control in sorted(c for c in during if c not in acked):
                text = dict([_message(int(control[2:]))])[control]
                while time.monotonic() < deadline:
                    if session.send(text) == "AA":
                        acked.add(control)
                        break
                    time.sleep(0.5)
            for n in range(35, 50):
                control, text = _message(n)
                assert session.send(text) == "AA", control
                acked.add(control)
            session.close()

            polled = wait_until(
                lambda: count_rows(pg_cluster.url, "readings", source_system=FHIR_SOURCE) >= 2,
                timeout=40,
                every=1.0,
            )
            health_after = httpx.get(service.base + "/health", timeout=10)
            assert service.process.pid == pid and service.process.poll() is None  # type: ignore[union-attr]
            assert service.starts == 1
        finally:
            service.kill()
            receiver.stop()

    # During the outage nothing was ACKed AA or AE: every answer was AR (or no ACK).
    assert during and all(code in ("AR", "no ACK") for code in during.values()), during
    assert "AR" in during.values(), "the listener answers AR (resend later), not silence"
    assert health.status_code == 503, health.text
    assert (
        f"scheduled job poll:{FHIR_SOURCE} failed" in log_during
        or f"poll of {FHIR_SOURCE} failed" in log_during
    ), log_during[-3000:]
    # The outage is expected operation: each failed scheduled run is one line (no
    # traceback, which could carry data), and no log line carries a full identifier.
    full_log = service.log_text()
    scheduled = [line for line in full_log.splitlines() if '"gasgap.scheduling"' in line]
    assert any("it runs again at its turn" in line for line in scheduled), scheduled[-5:]
    assert not any("Traceback" in line for line in scheduled), scheduled[-5:]
    leaked = [
        m for m in ("HM880000", "HM880001", "HM880002", "HM880003", "Thornbury") if m in full_log
    ]
    assert not leaked, f"identifiers in the log: {leaked}"
    # After: every message of the feed stored exactly once (three OBX each).
    stored = stored_control_ids(pg_cluster.url)
    assert acked == {f"DB{n:04d}" for n in range(50)}
    assert {c: stored.get(c) for c in acked if stored.get(c) != 3} == {}
    # The FHIR poll that failed was retried and its two observations stored once.
    assert polled, service.log_text()[-3000:]
    assert count_rows(pg_cluster.url, "readings", source_system=FHIR_SOURCE) == 2
    assert health_after.status_code == 200 and health_after.json()["database"] == "reachable"
