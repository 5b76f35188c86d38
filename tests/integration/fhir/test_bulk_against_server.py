"""FHIR Bulk Data ``$export`` backfill against the real FHIR test server
(``smart_fhir_server``: sekmet-fhir 0.1.1 behind SMART Backend Services), end to end:
kick-off, status polling, NDJSON download with the access token, a crash in the middle
of the download and a restart that carries on, DELETE of the job, and loading through
``monitor.ingest.ingest_files`` by ``gasgap fhir backfill``.

The population is invented (Hollowmere General Hospital). Expected values are the
inputs as written (mmHg values stay as charted, a FiO2 of 40 % is the fraction 0.40 by
the definition of per cent); the flow follows the Bulk Data Access IG v2 (reference
sheet section 12): 202 + Content-Location at kick-off, 202 while running, 200 with the
manifest, ``requiresAccessToken`` true on a server that needs a token.
"""

from __future__ import annotations

import json
import time
import uuid
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import httpx
import pytest

from adapters.codes import CodeTable
from adapters.fhir.bulk import (
    STATE_FILE,
    BulkExporter,
    ExportLevel,
    ExportRequest,
    ExportState,
    observation_type_filter,
)
from adapters.fhir.smart import SmartAuth, SmartSettings
from monitor.cli import main
from monitor.engine.model import Kind
from storage.db import open_database
from storage.readings import readings_for_patient
from tests import fhir_samples as s
from tests.integration.fhir.conftest import LOADER_TOKEN, SmartServer

pytestmark = pytest.mark.fhirserver

KEY_ENV = "GASGAP_TEST_BULK_KEY"
WHEN = "2026-03-0{day}T0{hour}:20:00+01:00"


def put(client: httpx.Client, resource: dict[str, Any]) -> None:
    response = client.put(f"/{resource['resourceType']}/{resource['id']}", json=resource)
    assert response.status_code in (200, 201), response.text


@pytest.fixture
def population(smart_fhir_server: SmartServer) -> Iterator[dict[str, Any]]:
    """Three invented patients with an encounter and two gases each, one heart rate
    (a code gasgap does not read) and a Group of the first two."""
    tag = uuid.uuid4().hex[:6]
    people = []
    with httpx.Client(
        base_url=smart_fhir_server.base_url,
        timeout=10,
        headers={
            "Authorization": f"Bearer {LOADER_TOKEN}",
            "Content-Type": "application/fhir+json",
        },
    ) as client:
        for n in range(3):
            pid, eid, mrn = f"hg-bk-{tag}-{n}", f"hg-bk-enc-{tag}-{n}", f"HGB{tag.upper()}{n}"
            put(client, s.patient(pid, mrn, f"195{n}-05-0{n + 1}"))
            put(client, s.encounter(eid, pid))
            for day in (1, 2):
                when = WHEN.format(day=day, hour=n + 1)
                put(
                    client,
                    s.quantity_obs(
                        f"po2-{tag}-{n}-{day}",
                        "2703-7",
                        60.0 + 10 * day,
                        "mm[Hg]",
                        pid=pid,
                        eid=eid,
                        when=when,
                    ),
                )
                put(
                    client,
                    s.quantity_obs(
                        f"fi-{tag}-{n}-{day}", "3150-0", 40, "%", pid=pid, eid=eid, when=when
                    ),
                )
            people.append({"pid": pid, "mrn": mrn})
        hr = s.quantity_obs(
            f"hr-{tag}",
            "8867-4",
            88,
            "/min",
            pid=people[0]["pid"],
            eid=f"hg-bk-enc-{tag}-0",
            when=WHEN.format(day=1, hour=1),
        )
        put(client, hr)
        put(
            client,
            {
                "resourceType": "Group",
                "id": f"hg-bk-grp-{tag}",
                "type": "person",
                "actual": True,
                "member": [{"entity": {"reference": f"Patient/{p['pid']}"}} for p in people[:2]],
            },
        )
    yield {"tag": tag, "people": people, "group": f"hg-bk-grp-{tag}"}


def smart(server: SmartServer) -> SmartAuth:
    settings = SmartSettings(
        client_id="gasgap-test",
        private_key_env=KEY_ENV,
        key_id="hg-ec-1",
        algorithm="ES384",
        scopes=(
            "system/Observation.rs",
            "system/Patient.rs",
            "system/Encounter.rs",
            "system/*.rds",
        ),
    )
    return SmartAuth(settings, server.base_url, lookup=lambda name: server.ec_key_pem)


class Crash(Exception):
    """Stands for the process dying (power cut, kill -9) in the middle of a file."""


class CrashOnSecondFile:
    def __init__(self) -> None:
        self.started: list[str] = []
        self.waits: list[str] = []
        self._files = 0

    def status(self, text: str, wait_s: float) -> None:
        self.waits.append(text)

    def file_started(self, name: str, index: int, count: int) -> None:
        self.started.append(name)
        self._files += 1

    def file_bytes(self, size: int) -> None:
        if self._files == 2:
            raise Crash()

    def file_done(self, name: str, size: int) -> None:
        pass


def lines_of(folder: Path, rtype: str) -> list[dict[str, Any]]:
    out = []
    for path in sorted(folder.glob(f"*-{rtype}.ndjson")):
        out += [json.loads(line) for line in path.read_text().splitlines() if line]
    return out


def site_file(tmp_path: Path, server: SmartServer) -> Path:
    path = tmp_path / "site.toml"
    path.write_text(
        f"""
[site]
name = "Hollowmere General Hospital (test)"
timezone = "Europe/London"
patient_id_system = "{s.MRN_SYSTEM}"

[[sources.fhir]]
name = "hollowmere-record"
base_url = "{server.base_url}"

[sources.fhir.smart]
client_id = "gasgap-test"
private_key_env = "{KEY_ENV}"
key_id = "hg-ec-1"
algorithm = "ES384"
scopes = ["system/Observation.rs", "system/Patient.rs", "system/Encounter.rs", "system/*.rds"]
"""
    )
    return path


def test_export_crashed_mid_download_carries_on_and_loads(
    smart_fhir_server: SmartServer,
    population: dict[str, Any],
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    folder = tmp_path / "export"
    since = datetime.now(UTC) - timedelta(minutes=10)
    request = ExportRequest(type_filters=(observation_type_filter(CodeTable.load()),), since=since)
    crash = CrashOnSecondFile()
    auth = smart(smart_fhir_server)
    with BulkExporter(
        smart_fhir_server.base_url,
        folder,
        auth=auth,
        progress=crash,
        sleep=lambda _s: time.sleep(0.2),
    ) as first:
        with pytest.raises(Crash):
            first.run(request)
    auth.close()
    state = ExportState.load(folder)
    assert state is not None and state.status_url and state.manifest_read
    assert state.requires_token  # the server needs a token: the manifest says so
    assert [f.done for f in state.files][:2] == [True, False]
    assert list(folder.glob("*.part"))  # the cut-off file, not taken as complete
    assert crash.waits  # the server said "in progress" (202) at least once
    status_url = state.status_url

    # restart: the command with the same folder carries on (no new kick-off)
    monkeypatch.setenv(KEY_ENV, smart_fhir_server.ec_key_pem)
    db_url = f"sqlite:///{tmp_path / 'gasgap.db'}"
    code = main(
        [
            "fhir",
            "backfill",
            "--config",
            str(site_file(tmp_path, smart_fhir_server)),
            "--db",
            db_url,
            "--dir",
            str(folder),
            "--since",
            since.isoformat(),
            "--no-progress",
            "--json",
        ]
    )
    out = capsys.readouterr()
    assert code == 0, out.err
    summary = json.loads(out.out)
    after = ExportState.load(folder)
    assert after is not None and after.status_url == status_url
    assert all(f.done for f in after.files) and after.deleted and after.loaded
    assert not list(folder.glob("*.part"))

    # the files hold our people, and no heart rate (the _typeFilter kept gasgap's codes)
    tag = population["tag"]
    observations = [o for o in lines_of(folder, "Observation") if tag in o["id"]]
    assert len(observations) == 12
    assert not any(o["id"].startswith("hr-") for o in observations)
    assert {p["id"] for p in lines_of(folder, "Patient")} >= {
        p["pid"] for p in population["people"]
    }

    # the job is gone from the server (DELETE), asked with a valid token
    checker = smart(smart_fhir_server)
    with httpx.Client(timeout=10, auth=checker) as client:
        assert client.get(status_url).status_code == 404
    checker.close()

    # loaded through ingest: each patient keyed by the MRN (the Patient was read first),
    # both gases with their FiO2, values as charted
    assert summary["stored"] >= 12 and summary["quarantined"] == 0
    db = open_database(db_url)
    try:
        with db.begin(read_only=True) as conn:
            for person in population["people"]:
                got = readings_for_patient(
                    conn,
                    person["mrn"],
                    datetime(2026, 3, 1, tzinfo=UTC),
                    datetime(2026, 3, 3, tzinfo=UTC),
                )
                assert sorted((r.kind, r.value) for r in got) == sorted(
                    [(Kind.PAO2, 70.0), (Kind.PAO2, 80.0), (Kind.FIO2, 0.40), (Kind.FIO2, 0.40)]
                )
                assert all(r.birth_date is not None for r in got)
    finally:
        db.dispose()

    # a second run loads nothing new (same identities)
    code = main(
        [
            "fhir",
            "backfill",
            "--config",
            str(site_file(tmp_path, smart_fhir_server)),
            "--db",
            db_url,
            "--dir",
            str(folder),
            "--since",
            since.isoformat(),
            "--no-progress",
            "--json",
        ]
    )
    again = json.loads(capsys.readouterr().out)
    assert code == 0 and again["stored"] == 0 and again["duplicates"] >= 12


def test_group_export_brings_only_the_group(
    smart_fhir_server: SmartServer, population: dict[str, Any], tmp_path: Path
) -> None:
    auth = smart(smart_fhir_server)
    request = ExportRequest(level=ExportLevel.GROUP, group_id=population["group"])
    with BulkExporter(
        smart_fhir_server.base_url, tmp_path / "g", auth=auth, sleep=lambda _s: time.sleep(0.2)
    ) as exporter:
        result = exporter.run(request)
    auth.close()
    patients = {p["id"] for p in lines_of(tmp_path / "g", "Patient")}
    assert patients == {p["pid"] for p in population["people"][:2]}
    assert all(path.exists() for path in result.data_files)
    assert (tmp_path / "g" / STATE_FILE).exists()


def test_a_different_export_in_the_same_folder_is_refused(
    smart_fhir_server: SmartServer, tmp_path: Path
) -> None:
    folder = tmp_path / "x"
    folder.mkdir()
    ExportState(
        smart_fhir_server.base_url, ExportRequest(level=ExportLevel.PATIENT).as_state()
    ).save(folder)
    with (
        BulkExporter(smart_fhir_server.base_url, folder) as exporter,
        pytest.raises(Exception, match="holds another export"),
    ):
        exporter.run(ExportRequest())
