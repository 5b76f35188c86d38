"""Hostile input on the ways in: the MLLP listener of a real ``gasgap serve`` process
on a real socket, and files through ``monitor.ingest.ingest_files``.

The parsers' own fuzz tests (tests/unit/adapters/test_hl7_fuzz.py, test_fhir_*.py)
check that parsing never raises anything but its own error. These go one layer out:
- over MLLP, between two good messages on one connection, a mutated frame, garbage,
  stray framing bytes, a frame split at random byte boundaries: the service never
  crashes or hangs, every answer is AA, AE or AR and every AE/AR says why (MSA-3, as
  HL7 v2.5.1 section 2.14.8 intends for the text message), and the good messages
  around the garbage are ACKed AA and stored (checked in the database);
- oversized messages (AE, the connection stays usable), and slowloris-style partial
  frames held open or closed early: the listener keeps answering others;
- files with mutated NDJSON lines and mutated HL7 messages between good ones: every
  line that is not JSON is quarantined with a reason naming its line; every good item
  is stored.
Every patient and value is invented (Hollowmere, MRN system urn:oid:2.999.1.1.1).
"""

from __future__ import annotations

import itertools
import json
import socket
import struct
import time
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests import fhir_samples as fs
from tests.reliability.helpers import (
    CR,
    EB,
    SB,
    Receiver,
    ServiceProcess,
    count_rows,
    free_port,
    gas,
    minutes_ago,
    site_toml,
    stored_control_ids,
)

MAX_MESSAGE_BYTES = 4096
_ids = itertools.count(1)
HL7_BYTES = b"|^~\\&\r\n0123456789.-+ %[]AZFCPWXUDIOBNSVMH\x00\xff\xc3" + SB + EB


_FIRST_DRAW = datetime.now(UTC) - timedelta(days=3)


def _good(prefix: str = "GD") -> tuple[str, bytes]:
    """A good gas, drawn a minute after the one before (a lab sends in draw order)."""
    n = next(_ids)
    control = f"{prefix}{n:05d}"
    text = gas(
        control,
        f"HM44{n % 7:04d}",
        f"F-{control}",
        pao2=80,
        fio2_percent=30,
        drawn=_FIRST_DRAW + timedelta(minutes=n),
        unit="Ward-5B",
    )
    return control, text.encode()


SEED_TEXT = _good("SEED")[1]


@st.composite
def mutated_bytes(draw: st.DrawFn, alphabet: bytes = HL7_BYTES) -> bytes:
    """A good message, then 1-8 byte-level edits: insert, delete, replace, truncate,
    duplicate a stretch, or bytes from the HL7 alphabet and the framing bytes."""
    data = bytearray(SEED_TEXT)
    for _ in range(draw(st.integers(1, 8))):
        pos = draw(st.integers(0, len(data)))
        action = draw(st.sampled_from(["insert", "delete", "replace", "truncate", "dup"]))
        chunk = bytes(draw(st.lists(st.sampled_from(alphabet), min_size=1, max_size=6)))
        if action == "insert":
            data[pos:pos] = chunk
        elif action == "delete":
            del data[pos : pos + draw(st.integers(1, 40))]
        elif action == "replace":
            data[pos : pos + len(chunk)] = chunk
        elif action == "truncate":
            del data[pos:]
        else:
            data[pos:pos] = data[pos : pos + draw(st.integers(1, 80))]
    return bytes(data)


def _frames(buffer: bytearray) -> Iterator[bytes]:
    while EB + CR in buffer:
        frame, _, rest = bytes(buffer).partition(EB + CR)
        buffer[:] = rest
        yield frame.lstrip(SB)


def _msa(ack: bytes) -> tuple[str, str, str]:
    """(MSA-1 code, MSA-2 control id, MSA-3 text) of an ACK."""
    segments = [s for s in ack.decode("utf-8", "replace").split("\r") if s]
    sep = segments[0][3]
    fields = next(s for s in segments if s.startswith("MSA")).split(sep) + ["", "", ""]
    return fields[1], fields[2], fields[3]


def _exchange(
    port: int,
    pieces: list[bytes],
    wait_for: str,
    timeout: float = 15.0,
) -> list[tuple[str, str, str]]:
    """Send ``pieces`` (one write each) on one connection; read ACKs until the one whose
    MSA-2 is ``wait_for`` arrives. Fails on timeout: the listener must not hang."""
    answers: list[tuple[str, str, str]] = []
    buffer = bytearray()
    deadline = time.monotonic() + timeout
    with socket.create_connection(("127.0.0.1", port), timeout=timeout) as sock:
        for piece in pieces:
            sock.sendall(piece)
        while True:
            sock.settimeout(max(0.1, deadline - time.monotonic()))
            try:
                chunk = sock.recv(65536)
            except TimeoutError:
                raise AssertionError(
                    f"no ACK for {wait_for} in {timeout}s; got {answers}"
                ) from None
            if not chunk:
                raise AssertionError(f"connection closed before the ACK for {wait_for}: {answers}")
            buffer += chunk
            for frame in _frames(buffer):
                answers.append(_msa(frame))
            if any(a[1] == wait_for for a in answers):
                return answers


def _check_answers(answers: list[tuple[str, str, str]], good: set[str]) -> None:
    for code, control, text in answers:
        assert code in ("AA", "AE", "AR"), (code, control, text)
        if code != "AA":
            assert text.strip(), f"{code} for {control!r} without a reason"
        if control in good:
            assert code == "AA", (control, code, text)


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[ServiceProcess, int, str]]:
    tmp = tmp_path_factory.mktemp("hostile")
    receiver = Receiver()
    receiver.start()
    http_port, mllp_port = free_port(), free_port()
    db_url = f"sqlite:///{tmp}/gasgap.db"
    text = site_toml(
        db_url=db_url, http_port=http_port, mllp_port=mllp_port, webhook_url=receiver.url
    )
    text = text.replace(
        f"port = {mllp_port}\n",
        f"port = {mllp_port}\nmax_message_bytes = {MAX_MESSAGE_BYTES}\n"
        # above the 150 held connections below; the cap itself is
        # tested in tests/integration/test_mllp.py
        "max_connections = 200\n",
    )
    config = tmp / "site.toml"
    config.write_text(text)
    service = ServiceProcess(config, http_port, tmp / "service.log")
    service.start()
    try:
        yield service, mllp_port, db_url
        assert service.process is not None and service.process.poll() is None, (
            "the service died under hostile input:\n" + service.log_text()[-3000:]
        )
    finally:
        service.kill()
        receiver.stop()


GOOD_SENT: set[str] = set()


@pytest.mark.slow
@settings(
    max_examples=1000,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
@given(bad=mutated_bytes(), framed=st.booleans(), garbage=st.binary(max_size=64), data=st.data())
def test_mutated_frames_between_good_messages(
    served: tuple[ServiceProcess, int, str],
    bad: bytes,
    framed: bool,
    garbage: bytes,
    data: st.DataObject,
) -> None:
    _service, port, _db = served
    before, first = _good()
    after, last = _good()
    hostile = (SB + bad + EB + CR) if framed else bad
    stream = SB + first + EB + CR + garbage + hostile + SB + last + EB + CR
    # Split the whole stream at random byte boundaries (one write each).
    cuts = sorted(data.draw(st.lists(st.integers(1, len(stream) - 1), max_size=6, unique=True)))
    pieces = [stream[a:b] for a, b in zip([0, *cuts], [*cuts, len(stream)], strict=True)]
    answers = _exchange(port, pieces, wait_for=after)
    _check_answers(answers, {before, after})
    assert [a[1] for a in answers if a[1] in (before, after)] == [before, after]
    GOOD_SENT.update((before, after))


@pytest.mark.slow
def test_good_messages_around_the_garbage_were_all_stored(
    served: tuple[ServiceProcess, int, str],
) -> None:
    service, port, db_url = served
    if not GOOD_SENT:  # run alone: a few rounds of garbage first
        for junk in (b"\x00" * 50, SB + b"MSH|^~\\&|" + EB + CR, SB + b"\xff\xfe" * 30 + EB + CR):
            before, first = _good()
            after, last = _good()
            answers = _exchange(port, [SB + first + EB + CR + junk + SB + last + EB + CR], after)
            _check_answers(answers, {before, after})
            GOOD_SENT.update((before, after))
    stored = stored_control_ids(db_url)
    wrong = {c: stored.get(c, 0) for c in GOOD_SENT if stored.get(c, 0) != 3}
    assert not wrong, f"good messages not stored once: {list(wrong.items())[:10]}"
    assert count_rows(db_url, "quarantine") > 0, "refused messages are kept for review"
    assert service.process is not None and service.process.poll() is None


def test_oversized_messages_get_ae_and_the_connection_stays_usable(
    served: tuple[ServiceProcess, int, str],
) -> None:
    _service, port, db_url = served
    control, good = _good()
    big_control, big = _good("BIG")
    padding = b"\rNTE|1||" + b"x" * (MAX_MESSAGE_BYTES + 500)
    answers = _exchange(port, [SB + big + padding + EB + CR, SB + good + EB + CR], control)
    by_id = {a[1]: a for a in answers}
    assert by_id[big_control][0] == "AE" and by_id[big_control][2], answers
    assert by_id[control][0] == "AA"
    # Oversized and never finished, then closed: nothing hangs, the next one is taken.
    with socket.create_connection(("127.0.0.1", port), timeout=10) as sock:
        sock.sendall(SB + big + b"y" * (3 * MAX_MESSAGE_BYTES))
    control2, good2 = _good()
    assert _exchange(port, [SB + good2 + EB + CR], control2)[-1][0] == "AA"
    assert stored_control_ids(db_url)[control] == 3
    assert big_control not in stored_control_ids(db_url)


def _reset(sock: socket.socket) -> None:
    """Close with RST (SO_LINGER 0), as a crashed sender's host would."""
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
    sock.close()


@pytest.mark.slow
def test_slow_and_abandoned_partial_frames_do_not_block_others(
    served: tuple[ServiceProcess, int, str],
) -> None:
    _service, port, db_url = served
    held: list[socket.socket] = []
    try:
        for i in range(150):  # bounded: 150 loopback connections, each a few bytes
            # from 30 loopback addresses (all of 127/8 is loopback on Linux), five each:
            # under the per-address cap of 8, so they stay open and fill the listener
            sock = socket.create_connection(
                ("127.0.0.1", port), timeout=10, source_address=(f"127.0.0.{2 + i % 30}", 0)
            )
            partial = SB + _good()[1][: 5 + i % 200]
            sock.sendall(partial[: 1 + i % len(partial)])
            held.append(sock)
        started = time.monotonic()
        control, good = _good()
        assert _exchange(port, [SB + good + EB + CR], control, timeout=10)[-1][0] == "AA"
        assert time.monotonic() - started < 10
        # Half vanish with a reset, half close politely mid-frame.
        for i, sock in enumerate(held):
            if i % 2:
                _reset(sock)
            else:
                sock.close()
        held.clear()
        # A sender dribbling one byte at a time is still read as one message.
        control2, good2 = _good()
        frame = SB + good2 + EB + CR
        answers = _exchange(port, [frame[i : i + 1] for i in range(len(frame))], control2)
        assert answers[-1][:2] == ("AA", control2)
    finally:
        for sock in held:
            sock.close()
    assert stored_control_ids(db_url)[control] == 3


# --- files through gasgap ingest --------------------------------------------------------------


def _ingest(path: Path) -> tuple[Any, list[str], str]:
    """Ingest one file into a fresh SQLite database beside it: (report, the
    quarantine's reasons, the database URL)."""
    from monitor.ingest import SourceContext, ingest_files
    from monitor.pipeline import Pipeline
    from storage.db import open_database
    from storage.quarantine import list_quarantine

    url = f"sqlite:///{path.with_suffix('.db')}"
    db = open_database(url)
    try:
        report = ingest_files(
            [path],
            Pipeline(db),
            SourceContext(patient_id_system=fs.MRN_SYSTEM),
            now=lambda: datetime.now(UTC),
        )
        with db.begin(read_only=True) as conn:
            reasons = [q.reason for q in list_quarantine(conn, limit=100_000)]
    finally:
        db.dispose()
    return report, reasons, url


def _observation(oid: str, value: float, when: datetime) -> dict[str, Any]:
    return fs.quantity_obs(
        oid, "2703-7", value, "mm[Hg]", pid="hg-fz-1", eid=None, when=when.isoformat(), version="1"
    )


NDJSON_BYTES = b'{}[]":,0123456789.-eE truefalsn\\u"ab\x00\xff\t\r'


@st.composite
def mutated_line(draw: st.DrawFn) -> bytes:
    line = bytearray(json.dumps(_observation("mut-x", 77, minutes_ago(90))).encode())
    for _ in range(draw(st.integers(1, 5))):
        pos = draw(st.integers(0, len(line)))
        chunk = bytes(draw(st.lists(st.sampled_from(NDJSON_BYTES), min_size=1, max_size=4)))
        if draw(st.booleans()):
            line[pos:pos] = chunk
        else:
            del line[pos : pos + draw(st.integers(1, 30))]
    return bytes(line).replace(b"\n", b" ")


def _stdlib_json_object(line: bytes) -> bool:
    try:
        return isinstance(json.loads(line.decode("utf-8")), dict)
    except (UnicodeDecodeError, ValueError):
        return False


@pytest.mark.slow
@settings(
    max_examples=80,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(bad=st.lists(mutated_line(), min_size=1, max_size=6))
def test_mutated_ndjson_lines_are_quarantined_and_good_lines_stored(
    tmp_path: Path,
    bad: list[bytes],
) -> None:
    n = next(_ids)
    when = datetime.now(UTC) - timedelta(hours=2)
    lines = [json.dumps(fs.patient("hg-fz-1", mrn="HM450001")).encode()]
    good_ids = []
    for i, junk in enumerate(bad):
        oid = f"ok-{n}-{i}"
        good_ids.append(oid)
        lines += [json.dumps(_observation(oid, 70 + i, when + timedelta(minutes=i))).encode(), junk]
    path = tmp_path / f"feed-{n}.ndjson"
    path.write_bytes(b"\n".join(lines) + b"\n")
    _report, reasons, url = _ingest(path)
    for number, line in enumerate(lines, start=1):
        if line.strip() and not _stdlib_json_object(line.strip()):
            assert any(f"{path.name} line {number}:" in r for r in reasons), (number, line, reasons)
    stored = _delivery_ids(url)
    for oid in good_ids:
        assert any(oid in d for d in stored), (oid, reasons)


def _delivery_ids(url: str) -> list[str]:
    import sqlalchemy as sa

    from storage.tables import readings

    engine = sa.create_engine(url)
    try:
        with engine.connect() as conn:
            return list(conn.execute(sa.select(readings.c.delivery_id)).scalars())
    finally:
        engine.dispose()


@pytest.mark.slow
@settings(
    max_examples=50,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(
    bad=st.lists(
        mutated_bytes(alphabet=HL7_BYTES.replace(SB, b"").replace(EB, b"")), min_size=1, max_size=5
    )
)
def test_mutated_hl7_messages_in_a_file_are_quarantined_and_good_ones_stored(
    tmp_path: Path,
    bad: list[bytes],
) -> None:
    good: list[str] = []
    parts: list[bytes] = []
    for junk in bad:
        control, text = _good("FL")
        good.append(control)
        parts += [text, junk]
    path = tmp_path / f"feed-{next(_ids)}.hl7"
    # Blank lines between messages (a layout the file reader accepts), so a mutant
    # that lost its MSH cannot glue itself onto the good message before it.
    path.write_bytes(b"\r\n".join(parts) + b"\r\n")
    _report, reasons, url = _ingest(path)
    # Each refusal says where: the file (message-level refusals) or the message and
    # OBX (result-level refusals, "message <control id> OBX[n]: ...").
    assert all(path.name in r or r.startswith("message ") for r in reasons), reasons
    assert all(len(r) > len(path.name) + 10 for r in reasons), reasons
    stored = stored_control_ids(url)
    missing = {c: stored.get(c, 0) for c in good if stored.get(c, 0) != 3}
    assert not missing, (missing, reasons)


# --- coverage-guided fuzzing (optional tooling) -----------------------------------------------


@pytest.mark.slow
@pytest.mark.timeout(180)
def test_atheris_run_over_the_hl7_and_fhir_readers(tmp_path: Path) -> None:
    """A bounded libFuzzer run of tests/reliability/fuzz_atheris.py (optional: atheris
    is not a project dependency, so without it this test is skipped, not failed)."""
    import importlib.util
    import subprocess
    import sys

    if importlib.util.find_spec("atheris") is None:
        pytest.skip("atheris is not installed (optional fuzzing tool: pip install atheris)")
    harness = Path(__file__).with_name("fuzz_atheris.py")
    corpus = tmp_path / "corpus"
    repo = str(Path(__file__).resolve().parents[2])
    seeded = subprocess.run(
        [sys.executable, str(harness), "--seeds", str(corpus)],
        cwd=repo,
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert seeded.returncode == 0, seeded.stderr
    run = subprocess.run(
        [
            sys.executable,
            str(harness),
            "-runs=40000",
            "-max_total_time=40",
            "-seed=20261202",
            f"-artifact_prefix={tmp_path}/",
            "-print_final_stats=1",
            str(corpus),
        ],
        cwd=repo,
        capture_output=True,
        text=True,
        timeout=150,
    )
    crashes = sorted(
        p.name for p in tmp_path.iterdir() if p.name.startswith(("crash-", "timeout-"))
    )
    assert run.returncode == 0 and not crashes, (crashes, run.stderr[-4000:])
    assert "Done" in run.stderr, run.stderr[-2000:]
