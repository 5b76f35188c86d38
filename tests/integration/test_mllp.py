"""The MLLP listener over real loopback sockets (127.0.0.1 only), spoken to by a plain
socket client as a lab system would, with ACKs validated by hl7apy.

The listener runs on its own event loop in a thread; the client is blocking and every
read has a timeout, so no test can hang.
"""

import asyncio
import logging
import socket
import threading
import time
from collections.abc import Callable, Iterator
from datetime import UTC, datetime, timedelta, timezone

import pytest
from hl7apy.consts import VALIDATION_LEVEL
from hl7apy.parser import parse_message

from adapters.codes import CodeTable
from adapters.hl7v2 import Hl7Error, parse_oru
from adapters.hl7v2.mllp import AckDecision, MllpListener
from monitor.engine.model import Reading
from tests import hl7_samples as s

VT, FS, CR = b"\x0b", b"\x1c", b"\x0d"  # MLLP bytes, from the HL7 implementation guide
CODES = CodeTable.load()
TIMEOUT = 20.0


class Store:
    """Stands in for storage: the callback 'commits' by appending, then answers."""

    def __init__(self) -> None:
        self.readings: list[Reading] = []
        self.lock = threading.Lock()

    def __call__(self, raw: bytes) -> AckDecision:
        parsed = parse_oru(
            raw,
            received_at=datetime.now(UTC),
            codes=CODES,
            source_system="hgh-lab",
            site_tz=timezone(timedelta(hours=-7)),
            patient_id_system=s.MRN_SYSTEM,
        )
        with self.lock:
            self.readings.extend(parsed.readings)
        if parsed.rejected:
            return AckDecision("AE", "; ".join(map(str, parsed.rejected)))
        return AckDecision("AA")


class Running:
    def __init__(self, listener: MllpListener, loop: asyncio.AbstractEventLoop) -> None:
        self.listener = listener
        self.loop = loop

    @property
    def port(self) -> int:
        assert self.listener.port is not None
        return self.listener.port

    def stop(self) -> None:
        asyncio.run_coroutine_threadsafe(self.listener.stop(), self.loop).result(TIMEOUT)


@pytest.fixture
def serve() -> Iterator[Callable[..., Running]]:
    loop = asyncio.new_event_loop()
    thread = threading.Thread(target=loop.run_forever, daemon=True)
    thread.start()
    started: list[Running] = []

    def start(callback: Callable[[bytes], object], **kw: object) -> Running:
        listener = MllpListener(callback, host="127.0.0.1", port=0, **kw)  # type: ignore[arg-type]
        asyncio.run_coroutine_threadsafe(listener.start(), loop).result(TIMEOUT)
        running = Running(listener, loop)
        started.append(running)
        return running

    yield start
    for running in started:
        running.stop()
    loop.call_soon_threadsafe(loop.stop)
    thread.join(TIMEOUT)
    loop.close()


def connect(port: int) -> socket.socket:
    sock = socket.create_connection(("127.0.0.1", port), timeout=TIMEOUT)
    sock.settimeout(TIMEOUT)
    return sock


def read_ack(sock: socket.socket, buffer: bytearray) -> bytes:
    """One framed ACK, unwrapped; ``buffer`` keeps bytes of the next one."""
    deadline = time.monotonic() + TIMEOUT
    while FS + CR not in buffer:
        assert time.monotonic() < deadline, "no ACK in time"
        chunk = sock.recv(65536)
        assert chunk, "connection closed before the ACK"
        buffer += chunk
    end = buffer.index(FS + CR)
    frame_bytes = bytes(buffer[:end])
    del buffer[: end + 2]
    assert frame_bytes.startswith(VT)
    return frame_bytes[1:]


def exchange(port: int, message: bytes) -> object:
    with connect(port) as sock:
        sock.sendall(VT + message + FS + CR)
        return validated(read_ack(sock, bytearray()))


def validated(ack: bytes) -> object:
    message = parse_message(
        ack.decode(), validation_level=VALIDATION_LEVEL.STRICT, find_groups=True
    )
    message.validate()
    return message


def test_aa_comes_after_the_callback_has_stored_the_readings(serve, caplog) -> None:  # noqa: ANN001
    caplog.set_level(logging.INFO, logger="gasgap.hl7v2.mllp")
    store = Store()
    running = serve(store)
    ack = exchange(running.port, s.ABG_251.encode())
    assert ack.msa.msa_1.to_er7() == "AA" and ack.msa.msa_2.to_er7() == "HGH0001"
    assert len(store.readings) == 5  # stored before the ACK was sent
    assert "HGH0001" in caplog.text and "HM100234" not in caplog.text  # no patient id in logs


def test_a_broken_message_gets_ae_with_the_reason(serve) -> None:  # noqa: ANN001
    running = serve(Store())
    ack = exchange(running.port, s.MIXED.encode())
    assert ack.msa.msa_1.to_er7() == "AE"
    assert "OBX[3]-5" in ack.msa.msa_3.to_er7() and "OBX[3]-5" in ack.err.err_8.to_er7()
    garbled = exchange(
        running.port, b"MSH|^~\\&|HGH-LAB|H|GASGAP|H|x||ORU^R01^ORU_R01|Q1|P|2.5.1\rPID|\xff\xfe\r"
    )
    assert garbled.msa.msa_1.to_er7() == "AE" and garbled.msa.msa_2.to_er7() == "Q1"
    assert "UTF-8" in garbled.err.err_8.to_er7()


def test_an_adt_message_is_rejected_with_ar(serve) -> None:  # noqa: ANN001
    running = serve(Store())
    ack = exchange(running.port, s.ADT_A01.encode())
    assert ack.msa.msa_1.to_er7() == "AR" and ack.err.err_3.err_3_1.to_er7() == "200"


def test_many_messages_on_one_connection_are_answered_in_order(serve) -> None:  # noqa: ANN001
    store = Store()
    running = serve(store)
    ids = [f"HGH{i:04d}" for i in range(30)]
    with connect(running.port) as sock:
        sock.sendall(b"".join(VT + s.abg(cid).encode() + FS + CR for cid in ids))
        buffer = bytearray()
        answered = [validated(read_ack(sock, buffer)).msa.msa_2.to_er7() for _ in ids]
    assert answered == ids and len(store.readings) == 5 * len(ids)


def test_a_frame_split_into_small_pieces_is_one_message(serve) -> None:  # noqa: ANN001
    running = serve(Store())
    data = VT + s.ABG_251.encode() + FS + CR
    with connect(running.port) as sock:
        for i in range(0, len(data), 7):
            sock.sendall(data[i : i + 7])
            time.sleep(0.002)
        assert validated(read_ack(sock, bytearray())).msa.msa_1.to_er7() == "AA"


def test_a_50_mb_message_is_refused_and_the_connection_stays_usable(serve) -> None:  # noqa: ANN001
    store = Store()
    running = serve(store)
    head = s.msh("HUGE1").encode() + b"\r"
    huge = head + b"NTE|1||" + b"x" * (50 * 1024 * 1024) + b"\r"
    with connect(running.port) as sock:
        sock.sendall(VT + huge + FS + CR)
        buffer = bytearray()
        refused = validated(read_ack(sock, buffer))
        assert refused.msa.msa_1.to_er7() == "AE" and refused.msa.msa_2.to_er7() == "HUGE1"
        assert "limit" in refused.err.err_8.to_er7()
        sock.sendall(VT + s.ABG_251.encode() + FS + CR)
        assert validated(read_ack(sock, buffer)).msa.msa_1.to_er7() == "AA"
    assert len(store.readings) == 5


def test_an_unforeseen_callback_exception_is_ar_without_its_text(serve) -> None:  # noqa: ANN001
    calls: list[int] = []

    def failing(raw: bytes) -> AckDecision:
        calls.append(1)
        if len(calls) == 1:
            raise RuntimeError("secret detail from deep inside, see https://example.invalid")
        return AckDecision("AA")

    running = serve(failing)
    first = exchange(running.port, s.ABG_251.encode())
    # Nothing could keep it: AR (HL7 v2 Table 0008: the receiver could not process it;
    # senders retry), never an AE that would have it dropped.
    assert first.msa.msa_1.to_er7() == "AR"
    assert "secret" not in first.to_er7() and "http" not in first.to_er7()
    assert exchange(running.port, s.ABG_251.encode()).msa.msa_1.to_er7() == "AA"


def test_a_storage_outage_is_ar_207_without_the_driver_text(
    serve,
    tmp_path,
    monkeypatch,  # noqa: ANN001
) -> None:
    import sqlite3

    from storage import db as storage_db

    # A real lock: another process's writer (a plain sqlite3 connection) holds the file,
    # and storage waits 50 ms for it instead of the service's 10 s.
    monkeypatch.setattr(storage_db, "SQLITE_BUSY_TIMEOUT_MS", 50)
    url = f"sqlite:///{tmp_path / 'gasgap.db'}"
    database = storage_db.open_database(url)
    holder = sqlite3.connect(tmp_path / "gasgap.db", isolation_level=None)
    holder.execute("BEGIN IMMEDIATE")

    def locked(raw: bytes) -> AckDecision:
        with database.begin() as conn:
            conn.exec_driver_sql("DELETE FROM readings")
        return AckDecision("AA")

    kept: list[bytes] = []
    running = serve(locked, on_refused=lambda raw, reason: kept.append(raw))
    ack = exchange(running.port, s.ABG_251.encode())
    er7 = ack.to_er7()
    assert ack.msa.msa_1.to_er7() == "AR" and ack.err.err_3.err_3_1.to_er7() == "207"
    assert "locked" not in er7 and "DELETE" not in er7 and "sqlite" not in er7
    assert kept == []  # an outage is not the message's fault: nothing quarantined
    holder.execute("ROLLBACK")
    holder.close()
    database.dispose()


def test_an_unforeseen_failure_is_kept_and_answered_ae(serve) -> None:  # noqa: ANN001
    def broken(raw: bytes) -> AckDecision:
        raise RecursionError("maximum recursion depth exceeded")

    kept: list[tuple[bytes, str]] = []
    running = serve(broken, on_refused=lambda raw, reason: kept.append((raw, reason)))
    ack = exchange(running.port, s.ABG_251.encode())
    assert ack.msa.msa_1.to_er7() == "AE"
    assert kept and kept[0][0] == s.ABG_251.encode() and "RecursionError" in kept[0][1]


def test_an_oversized_message_is_ae_and_its_head_kept(serve) -> None:  # noqa: ANN001
    kept: list[tuple[bytes, str]] = []
    running = serve(
        Store(),
        max_message_bytes=100_000,
        on_refused=lambda raw, reason: kept.append((raw, reason)),
    )
    big = s.msh("BIG1").encode() + b"\r" + b"NTE|1||" + b"y" * 200_000 + b"\r"
    with connect(running.port) as sock:
        sock.sendall(VT + big + FS + CR)
        ack = validated(read_ack(sock, bytearray()))
    assert ack.msa.msa_1.to_er7() == "AE" and ack.msa.msa_2.to_er7() == "BIG1"
    assert len(kept) == 1 and kept[0][0].startswith(b"MSH|") and len(kept[0][0]) <= 65536
    assert "limit" in kept[0][1]


def _connect_from(address: str, port: int) -> socket.socket:
    """A connection from another loopback address (all of 127/8 is loopback on Linux),
    standing for another sender."""
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.settimeout(TIMEOUT)
    sock.bind((address, 0))
    sock.connect(("127.0.0.1", port))
    return sock


def test_one_address_cannot_take_every_connection(serve) -> None:  # noqa: ANN001
    running = serve(Store(), max_connections=16, max_connections_per_peer=4)
    hogs = []
    try:
        for _ in range(12):  # one misbehaving sender on 127.0.0.2 opens many, sends bytes
            hog = _connect_from("127.0.0.2", running.port)
            hogs.append(hog)
        time.sleep(0.3)
        closed = 0
        for hog in hogs:
            hog.settimeout(0.5)
            try:
                if hog.recv(10) == b"":
                    closed += 1
            except TimeoutError:
                pass
        assert closed == 8  # refused beyond four
        # the lab, from 127.0.0.1, is still let in and answered (exchange's own deadline
        # bounds the wait; how fast is the benchmark's business, not a test's)
        ack = exchange(running.port, s.abg("PEER1").encode())
        assert ack.msa.msa_1.to_er7() == "AA"  # type: ignore[attr-defined]
    finally:
        for hog in hogs:
            hog.close()


def test_a_trickling_sender_is_cut_off_at_the_message_deadline(serve) -> None:  # noqa: ANN001
    running = serve(Store(), message_deadline=0.6, read_timeout=30)
    with connect(running.port) as slow:
        slow.sendall(VT + b"MSH|^~\\&|")
        started = time.monotonic()
        for _ in range(20):  # a byte every 0.1 s: never idle, never finished
            try:
                slow.sendall(b"x")
            except OSError:
                break
            time.sleep(0.1)
        slow.settimeout(5)
        try:
            assert slow.recv(100) == b""  # closed, no ACK: the sender resends
        except ConnectionResetError:
            pass
        assert time.monotonic() - started < 5
        # Meanwhile and afterwards, others are answered.
        assert exchange(running.port, s.abg("TRK1").encode()).msa.msa_1.to_er7() == "AA"


def test_an_async_callback_and_an_hl7error_from_it(serve) -> None:  # noqa: ANN001
    async def callback(raw: bytes) -> AckDecision:
        await asyncio.sleep(0)
        if b"ADT^" in raw:
            raise Hl7Error("MSH-9: not taken here", "AR", "200")
        return AckDecision("AA", "")

    running = serve(callback)
    assert exchange(running.port, s.ABG_251.encode()).msa.msa_1.to_er7() == "AA"
    assert exchange(running.port, s.ADT_A01.encode()).msa.msa_1.to_er7() == "AR"


def test_stop_finishes_the_message_in_hand(serve) -> None:  # noqa: ANN001
    started = threading.Event()

    def slow(raw: bytes) -> AckDecision:
        started.set()
        time.sleep(0.5)
        return AckDecision("AA")

    running = serve(slow)
    with connect(running.port) as sock:
        sock.sendall(VT + s.ABG_251.encode() + FS + CR)
        assert started.wait(TIMEOUT)
        stopper = threading.Thread(target=running.stop)
        stopper.start()
        assert validated(read_ack(sock, bytearray())).msa.msa_1.to_er7() == "AA"
        stopper.join(TIMEOUT)
    with pytest.raises(OSError):  # no longer listening
        connect(running.port).close()


def test_an_idle_connection_is_closed_after_the_read_timeout(serve) -> None:  # noqa: ANN001
    running = serve(Store(), read_timeout=0.2)
    with connect(running.port) as sock:
        assert sock.recv(10) == b""  # closed by the listener, not by us


def test_connections_beyond_the_limit_are_refused_and_the_others_still_answered(
    serve,  # noqa: ANN001
) -> None:
    running = serve(Store(), max_connections=2)
    held = [connect(running.port), connect(running.port)]
    try:
        # A third connection is closed at once, without an answer.
        with connect(running.port) as extra:
            assert extra.recv(10) == b""
        # The two held connections are still served.
        for sock in held:
            sock.sendall(VT + s.abg("LIM1").encode() + FS + CR)
            assert validated(read_ack(sock, bytearray())).msa.msa_1.to_er7() == "AA"
    finally:
        for sock in held:
            sock.close()
    # Once they are gone, a new connection is taken again.
    deadline = time.monotonic() + TIMEOUT
    while True:
        try:
            ack = exchange(running.port, s.abg("LIM2").encode())
            assert ack.msa.msa_1.to_er7() == "AA"  # type: ignore[attr-defined]
            break
        except (AssertionError, ConnectionError):
            if time.monotonic() > deadline:
                raise
            time.sleep(0.05)


def test_mllp_over_tls_with_a_self_signed_certificate(serve, tmp_path) -> None:  # noqa: ANN001
    import shutil
    import ssl
    import subprocess

    from tests.conftest import service_missing

    if shutil.which("openssl") is None:
        service_missing("openssl", "needed to make a throwaway test certificate")
    cert, key = tmp_path / "cert.pem", tmp_path / "key.pem"
    subprocess.run(
        [
            "openssl",
            "req",
            "-x509",
            "-newkey",
            "rsa:2048",
            "-nodes",
            "-days",
            "1",
            "-subj",
            "/CN=127.0.0.1",
            "-addext",
            "subjectAltName=IP:127.0.0.1",
            "-keyout",
            str(key),
            "-out",
            str(cert),
        ],
        check=True,
        capture_output=True,
        timeout=60,
    )
    server_ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    server_ctx.load_cert_chain(cert, key)
    client_ctx = ssl.create_default_context(cafile=str(cert))
    running = serve(Store(), ssl=server_ctx)
    with (
        connect(running.port) as raw_sock,
        client_ctx.wrap_socket(raw_sock, server_hostname="127.0.0.1") as sock,
    ):
        sock.sendall(VT + s.ABG_251.encode() + FS + CR)
        assert validated(read_ack(sock, bytearray())).msa.msa_1.to_er7() == "AA"  # type: ignore[arg-type]
