"""Two ``gasgap serve`` processes on one PostgreSQL: each flag is notified exactly once,
and a FHIR source is polled once per interval across the fleet.

Real peers: PostgreSQL (a fresh schema from the ``pg_url`` fixture), two service
processes, a webhook receiver that counts idempotency keys, and a small FHIR endpoint
that answers the Observation search with an empty searchset Bundle (FHIR R4 3.1.1.4.1)
and records when it was asked.
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

from tests.integration.service import (
    API_TOKEN,
    ack_code,
    free_port,
    running_service,
    send_mllp,
    site_toml,
    wait_for,
    webhook_receiver,
)
from tests.integration.service.test_serve_process import hollowmere_gas

pytestmark = pytest.mark.postgres
POLL_SECONDS = 5.0
AUTH = {"Authorization": f"Bearer {API_TOKEN}"}


@contextmanager
def fhir_endpoint() -> Iterator[tuple[str, list[float]]]:
    """An HTTP server on 127.0.0.1 answering every Observation search with no results."""
    asked: list[float] = []
    lock = threading.Lock()

    class Handler(BaseHTTPRequestHandler):
        def do_GET(self) -> None:  # noqa: N802 - the http.server hook name
            if self.path.split("?", 1)[0].endswith("/Observation"):
                with lock:
                    asked.append(time.monotonic())
            body = json.dumps(
                {"resourceType": "Bundle", "type": "searchset", "total": 0, "entry": []}
            ).encode()
            self.send_response(200)
            self.send_header("Content-Type", "application/fhir+json")
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def log_message(self, format: str, *args: Any) -> None:
            return

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}/fhir", asked
    finally:
        server.shutdown()
        server.server_close()


def test_two_processes_notify_each_flag_once_and_poll_once_per_interval(
    pg_url: str,
    tmp_path: Path,
) -> None:
    with webhook_receiver() as (hook_url, received), fhir_endpoint() as (fhir_url, asked):
        ports = [(free_port(), free_port()) for _ in range(2)]
        configs = []
        for i, (http_port, mllp_port) in enumerate(ports):
            config = tmp_path / f"site-{i}.toml"
            config.write_text(
                site_toml(
                    db_url=pg_url,
                    http_port=http_port,
                    mllp_port=mllp_port,
                    webhook_url=hook_url,
                    fhir=[("hollowmere-record", fhir_url, POLL_SECONDS)],
                )
            )
            configs.append(config)
        # The first process migrates the schema; the second starts on a ready database.
        with (
            running_service(configs[0], ports[0][0], tmp_path / "a.log") as first,
            running_service(configs[1], ports[1][0], tmp_path / "b.log") as second,
        ):
            started = time.monotonic()
            gases = [
                hollowmere_gas(f"HGF{n:04d}", f"HM8{n:05d}", f"F-8{n:03d}", bed=str(n))
                for n in range(1, 7)
            ]
            acks: list[str] = []

            def send(port: int, gas: str) -> None:
                acks.append(ack_code(send_mllp(port, gas)))

            # Every gas goes to both processes at once: duplicates racing on one patient.
            threads = [
                threading.Thread(target=send, args=(mllp, gas))
                for gas in gases
                for _, mllp in ports
            ]
            for t in threads:
                t.start()
            for t in threads:
                t.join(60)
            assert acks == ["AA"] * 12

            def open_flags() -> list[dict[str, Any]]:
                return list(httpx.get(first.base + "/api/flags", headers=AUTH).json()["flags"])

            assert wait_for(lambda: len(open_flags()) == 6, timeout=30), open_flags()
            assert wait_for(lambda: len(received.snapshot()[1]) >= 6, timeout=30)
            # Let both outbox jobs run a few more rounds: nothing may be sent twice.
            time.sleep(max(0.0, 3 * POLL_SECONDS - (time.monotonic() - started)) + 2)
            _, keys = received.snapshot()
            assert len(keys) == 6, keys
            assert len(set(keys)) == 6
            both = {f["id"] for f in open_flags()}
            from_second = {
                f["id"] for f in httpx.get(second.base + "/api/flags", headers=AUTH).json()["flags"]
            }
            assert both == from_second

            assert first.stop() == 0
            assert second.stop() == 0

        times = sorted(asked)
        assert len(times) >= 2, "the source was polled"
        gaps = [b - a for a, b in zip(times, times[1:], strict=False)]
        assert min(gaps) >= 0.8 * POLL_SECONDS, f"polls closer than one interval: {gaps}"
