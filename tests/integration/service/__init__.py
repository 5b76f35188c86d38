"""Helpers for tests of the running service: a real ``gasgap serve`` process on loopback
ports, a real webhook receiver, an MLLP client. Every patient and number is invented
(Hollowmere General Hospital, 1,600 m; MRN system urn:oid:2.999.1.1.1).
"""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import httpx

REPO = Path(__file__).resolve().parents[3]
START_TIMEOUT_S = 60.0
API_TOKEN = "api-token-for-tests-only-7f3a"
BOARD_TOKEN = "board-code-for-tests-only-51c9"
IDEMPOTENCY_HEADER = "X-Gasgap-Idempotency-Key"

# HL7 framing bytes (MLLP: VT ... FS CR), written here from the standard, not imported,
# so the test does not lean on the code it checks.
_SB, _EB, _CR = b"\x0b", b"\x1c", b"\x0d"


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class Received:
    """What the webhook receiver got: bodies and idempotency keys, in arrival order."""

    bodies: list[dict[str, Any]] = field(default_factory=list)
    keys: list[str] = field(default_factory=list)
    lock: threading.Lock = field(default_factory=threading.Lock)

    def snapshot(self) -> tuple[list[dict[str, Any]], list[str]]:
        with self.lock:
            return list(self.bodies), list(self.keys)


@contextmanager
def webhook_receiver() -> Iterator[tuple[str, Received]]:
    """A real HTTP server on 127.0.0.1 that records each POST and answers 200."""
    received = Received()

    class Handler(BaseHTTPRequestHandler):
        def do_POST(self) -> None:  # noqa: N802 - the http.server hook name
            length = int(self.headers.get("Content-Length", "0"))
            body = self.rfile.read(length)
            with received.lock:
                received.bodies.append(json.loads(body or b"{}"))
                received.keys.append(self.headers.get(IDEMPOTENCY_HEADER, ""))
            self.send_response(200)
            self.send_header("Content-Length", "0")
            self.end_headers()

        def log_message(self, format: str, *args: Any) -> None:  # quiet
            return

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}/station", received
    finally:
        server.shutdown()
        server.server_close()


def site_toml(
    *,
    db_url: str,
    http_port: int,
    mllp_port: int | None,
    webhook_url: str,
    fhir: list[tuple[str, str, float]] = (),  # type: ignore[assignment]
) -> str:
    """A site configuration for Hollowmere (1,600 m) with the built-in rules, the
    ICU-North unit routed to the test's webhook, and tokens named by variable."""
    lines = [
        "[site]",
        'name = "Hollowmere General Hospital"',
        "elevation_m = 1600",
        'timezone = "America/Denver"',
        'patient_id_system = "urn:oid:2.999.1.1.1"',
        'display_key = "mrn"',
        "",
        "[channels.icu-north-station]",
        'type = "webhook"',
        f'url = "{webhook_url}"',
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
    ]
    if mllp_port is not None:
        lines += ["[sources.mllp]", 'host = "127.0.0.1"', f"port = {mllp_port}", ""]
    for name, url, seconds in fhir:
        lines += [
            "[[sources.fhir]]",
            f'name = "{name}"',
            f'base_url = "{url}"',
            f"poll_seconds = {seconds}",
            "",
        ]
    lines += [
        "[database]",
        f'url = "{db_url}"',
        "",
        "[http]",
        'host = "127.0.0.1"',
        f"port = {http_port}",
        'board_token_env = "GASGAP_TEST_BOARD_TOKEN"',
        'api_token_env = "GASGAP_TEST_API_TOKEN"',
        "max_request_bytes = 65536",
        "",
        "[logging]",
        'level = "INFO"',
        'format = "json"',
    ]
    return "\n".join(lines) + "\n"


def serve_command(config: Path) -> list[str]:
    """``python -m monitor.cli serve`` when the main command has it, else the service's
    own command module (same parser function)."""
    from monitor import cli

    parser = cli.build_parser()
    try:
        parser.parse_args(["serve", "--config", str(config)])
    except SystemExit:
        return [sys.executable, "-m", "monitor.cli", "serve", "--config", str(config)]
    return [sys.executable, "-m", "monitor.cli", "serve", "--config", str(config)]


@dataclass
class Running:
    process: subprocess.Popen[bytes]
    base: str
    log_path: Path

    def log_text(self) -> str:
        return self.log_path.read_text(encoding="utf-8", errors="replace")

    def stop(self, timeout: float = 15.0) -> int:
        """SIGTERM, then wait; returns the exit code (kills and fails after timeout)."""
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
        try:
            return self.process.wait(timeout)
        except subprocess.TimeoutExpired:
            self.process.kill()
            self.process.wait(5)
            raise AssertionError(f"service did not stop within {timeout}s of SIGTERM") from None


@contextmanager
def running_service(config: Path, http_port: int, log_path: Path) -> Iterator[Running]:
    """Start ``gasgap serve`` as a child process and wait until /health answers."""
    env = {
        **os.environ,
        "GASGAP_TEST_API_TOKEN": API_TOKEN,
        "GASGAP_TEST_BOARD_TOKEN": BOARD_TOKEN,
        "PYTHONUNBUFFERED": "1",
    }
    with open(log_path, "wb") as log_file:
        process = subprocess.Popen(
            serve_command(config),
            cwd=REPO,
            env=env,
            stdout=log_file,
            stderr=subprocess.STDOUT,
        )
    running = Running(process, f"http://127.0.0.1:{http_port}", log_path)
    try:
        deadline = time.monotonic() + START_TIMEOUT_S
        while True:
            if process.poll() is not None:
                raise AssertionError(
                    f"service exited with {process.returncode}:\n{running.log_text()}"
                )
            try:
                if httpx.get(running.base + "/health", timeout=2).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            if time.monotonic() > deadline:
                raise AssertionError(
                    f"service not healthy in {START_TIMEOUT_S}s:\n{running.log_text()}"
                )
            time.sleep(0.2)
        yield running
    finally:
        if process.poll() is None:
            process.kill()
            process.wait(5)


def send_mllp(port: int, message: str, timeout: float = 30.0) -> str:
    """Send one HL7 message over MLLP to 127.0.0.1 and return the ACK's text."""
    with socket.create_connection(("127.0.0.1", port), timeout=timeout) as sock:
        sock.sendall(_SB + message.encode("utf-8") + _EB + _CR)
        data = b""
        while not data.endswith(_EB + _CR):
            chunk = sock.recv(65536)
            if not chunk:
                break
            data += chunk
    return data.strip(_SB + _EB + _CR).decode("utf-8")


def ack_code(ack: str) -> str:
    """MSA-1 of an ACK (split on the field separator MSH-1 declares)."""
    segments = [s for s in ack.replace("\n", "\r").split("\r") if s]
    separator = segments[0][3]
    msa = next(s for s in segments if s.startswith("MSA"))
    return msa.split(separator)[1]


def wait_for(predicate: Any, timeout: float = 30.0, every: float = 0.2) -> Any:
    """Poll ``predicate`` until it returns something truthy (bounded)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        time.sleep(every)
    return predicate()
