"""The real FHIR test server as a pytest fixture.

The server is sekmet-fhir 0.1.1 (a general FHIR R4 test server from PyPI), installed
in its own virtualenv, ``.fhir-venv`` at the repository root (git-ignored), so its
dependencies never mix with ours::

    python3 -m venv .fhir-venv && .fhir-venv/bin/pip install sekmet-fhir==0.1.1

The fixture writes a settings file into a temporary directory (127.0.0.1, a free
port, a temporary data directory, simulator off, open access), starts
``sekmet serve`` as a subprocess, waits for ``GET /fhir/metadata`` and stops it at
the end of the session. Tests use only standard FHIR REST, so any conformant server
could take its place: set GASGAP_TEST_FHIR_URL to use a running one instead.

Use it from a conftest with::

    from tests.fhir_server import fhir_server  # noqa: F401
"""

from __future__ import annotations

import os
import socket
import subprocess
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx
import pytest

from tests.conftest import service_missing

REPO = Path(__file__).resolve().parent.parent
FHIR_VENV = Path(os.environ.get("GASGAP_FHIR_VENV", REPO / ".fhir-venv"))
SERVER_COMMAND = FHIR_VENV / "bin" / "sekmet"
START_TIMEOUT_S = 60.0


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def write_settings(directory: Path, port: int) -> Path:
    settings = directory / "settings.yaml"
    settings.write_text(
        "\n".join(
            [
                f"base_url: http://127.0.0.1:{port}/fhir",
                "host: 127.0.0.1",
                f"port: {port}",
                f"data_dir: {directory / 'data'}",
                f"own_private_key_path: {directory / 'keys' / 'server.pem'}",
                "facility_name: Hollowmere General Hospital (test server)",
                "simulator:",
                "  enabled: false",
                "log_inbound: false",
                "",
            ]
        )
    )
    return settings


def wait_for_metadata(base_url: str, process: subprocess.Popen[bytes], log: Path) -> str | None:
    """None once GET /metadata answers 200, else why not (bounded by START_TIMEOUT_S)."""
    deadline = time.monotonic() + START_TIMEOUT_S
    last = "no answer"
    while time.monotonic() < deadline:
        if process.poll() is not None:
            return f"server exited with {process.returncode}: {log.read_text()[-800:]}"
        try:
            if httpx.get(f"{base_url}/metadata", timeout=2.0).status_code == 200:
                return None
        except httpx.HTTPError as exc:
            last = type(exc).__name__
        time.sleep(0.25)
    return f"GET {base_url}/metadata gave no answer within {START_TIMEOUT_S:.0f} s ({last})"


@pytest.fixture(scope="session")
def fhir_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """Base URL (…/fhir) of a running FHIR R4 test server, fresh for the session."""
    given = os.environ.get("GASGAP_TEST_FHIR_URL")
    if given:
        yield given.rstrip("/")
        return
    yield from _serve(tmp_path_factory)


@pytest.fixture(scope="module")
def fresh_fhir_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """A server of its own for one module, for tests whose expectations (subscription
    event numbers, delivery timing) must not depend on what other tests left on the
    session's server."""
    yield from _serve(tmp_path_factory)


def _serve(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    if not SERVER_COMMAND.exists():
        service_missing(
            "FHIR test server",
            f"{SERVER_COMMAND} not found: python3 -m venv .fhir-venv && "
            ".fhir-venv/bin/pip install sekmet-fhir==0.1.1",
        )
    directory = tmp_path_factory.mktemp("fhir-server")
    port = free_port()
    settings = write_settings(directory, port)
    base_url = f"http://127.0.0.1:{port}/fhir"
    with running_server(directory, settings, base_url, "FHIR test server"):
        yield base_url


@contextmanager
def running_server(directory: Path, settings: Path, base_url: str, what: str) -> Iterator[None]:
    """The server with ``settings`` running from ``directory`` until the block ends
    (its output in ``server.log``); skipped, or failed in CI, when it will not start."""
    log = directory / "server.log"
    with open(log, "wb") as out:
        process = subprocess.Popen(
            [str(SERVER_COMMAND), "serve", "-c", str(settings)],
            cwd=directory,
            stdout=out,
            stderr=subprocess.STDOUT,
            env={**os.environ, "SEKMET_CONFIG": str(settings)},
        )
    try:
        problem = wait_for_metadata(base_url, process, log)
        if problem:
            service_missing(what, problem)
        yield
    finally:
        process.terminate()
        try:
            process.wait(timeout=10)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=10)
