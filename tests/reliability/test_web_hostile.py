"""The board and API of a real ``gasgap serve`` process under hostile requests and
hostile data.

- Missing, wrong, truncated, over-long, non-ASCII and wrong-scheme credentials are
  refused (401, or the board's login redirect), never a 500 and never data; a forged
  board cookie does not log in; an acknowledgement without a login changes nothing.
- Strings from the feed that look like markup or template syntax (patient key,
  display, unit, room and bed carrying ``<script>``, quotes and ``{{ }}``) come out
  of every page as text: escaped per the HTML standard's rules for text and
  attribute values (``<`` as ``&lt;``, quotes as ``&#34;``/``&quot;`` or ``&#39;``),
  and ``{{ 7*7 }}`` shown as written, never evaluated.
- Oversized requests get 413 (RFC 9110 section 15.5.14), with a Content-Length, with
  a chunked body that has none, and with a Content-Length that only claims a size.
The patients are invented (Hollowmere); the hostile strings are made up for the test.
"""

from __future__ import annotations

import base64
import socket
import time
from collections.abc import Iterator
from contextlib import contextmanager
from urllib.parse import quote

import httpx
import pytest

from tests import hl7_samples as h
from tests.reliability.helpers import (
    API_TOKEN,
    BOARD_TOKEN,
    MllpSession,
    Receiver,
    ServiceProcess,
    free_port,
    minutes_ago,
    site_toml,
)

SCRIPT = "<script>alert(1)</script>"
MRN = "HM<script>alert(1)</script>"
UNIT = 'Ward"><img src=x onerror=alert(2)>'
ROOM = "{{ 7*7 }}"
BED = "'};alert(3);//"
RAW_MARKUP = ("<script>alert(", "<img src=x", "onerror=alert(2)>")
AUTH = {"Authorization": f"Bearer {API_TOKEN}"}
MAX_BYTES = 65536  # the test site's http.max_request_bytes


def _hostile_gas() -> str:
    when = minutes_ago(20).strftime("%Y%m%d%H%M+0000")
    return h.message(
        h.msh("WEB0001", when=when),
        h.pid(MRN),
        h.segment("PV1", {1: "1", 2: "I", 3: f"{UNIT}^{ROOM}^{BED}"}),
        h.obr("F-WEB-0001", collected=when),
        h.obx(1, "2703-7", "50", "mm[Hg]", text="PO2 arterial"),
        h.obx(2, "2019-8", "40", "mm[Hg]", text="PCO2 arterial"),
        h.obx(3, "3150-0", "60", "%", text="Inhaled O2 concentration"),
        h.spm(),
    )


@pytest.fixture(scope="module")
def web(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    tmp = tmp_path_factory.mktemp("web")
    receiver = Receiver()
    receiver.start()
    http_port, mllp_port = free_port(), free_port()
    config = tmp / "site.toml"
    config.write_text(
        site_toml(
            db_url=f"sqlite:///{tmp}/gasgap.db",
            http_port=http_port,
            mllp_port=mllp_port,
            webhook_url=receiver.url,
        )
    )
    service = ServiceProcess(config, http_port, tmp / "service.log")
    service.start()
    try:
        session = MllpSession(mllp_port)
        assert session.send(_hostile_gas()) == "AA"
        session.close()
        yield service.base
        assert service.process is not None and service.process.poll() is None
    finally:
        service.kill()
        receiver.stop()


@contextmanager
def _board(base: str) -> Iterator[httpx.Client]:
    """A client logged in to the board by the wall-screen link."""
    with httpx.Client(base_url=base, timeout=10) as client:
        response = client.get("/board", params={"token": BOARD_TOKEN})
        assert response.status_code == 303
        yield client


# --- credentials ---------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "header",
    [
        None,
        "",
        "Bearer",
        "Bearer not-the-token",
        f"Bearer {API_TOKEN[:-1]}",
        f"Bearer {API_TOKEN}x",
        f"Bearer {API_TOKEN[1:]}",
        f"Basic {API_TOKEN}",
        f"Token {API_TOKEN}",
        "Bearer " + "A" * 8000,
        "Bearer " + API_TOKEN.upper(),
        "Basic " + base64.b64encode(f"user:{API_TOKEN}".encode()).decode(),
    ],
    ids=lambda v: "none" if v is None else repr(v)[:30],
)
def test_api_refuses_every_wrong_credential(web: str, header: str | None) -> None:
    headers = {} if header is None else {"Authorization": header}
    for method, path in (
        ("GET", "/api/flags"),
        ("GET", "/api/patients"),
        ("POST", "/api/flags/x/acknowledge"),
    ):
        response = httpx.request(
            method,
            web + path,
            headers=headers,
            timeout=10,
            json={"by": "Intruder"} if method == "POST" else None,
        )
        assert response.status_code == 401, (method, path, response.status_code)
        assert "flags" not in response.text and "HM" not in response.text


def test_api_refuses_non_ascii_and_control_bytes_in_the_token(web: str) -> None:
    # Raw header bytes (httpx refuses to send non-ASCII header text itself).
    for raw in (
        "Bearer tökén".encode("latin-1"),
        b"Bearer \xff\xfe\x00x",
        b"Bearer \t\t",
        b"Bearer ",
        b"Bearer  " + API_TOKEN.encode() + b"\x00",
    ):
        with socket.create_connection(("127.0.0.1", int(web.rsplit(":", 1)[1])), timeout=10) as s:
            s.sendall(
                b"GET /api/flags HTTP/1.1\r\nHost: 127.0.0.1\r\nAuthorization: "
                + raw
                + b"\r\nConnection: close\r\n\r\n"
            )
            answer = _read_all(s)
        status = int(answer.split(b" ", 2)[1])
        assert status in (400, 401), answer[:200]


def test_the_right_token_opens_the_api(web: str) -> None:
    # The control for the refusals above: the same requests with the token succeed.
    response = httpx.get(web + "/api/flags", headers=AUTH, timeout=10)
    assert response.status_code == 200
    assert any(f["patient_key"].endswith(MRN) for f in response.json()["flags"])


def test_board_refuses_without_a_login_and_with_a_forged_cookie(web: str) -> None:
    with httpx.Client(base_url=web, timeout=10) as plain:
        _refused_without_login(web, plain)


def _refused_without_login(web: str, plain: httpx.Client) -> None:
    for path in ("/board", "/board/unit/ICU-North", f"/board/patient/{quote(MRN, safe='')}"):
        response = plain.get(path)
        assert response.status_code in (303, 401), (path, response.status_code)
        assert "alert(1)" not in response.text
    wrong = plain.get("/board", params={"token": BOARD_TOKEN + "x"})
    assert wrong.status_code in (303, 401) and "board_session" not in wrong.headers.get(
        "set-cookie", ""
    )
    assert "/board/login" in wrong.headers.get("location", "/board/login")
    for cookie in ("", "0" * 64, BOARD_TOKEN, "x" * 5000):
        forged = httpx.get(web + "/board", cookies={"gasgap_board": cookie}, timeout=10)
        assert forged.status_code in (303, 401), cookie[:10]
    login = plain.post("/board/login", data={"token": "not-the-code", "next": "/board"})
    assert login.status_code == 401
    # An acknowledgement without a login changes nothing.
    flag = httpx.get(web + "/api/flags", headers=AUTH, timeout=10).json()["flags"][0]
    refused = plain.post(f"/board/flags/{flag['id']}/acknowledge", data={"by": "Intruder"})
    assert refused.status_code in (303, 401, 403)
    after = httpx.get(web + f"/api/flags/{flag['id']}", headers=AUTH, timeout=10).json()
    assert not [e for e in after["events"] if e["event"] == "acknowledged"]


# --- hostile strings in pages -----------------------------------------------------------------


def _assert_inert(page: str, where: str) -> None:
    for raw in RAW_MARKUP:
        assert raw not in page, f"{where}: unescaped {raw!r}"


def test_hostile_strings_are_text_on_every_page(web: str) -> None:
    seen: dict[str, str] = {}
    with _board(web) as board:
        units = board.get("/board")
        unit_page = board.get("/board/unit/" + quote(UNIT, safe=""))
        patient = board.get("/board/patient/" + quote(MRN, safe=""))
        missing = board.get("/board/patient/" + quote(SCRIPT + "{{ 7*7 }}", safe=""))
    seen.update(units=units.text, unit=unit_page.text, patient=patient.text, missing=missing.text)
    seen["login"] = httpx.get(
        web + "/board/login", timeout=10, params={"next": '/board"><script>alert(1)</script>'}
    ).text
    assert units.status_code == unit_page.status_code == patient.status_code == 200
    for where, page in seen.items():
        _assert_inert(page, where)
    # The hostile values are shown, as text.
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in seen["patient"]
    assert "&lt;img src=x onerror=alert(2)&gt;" in seen["units"] + seen["unit"]
    assert ROOM in seen["patient"] or ROOM in seen["unit"], "template syntax shown as written"
    assert (
        "&#39;};alert(3);//" in seen["patient"] + seen["unit"]
        or "&#x27;};alert(3);//" in seen["patient"] + seen["unit"]
    )
    # Links built from hostile values stay inside the board (percent-encoded).
    assert f'href="/board/unit/{quote(UNIT, safe="")}"' in seen["units"]


def test_api_returns_hostile_strings_as_json_not_html(web: str) -> None:
    response = httpx.get(web + "/api/flags", headers=AUTH, timeout=10)
    assert response.headers["content-type"].startswith("application/json")
    flag = next(f for f in response.json()["flags"] if f["patient_key"].endswith(MRN))
    assert flag["patient_key"].endswith(MRN)  # the value itself, unchanged, as data


# --- oversized requests -----------------------------------------------------------------------


def _read_all(sock: socket.socket, limit: float = 10.0, *, until: bytes | None = None) -> bytes:
    """Read until the peer closes, ``until`` has arrived, or ``limit`` seconds pass."""
    data = b""
    deadline = time.monotonic() + limit
    while time.monotonic() < deadline and not (until and until in data):
        try:
            chunk = sock.recv(65536)
        except (TimeoutError, ConnectionResetError):
            break
        if not chunk:
            break
        data += chunk
    return data


def test_oversized_bodies_get_413_with_or_without_a_length(web: str) -> None:
    big = {"by": "x" * (MAX_BYTES + 10)}
    assert (
        httpx.post(web + "/api/flags/x/acknowledge", json=big, headers=AUTH, timeout=10).status_code
        == 413
    )

    def chunks() -> Iterator[bytes]:
        for _ in range(MAX_BYTES // 4096 + 4):
            yield b"z" * 4096

    streamed = httpx.post(
        web + "/api/flags/x/acknowledge",
        content=chunks(),
        timeout=10,
        headers={**AUTH, "content-type": "application/json"},
    )
    assert streamed.status_code == 413
    # Unauthenticated and oversized: refused either way, never taken.
    login = httpx.post(
        web + "/board/login",
        content=chunks(),
        timeout=10,
        headers={"content-type": "application/x-www-form-urlencoded"},
    )
    assert login.status_code in (401, 413)


def test_a_content_length_that_only_claims_a_size_is_refused_at_once(web: str) -> None:
    port = int(web.rsplit(":", 1)[1])
    with socket.create_connection(("127.0.0.1", port), timeout=10) as sock:
        sock.sendall(
            b"POST /api/flags/x/acknowledge HTTP/1.1\r\nHost: 127.0.0.1\r\n"
            b"Authorization: Bearer " + API_TOKEN.encode() + b"\r\n"
            b"Content-Type: application/json\r\nContent-Length: 1000000000000\r\n\r\n"
            b'{"by": '
        )
        started = time.monotonic()
        answer = _read_all(sock, limit=10, until=b"\r\n\r\n")
    assert answer.startswith(b"HTTP/1.1 413"), answer[:200]
    assert time.monotonic() - started < 5, "answered without waiting for the body"


def test_many_oversized_requests_leave_the_service_answering(web: str) -> None:
    payload = b"q" * (MAX_BYTES * 4)
    with httpx.Client(base_url=web, timeout=10) as client:
        for _ in range(30):  # bounded
            response = client.post(
                "/api/flags/x/acknowledge",
                content=payload,
                headers={**AUTH, "content-type": "application/json"},
            )
            assert response.status_code == 413
    assert httpx.get(web + "/health", timeout=10).status_code == 200
