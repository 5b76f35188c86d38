"""Real peers for the notification channels, all on 127.0.0.1.

- ``http_receiver``: a stdlib ThreadingHTTPServer that records every request and
  answers from a script of status codes; it can be taken down and brought back on the
  same port.
- ``smtp_server`` / ``smtp_auth_server``: aiosmtpd Controllers recording every message.
- ``fhir_server``: the shared sekmet-fhir fixture from ``tests/fhir_server.py`` when it
  exists; otherwise a stand-in that reports the server as missing.

Patient data here is invented (Hollowmere General Hospital).
"""

import importlib.util
import json
import shutil
import socket
import ssl
import subprocess
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from email import message_from_bytes, policy
from email.message import EmailMessage
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import pytest
from aiosmtpd.controller import Controller
from aiosmtpd.smtp import AuthResult, Envelope, LoginPassword, Session

from monitor.engine.model import ADVISORY, Location, Notification, Priority
from tests.conftest import service_missing

LOOPBACK = "127.0.0.1"

if importlib.util.find_spec("tests.fhir_server") is not None:
    from tests.fhir_server import fhir_server  # noqa: F401
else:

    @pytest.fixture(scope="session")
    def fhir_server() -> str:
        service_missing("FHIR test server", "tests/fhir_server.py is not in the tree yet")
        raise AssertionError("unreachable")


def free_port() -> int:
    with socket.socket() as s:
        s.bind((LOOPBACK, 0))
        return int(s.getsockname()[1])


# --- notifications -------------------------------------------------------------------


def make_notification(n: int = 1, **changes: Any) -> Notification:
    """An invented notification from ICU-North; ``n`` varies the keys."""
    at = datetime(2026, 3, 14, 6, 42, tzinfo=UTC)
    base = Notification(
        idempotency_key=f"alert-{n:04d}:raised:1",
        alert_id=f"alert-{n:04d}",
        patient_key=f"hgh-pt-{n:04d}",
        patient_display=f"HGH bed ICU-N-{n}",
        location=Location(unit="ICU-North", room="N2", bed=str(n)),
        rule="aa_gradient_rising",
        priority=Priority.HIGH,
        event="raised",
        summary="A-a gradient 48 mmHg on FiO2 0.40, up from 22 mmHg in 6 h",
        detail="PaO2 62 mmHg with FiO2 0.40 charted 06:30; barometric pressure 628 mmHg.",
        created_at=at,
        advisory=ADVISORY,
        numbers={
            "aa_gradient": {"value": 48.0, "unit": "mmHg", "at": at, "inputs": ["FiO2 charted"]},
            "pf_ratio": {"value": 155.0, "unit": "mmHg", "at": at},
        },
    )
    return replace(base, **changes)


@pytest.fixture
def notification() -> Notification:
    return make_notification()


# --- HTTP receiver -------------------------------------------------------------------


@dataclass
class Received:
    method: str
    path: str
    headers: dict[str, str]
    body: bytes

    def json(self) -> Any:
        return json.loads(self.body)


@dataclass
class HttpReceiver:
    """Answers each request with the next scripted status (then ``default_status``)."""

    port: int = 0
    requests: list[Received] = field(default_factory=list)
    script: list[int] = field(default_factory=list)
    default_status: int = 200
    delay_s: float = 0.0
    _server: ThreadingHTTPServer | None = None
    _thread: threading.Thread | None = None
    _lock: threading.Lock = field(default_factory=threading.Lock)

    @property
    def url(self) -> str:
        return f"http://{LOOPBACK}:{self.port}/hook"

    def _handler(self) -> type[BaseHTTPRequestHandler]:
        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def _answer(self) -> None:
                length = int(self.headers.get("Content-Length", "0"))
                body = self.rfile.read(length)
                if receiver.delay_s:
                    time.sleep(receiver.delay_s)
                with receiver._lock:
                    status = receiver.script.pop(0) if receiver.script else receiver.default_status
                    if 200 <= status < 300:  # record only what the receiver accepted
                        receiver.requests.append(
                            Received(self.command, self.path, dict(self.headers.items()), body)
                        )
                reply = b'{"ok": true}' if status < 300 else b'{"error": "scripted"}'
                try:
                    self.send_response(status)
                    self.send_header("Content-Type", "application/json")
                    self.send_header("Content-Length", str(len(reply)))
                    self.end_headers()
                    self.wfile.write(reply)
                except (BrokenPipeError, ConnectionResetError):
                    pass  # the client gave up waiting (the timeout test): expected

            do_POST = _answer
            do_PUT = _answer

            def log_message(self, format: str, *args: object) -> None:
                pass  # keep test output clean

        return Handler

    def up(self) -> None:
        server = ThreadingHTTPServer((LOOPBACK, self.port), self._handler())
        server.daemon_threads = True
        server.block_on_close = False
        self.port = int(server.server_address[1])
        self._server = server
        self._thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05})
        self._thread.daemon = True
        self._thread.start()

    def down(self) -> None:
        if self._server is not None:
            self._server.shutdown()
            self._server.server_close()
            assert self._thread is not None
            self._thread.join(timeout=5)
            self._server = None

    def keys(self) -> Counter[str]:
        return Counter(r.headers.get("X-Gasgap-Idempotency-Key", "") for r in self.requests)


@pytest.fixture
def http_receiver() -> Iterator[HttpReceiver]:
    receiver = HttpReceiver()
    receiver.up()
    yield receiver
    receiver.down()


# --- SMTP server ---------------------------------------------------------------------

SMTP_USER = "gasgap-relay"
SMTP_PASSWORD = "invented-password-for-tests"


class Recorder:
    """aiosmtpd handler keeping every accepted message, parsed; refuses on request."""

    def __init__(self) -> None:
        self.messages: list[EmailMessage] = []
        self.envelopes: list[Envelope] = []
        self.refuse_with: str | None = None

    async def handle_DATA(self, server: object, session: Session, envelope: Envelope) -> str:
        if self.refuse_with:
            return self.refuse_with
        content = envelope.original_content or b""
        self.envelopes.append(envelope)
        parsed = message_from_bytes(content, policy=policy.default)
        self.messages.append(parsed)  # type: ignore[arg-type]
        return "250 Message accepted for delivery"

    def keys(self) -> Counter[str]:
        return Counter(str(m["X-Gasgap-Idempotency-Key"]) for m in self.messages)


def _authenticator(
    server: object, session: Session, envelope: Envelope, mechanism: str, auth_data: object
) -> AuthResult:
    ok = (
        isinstance(auth_data, LoginPassword)
        and auth_data.login == SMTP_USER.encode()
        and auth_data.password == SMTP_PASSWORD.encode()
    )
    return AuthResult(success=ok, handled=False)


@dataclass
class SmtpPeer:
    recorder: Recorder
    port: int
    make: Callable[[int], Controller]
    controller: Controller | None = None

    def up(self) -> None:
        self.controller = self.make(self.port)
        self.controller.start()

    def down(self) -> None:
        if self.controller is not None:
            self.controller.stop()
            self.controller = None


def _smtp_peer(auth: bool, tls_context: ssl.SSLContext | None = None) -> SmtpPeer:
    recorder = Recorder()

    def make(port: int) -> Controller:
        if tls_context is not None:  # STARTTLS required, then AUTH (aiosmtpd's default)
            return Controller(
                recorder,
                hostname=LOOPBACK,
                port=port,
                tls_context=tls_context,
                require_starttls=True,
                authenticator=_authenticator,
                auth_required=auth,
            )
        if not auth:
            return Controller(recorder, hostname=LOOPBACK, port=port)
        return Controller(
            recorder,
            hostname=LOOPBACK,
            port=port,
            authenticator=_authenticator,
            auth_required=True,
            auth_require_tls=False,
        )

    return SmtpPeer(recorder, free_port(), make)


@pytest.fixture
def smtp_server() -> Iterator[SmtpPeer]:
    peer = _smtp_peer(auth=False)
    peer.up()
    yield peer
    peer.down()


#: aiosmtpd warns, on each connection, that AUTH without TLS is unsafe: true, and
#: acceptable on loopback in a test. Tests using ``smtp_auth_server`` carry this mark.
ALLOW_AUTH_WITHOUT_TLS = pytest.mark.filterwarnings(
    "ignore:Requiring AUTH while not requiring TLS:UserWarning"
)


@pytest.fixture
def smtp_auth_server() -> Iterator[SmtpPeer]:
    peer = _smtp_peer(auth=True)
    peer.up()
    yield peer
    peer.down()


@pytest.fixture(scope="session")
def loopback_certificate(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A throw-away self-signed certificate for 127.0.0.1 (key beside it as key.pem)."""
    openssl = shutil.which("openssl")
    if openssl is None:
        service_missing("openssl command", "needed to make a test certificate")
    directory = tmp_path_factory.mktemp("tls")
    cert, key = directory / "cert.pem", directory / "key.pem"
    subprocess.run(
        [str(openssl), "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "1",
         "-subj", "/CN=127.0.0.1", "-addext", "subjectAltName=IP:127.0.0.1",
         "-keyout", str(key), "-out", str(cert)],
        check=True, capture_output=True, timeout=60,
    )  # fmt: skip
    return cert


@pytest.fixture
def smtp_tls_server(loopback_certificate: Path) -> Iterator[SmtpPeer]:
    """SMTP on loopback that requires STARTTLS and then AUTH."""
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    context.load_cert_chain(loopback_certificate, loopback_certificate.parent / "key.pem")
    peer = _smtp_peer(auth=True, tls_context=context)
    peer.up()
    yield peer
    peer.down()


def email_options(port: int, **extra: object) -> dict[str, object]:
    options: dict[str, object] = {
        "type": "email",
        "host": LOOPBACK,
        "port": port,
        "starttls": False,
        "from_addr": "gasgap@hollowmere-general.example",
        "to": ["charge-nurse.icu-north@hollowmere-general.example"],
        "timeout_s": 5,
    }
    options.update(extra)
    return options
