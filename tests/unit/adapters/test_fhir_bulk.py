"""The $export client (adapters/fhir/bulk.py) against a small local peer
(httpx.MockTransport) for what the FHIR test server does not do: Retry-After in
seconds, files that need no token, files on another host, a 429. The whole flow against
the real server is in tests/integration/fhir/test_bulk_against_server.py.

Rules from the Bulk Data Access IG v2 (reference sheet section 12): Retry-After and
X-Progress on 202, ``requiresAccessToken`` says whether a file needs the token.
Retry-After as delta-seconds or an HTTP date is RFC 9110 section 10.2.3.
"""

from __future__ import annotations

import json
from pathlib import Path
from urllib.parse import parse_qs, urlsplit

import httpx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from adapters.codes import CodeTable
from adapters.fhir.bulk import (
    BulkExporter,
    BulkExportError,
    ExportLevel,
    ExportRequest,
    combine_for_loading,
    observation_type_filter,
)
from adapters.fhir.poller import BearerAuth

BASE = "https://fhir.hollowmere.example/r4"


class Peer:
    def __init__(self, *, requires_token: bool, file_host: str = "fhir.hollowmere.example"):
        self.requires_token = requires_token
        self.file_host = file_host
        self.polls = 0
        self.seen: list[tuple[str, str, str]] = []

    def __call__(self, request: httpx.Request) -> httpx.Response:
        auth = request.headers.get("authorization", "")
        self.seen.append((request.method, request.url.path, auth))
        path = request.url.path
        if path.endswith("/$export"):
            assert request.headers["prefer"] == "respond-async"
            return httpx.Response(202, headers={"Content-Location": f"{BASE}/status/1"})
        if path.endswith("/status/1") and request.method == "GET":
            self.polls += 1
            if self.polls == 1:
                return httpx.Response(429, headers={"Retry-After": "7"})
            if self.polls < 4:
                return httpx.Response(
                    202, headers={"Retry-After": "3", "X-Progress": f"step {self.polls}"}
                )
            return httpx.Response(
                200,
                json={
                    "transactionTime": "2026-03-31T23:00:00Z",
                    "requiresAccessToken": self.requires_token,
                    "output": [
                        {"type": "Patient", "url": f"https://{self.file_host}/files/p.ndjson"}
                    ],
                    "error": [],
                },
            )
        if path.endswith("/status/1") and request.method == "DELETE":
            return httpx.Response(202)
        if path.startswith("/files/"):
            return httpx.Response(200, content=b'{"resourceType":"Patient","id":"a"}\n')
        return httpx.Response(404)


def run(peer: Peer, tmp_path: Path) -> tuple[list[float], list[str]]:
    waits: list[float] = []
    statuses: list[str] = []

    class Progress:
        def status(self, text: str, wait_s: float) -> None:
            statuses.append(text)

        def file_started(self, name: str, index: int, count: int) -> None: ...
        def file_bytes(self, size: int) -> None: ...
        def file_done(self, name: str, size: int) -> None: ...

    with BulkExporter(
        BASE,
        tmp_path,
        auth=BearerAuth("not-a-real-token"),
        client=httpx.Client(transport=httpx.MockTransport(peer)),
        sleep=waits.append,
        progress=Progress(),
    ) as exporter:
        exporter.run(ExportRequest())
    return waits, statuses


def test_waits_as_the_server_says_and_shows_progress(tmp_path: Path) -> None:
    peer = Peer(requires_token=True)
    waits, statuses = run(peer, tmp_path)
    assert waits == [7.0, 3.0, 3.0]  # Retry-After of the 429, then of each 202
    assert statuses == ["step 2", "step 3"]  # X-Progress, shown as given
    assert ("DELETE", "/r4/status/1", "Bearer not-a-real-token") in peer.seen
    file_get = next(s for s in peer.seen if s[1].startswith("/files/"))
    assert file_get[2] == "Bearer not-a-real-token"  # requiresAccessToken: true


def test_no_token_on_files_that_do_not_need_it(tmp_path: Path) -> None:
    peer = Peer(requires_token=False, file_host="files.hollowmere.example")
    run(peer, tmp_path)
    file_get = next(s for s in peer.seen if s[1].startswith("/files/"))
    assert file_get[2] == ""  # requiresAccessToken: false -> no credentials sent


def test_token_never_goes_to_another_host(tmp_path: Path) -> None:
    peer = Peer(requires_token=True, file_host="elsewhere.example")
    with pytest.raises(BulkExportError, match="refusing to send credentials"):
        run(peer, tmp_path)
    assert not any(s[1].startswith("/files/") for s in peer.seen)


def test_kickoff_parameters(tmp_path: Path) -> None:
    request = ExportRequest(
        level=ExportLevel.GROUP,
        group_id="icu-north",
        type_filters=(observation_type_filter(CodeTable.load()),),
    )
    assert request.path() == "Group/icu-north/$export"
    params = dict(request.params())
    assert params["_type"] == "Patient,Encounter,Observation"
    # one query; its inner commas encoded, so it is not split into several queries
    (query,) = str(params["_typeFilter"]).split(",")
    rtype, _, inner = query.partition("?")
    codes = parse_qs(inner)["code"][0].split(",")
    assert rtype == "Observation" and "http://loinc.org|2703-7" in codes  # LOINC PaO2
    with pytest.raises(ValueError, match="group id"):
        ExportRequest(level=ExportLevel.GROUP)
    assert urlsplit(BASE).path == "/r4"


def test_combined_file_puts_context_first_and_observations_in_time_order(
    tmp_path: Path,
) -> None:
    obs = tmp_path / "001-Observation.ndjson"
    pat = tmp_path / "002-Patient.ndjson"
    enc = tmp_path / "003-Encounter.ndjson"
    obs.write_text(
        '{"resourceType":"Observation","id":"late","meta":{"lastUpdated":"2026-03-02T10:00:00Z"}}\n'
        "not json\n"
        '{"resourceType":"Observation","id":"early","meta":{"lastUpdated":"2026-03-02T11:00:00+02:00"}}\n'
    )
    pat.write_text('{"resourceType":"Patient","id":"p"}\n')
    enc.write_text('{"resourceType":"Encounter","id":"e"}')  # no final newline
    out, count = combine_for_loading([obs, pat, enc], tmp_path / "load.ndjson")
    lines = out.read_text().splitlines()
    assert count == 5
    ids = [json.loads(line)["id"] for line in lines[:4]]
    # 11:00+02:00 is 09:00 UTC, before 10:00 UTC
    assert ids == ["p", "e", "early", "late"] and lines[4] == "not json"


@settings(max_examples=50, deadline=None)
@given(st.lists(st.sampled_from(["Patient", "Encounter", "Observation"]), max_size=30))
def test_combined_file_keeps_every_line(
    tmp_path_factory: pytest.TempPathFactory, types: list[str]
) -> None:
    folder = tmp_path_factory.mktemp("c")
    src = folder / "in.ndjson"
    src.write_text(
        "".join(json.dumps({"resourceType": t, "id": f"r{i}"}) + "\n" for i, t in enumerate(types))
    )
    out, count = combine_for_loading([src], folder / "load.ndjson")
    got = [json.loads(line) for line in out.read_text().splitlines()]
    assert count == len(types)
    assert sorted(r["id"] for r in got) == sorted(f"r{i}" for i in range(len(types)))
    ranks = [{"Patient": 0, "Encounter": 1}.get(r["resourceType"], 2) for r in got]
    assert ranks == sorted(ranks)
