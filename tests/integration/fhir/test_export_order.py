"""The FHIR test server's own ``$export`` of the demo hospital, loaded in any file and
line order, gives the same database, table by table.

The demo's FHIR resources (invented patients of Hollowmere General Hospital) are put on
the real FHIR test server (sekmet-fhir, ``smart_fhir_server``), exported by it with
``$export`` (Bulk Data Access IG v2: the NDJSON files, their names, their line order
and each resource's ``meta`` are the server's, not ours), and loaded with the demo's
HL7 lab feed twice: once as exported, once with the files reversed and every file's
lines shuffled. Patients are independent and each patient's readings are stepped in
known-time order, so the order of delivery must change nothing (issue 13).
"""

from __future__ import annotations

import json
import random
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import httpx
import pytest

from adapters.codes import CodeTable
from adapters.fhir.bulk import BulkExporter, ExportRequest, observation_type_filter
from tests.integration.fhir.conftest import LOADER_TOKEN, SmartServer
from tests.integration.fhir.test_bulk_against_server import smart
from tests.integration.test_timelines import _historical, dump

pytestmark = pytest.mark.fhirserver

ROOT = Path(__file__).resolve().parents[3]
DEMO_FHIR = ROOT / "fixtures" / "demo" / "feed-ehr.ndjson"
DEMO_LAB = ROOT / "fixtures" / "demo" / "feed-lab.hl7"


class _Quiet:
    def status(self, text: str, wait_s: float) -> None:
        pass

    def file_started(self, name: str, index: int, count: int) -> None:
        pass

    def file_bytes(self, size: int) -> None:
        pass

    def file_done(self, name: str, size: int) -> None:
        pass


def _put_demo(server: SmartServer) -> int:
    """Every demo resource on the server, as a transaction Bundle of PUTs (FHIR R4
    3.1.0.11: a transaction is processed as one)."""
    resources = [json.loads(line) for line in DEMO_FHIR.read_text().splitlines() if line]
    for r in resources:
        r.pop("meta", None)  # the server keeps its own version and lastUpdated
    with httpx.Client(
        base_url=server.base_url,
        timeout=120,
        headers={
            "Authorization": f"Bearer {LOADER_TOKEN}",
            "Content-Type": "application/fhir+json",
        },
    ) as client:
        for start in range(0, len(resources), 200):
            part = resources[start : start + 200]
            bundle = {
                "resourceType": "Bundle",
                "type": "transaction",
                "entry": [
                    {
                        "resource": r,
                        "request": {"method": "PUT", "url": f"{r['resourceType']}/{r['id']}"},
                    }
                    for r in part
                ],
            }
            response = client.post("", json=bundle)
            if response.status_code >= 400:  # a server without transactions: one by one
                for r in part:
                    one = client.put(f"/{r['resourceType']}/{r['id']}", json=r)
                    assert one.status_code in (200, 201), one.text
    return len(resources)


def test_the_servers_export_in_any_order_gives_the_same_tables(
    smart_fhir_server: SmartServer, tmp_path: Path
) -> None:
    since = datetime.now(UTC) - timedelta(seconds=5)
    put = _put_demo(smart_fhir_server)
    folder = tmp_path / "export"
    auth = smart(smart_fhir_server)
    request = ExportRequest(type_filters=(observation_type_filter(CodeTable.load()),), since=since)
    with BulkExporter(
        smart_fhir_server.base_url,
        folder,
        auth=auth,
        progress=_Quiet(),
        sleep=lambda _s: time.sleep(0.2),
    ) as exporter:
        result = exporter.run(request)
    auth.close()
    exported = sorted(result.data_files)
    lines = sum(len(p.read_text().splitlines()) for p in exported)
    assert lines >= put * 0.9, (lines, put)  # the server's export holds the demo

    shuffled = tmp_path / "shuffled"
    shuffled.mkdir()
    again: list[Path] = []
    rng = random.Random(20260302)  # a fixed seed: the same permutation every run
    for path in reversed(exported):
        rows = [line for line in path.read_text().splitlines() if line]
        rng.shuffle(rows)
        copy = shuffled / path.name
        copy.write_text("\n".join(rows) + "\n")
        again.append(copy)

    first, second = f"sqlite:///{tmp_path / 'a.db'}", f"sqlite:///{tmp_path / 'b.db'}"
    _historical([*exported, DEMO_LAB], first)
    _historical([DEMO_LAB, *again], second)
    tables = dump(first)
    # the export was read, not refused: more readings than the lab feed has OBX
    # segments, nothing quarantined, and flags raised to compare
    lab_results = DEMO_LAB.read_text().replace("\r", "\n").count("\nOBX|")
    assert len(tables["readings"]) > lab_results and tables["quarantine"] == []
    assert tables["derivations"] and tables["alerts"]
    assert tables == dump(second)
