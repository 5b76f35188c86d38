"""Latency: ``gasgap serve`` as its own process, HL7 v2 over MLLP in, the webhook
received by a loopback HTTP receiver here; the time from sending a gas to receiving
its flag, over N gases (goal: p99 under 250 ms).

Each gas is for a different invented patient of Hollowmere General Hospital (1,600 m)
in ICU-North: PaO2 55 mmHg on FiO2 0.60, which the built-in rules flag (P/F about 92,
about 111 adjusted to sea level), so every gas should bring exactly one webhook call.
Gases are sent one at a time (each waits for its ACK) at a fixed pace, so the figure
is the path's latency, not a queue built by the benchmark. Everything runs on
127.0.0.1.
"""

from __future__ import annotations

import os
import re
import socket
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime, timedelta
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

from bench.common import REPO, heading, line, percentile

API_TOKEN_ENV = "GASGAP_BENCH_API_TOKEN"
BOARD_TOKEN_ENV = "GASGAP_BENCH_BOARD_TOKEN"
MRN = re.compile(r"HB\d{7}")
_SB, _EB, _CR = b"\x0b", b"\x1c", b"\x0d"  # MLLP framing


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class _Arrivals:
    """When each patient's first webhook call arrived (perf_counter seconds)."""

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.at: dict[str, float] = {}
        self.calls = 0


@contextmanager
def _receiver() -> Iterator[tuple[str, _Arrivals]]:
    arrivals = _Arrivals()

    class Handler(BaseHTTPRequestHandler):
        def do_POST(self) -> None:  # noqa: N802 - the http.server hook name
            now = time.perf_counter()
            body = self.rfile.read(int(self.headers.get("Content-Length", "0")))
            found = MRN.search(body.decode("utf-8", errors="replace"))
            with arrivals.lock:
                arrivals.calls += 1
                if found:
                    arrivals.at.setdefault(found.group(0), now)
            self.send_response(200)
            self.send_header("Content-Length", "0")
            self.end_headers()

        def log_message(self, format: str, *args: Any) -> None:
            return

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}/station", arrivals
    finally:
        server.shutdown()
        server.server_close()


def _site(db_url: str, http_port: int, mllp_port: int, webhook: str) -> str:
    return "\n".join(
        [
            "[site]",
            'name = "Hollowmere General Hospital"',
            "elevation_m = 1600",
            'timezone = "UTC"',
            'patient_id_system = "urn:oid:2.999.1.1.1"',
            'display_key = "mrn"',
            "",
            "[channels.icu-north-station]",
            'type = "webhook"',
            f'url = "{webhook}"',
            "",
            "[channels.log]",
            'type = "log"',
            "",
            "[routes]",
            'default = ["log"]',
            "",
            "[routes.units]",
            '"ICU-North" = ["icu-north-station"]',
            "",
            "[sources.mllp]",
            'host = "127.0.0.1"',
            f"port = {mllp_port}",
            "",
            "[database]",
            f'url = "{db_url}"',
            "",
            "[http]",
            'host = "127.0.0.1"',
            f"port = {http_port}",
            f'board_token_env = "{BOARD_TOKEN_ENV}"',
            f'api_token_env = "{API_TOKEN_ENV}"',
            "",
            "[logging]",
            'level = "WARNING"',
            'format = "json"',
            "",
        ]
    )


def _gas(n: int, mrn: str) -> bytes:
    """An invented arterial gas (HL7 v2.5.1 ORU^R01) drawn ten minutes ago."""
    drawn = (datetime.now(UTC) - timedelta(minutes=10)).strftime("%Y%m%d%H%M%S+0000")
    segments = [
        f"MSH|^~\\&|HGH-LAB|HOLLOWMERE|GASGAP|HOLLOWMERE|{drawn}||ORU^R01^ORU_R01"
        f"|BENCH{n:07d}|P|2.5.1",
        f"PID|1||{mrn}^^^HGH&2.999.1.1.1&ISO^MR||Bench^Patient{n}||19600101|F",
        f"PV1|1|I|ICU-North^{1 + n % 30}^1",
        f"OBR|1|P-{n}|F-BENCH-{n:07d}|24336-0^Gas panel - Arterial blood^LN|||{drawn}",
        "OBX|1|NM|2703-7^PO2 arterial^LN||55|mm[Hg]|||||F",
        "OBX|2|NM|2019-8^PCO2 arterial^LN||40|mm[Hg]|||||F",
        "OBX|3|NM|3150-0^Inhaled O2 concentration^LN||60|%|||||F",
        "OBX|4|NM|76248-4^PEEP^LN||10|cm[H2O]|||||F",
        "SPM|1|||BLDA^Blood arterial^HL70487",
    ]
    return ("\r".join(segments) + "\r").encode("ascii")


def _send(sock: socket.socket, message: bytes) -> bytes:
    sock.sendall(_SB + message + _EB + _CR)
    data = b""
    while not data.endswith(_EB + _CR):
        chunk = sock.recv(65536)
        if not chunk:
            raise ConnectionError("MLLP peer closed before the ACK")
        data += chunk
    return data


def _wait_healthy(process: subprocess.Popen[bytes], port: int, log: Path) -> None:
    import httpx

    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError(
                f"gasgap serve exited {process.returncode}:\n{log.read_text()[-3000:]}"
            )
        try:
            if httpx.get(f"http://127.0.0.1:{port}/health", timeout=2).status_code == 200:
                return
        except httpx.TransportError:
            pass
        time.sleep(0.2)
    raise RuntimeError(f"gasgap serve not healthy within 60 s:\n{log.read_text()[-3000:]}")


def run(*, gases: int, pace_per_s: float = 20.0, history: Path | None = None) -> dict[str, Any]:
    """``history``: a folder of feed files loaded by ``gasgap ingest`` into the same
    database while the live gases are sent (a site going live while its backfill runs)."""
    heading(
        f"latency: gasgap serve, {gases} gases over MLLP at {pace_per_s:g}/s, "
        "webhook on loopback, SQLite file"
        + (f", while `gasgap ingest` loads {history.name}" if history else "")
    )
    with (
        tempfile.TemporaryDirectory(prefix="gasgap-bench-") as tmp,
        _receiver() as (hook, arrivals),
    ):
        http_port, mllp_port = _free_port(), _free_port()
        config = Path(tmp) / "site.toml"
        config.write_text(_site(f"sqlite:///{tmp}/gasgap.db", http_port, mllp_port, hook))
        log = Path(tmp) / "serve.log"
        env = {
            **os.environ,
            API_TOKEN_ENV: "bench-api-token-0f3c9a",
            BOARD_TOKEN_ENV: "bench-board-token-77d1e2",
            "PYTHONUNBUFFERED": "1",
        }
        with open(log, "wb") as out:
            process = subprocess.Popen(
                [sys.executable, "-m", "monitor.cli", "serve", "--config", str(config)],
                cwd=REPO,
                env=env,
                stdout=out,
                stderr=subprocess.STDOUT,
            )
        loader: subprocess.Popen[bytes] | None = None
        still_loading = False
        try:
            _wait_healthy(process, http_port, log)
            if history is not None:
                files = [str(p) for p in sorted(history.iterdir()) if not p.name.startswith(".")]
                loader = subprocess.Popen(
                    [
                        sys.executable,
                        "-m",
                        "monitor.cli",
                        "ingest",
                        *files,
                        "--config",
                        str(config),
                        "--no-progress",
                        "--json",
                    ],
                    cwd=REPO,
                    env=env,
                    stdout=subprocess.DEVNULL,
                    stderr=subprocess.DEVNULL,
                )
                time.sleep(2.0)  # let the load get going: its writes are what we measure
            sent: dict[str, float] = {}
            acks: list[float] = []
            start = time.perf_counter()
            with socket.create_connection(("127.0.0.1", mllp_port), timeout=30) as sock:
                for n in range(gases):
                    due = start + n / pace_per_s
                    if (ahead := due - time.perf_counter()) > 0:
                        time.sleep(ahead)
                    mrn = f"HB{n:07d}"
                    message = _gas(n, mrn)
                    sent[mrn] = time.perf_counter()
                    ack = _send(sock, message)
                    acks.append(time.perf_counter() - sent[mrn])
                    if b"MSA|AA" not in ack:
                        raise RuntimeError(f"gas {n} not accepted: {ack!r}")
            deadline = time.monotonic() + 30
            while time.monotonic() < deadline:
                with arrivals.lock:
                    if len(arrivals.at) >= gases:
                        break
                time.sleep(0.1)
            still_loading = loader is not None and loader.poll() is None
        finally:
            if loader is not None and loader.poll() is None:
                loader.terminate()
                loader.wait(30)
            process.terminate()
            try:
                process.wait(20)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(5)
        with arrivals.lock:
            latencies = [arrivals.at[m] - sent[m] for m in sent if m in arrivals.at]
            calls = arrivals.calls
    ms = [x * 1000 for x in latencies]
    ack_ms = [x * 1000 for x in acks]
    p50, p95, p99 = (percentile(ms, f) for f in (0.50, 0.95, 0.99))
    line("gases sent / flags received (webhook calls)", f"{gases} / {len(ms)} ({calls})")
    line(
        "MLLP ACK p50 / p95 / p99",
        " / ".join(f"{percentile(ack_ms, f):.0f} ms" for f in (0.5, 0.95, 0.99)),
    )
    line(
        "send to webhook p50 / p95 / p99",
        f"{p50:.0f} / {p95:.0f} / {p99:.0f} ms (max {max(ms, default=float('nan')):.0f} ms)",
    )
    if history is not None:
        line(
            "history load still running at the end",
            "yes"
            if still_loading
            else "no (it finished during the run: load a longer history for a fair figure)",
        )
    line("goal p99 < 250 ms", "met" if ms and p99 < 250 and len(ms) == gases else "missed")
    return {
        "gases": gases,
        "received": len(ms),
        "calls": calls,
        "p50_ms": round(p50, 1),
        "p95_ms": round(p95, 1),
        "p99_ms": round(p99, 1),
        "ack_p99_ms": round(percentile(ack_ms, 0.99), 1),
        "pace_per_s": pace_per_s,
    }


if __name__ == "__main__":
    run(gases=100)
