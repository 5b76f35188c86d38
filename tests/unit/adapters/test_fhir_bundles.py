"""Bundle and NDJSON reading (FHIR R4 Bundle types; FHIR bulk data NDJSON)."""

from __future__ import annotations

import os
import threading
from datetime import UTC, datetime
from pathlib import Path

import orjson
import pytest

from adapters.codes import CodeTable
from adapters.fhir.bundles import iter_ndjson, read_bundle, read_bundle_bytes, read_ndjson
from adapters.fhir.observations import FhirReadingBuilder
from monitor.engine.model import Kind
from tests import fhir_samples as s

RECEIVED = datetime(2026, 11, 30, 9, 0, tzinfo=UTC)


@pytest.fixture
def builder() -> FhirReadingBuilder:
    return FhirReadingBuilder(
        CodeTable.load(),
        source_system=s.SOURCE,
        patient_id_system=s.MRN_SYSTEM,
        received_at=RECEIVED,
    )


def stream() -> list[dict]:
    return [
        s.quantity_obs("o-pao2", "2703-7", 9.8, "kPa"),  # before its Patient: order must not matter
        s.patient(),
        s.encounter(),
        s.quantity_obs("o-fio2", "3150-0", 35, "%"),
    ]


@pytest.mark.parametrize("kind", ["searchset", "collection", "transaction", "batch"])
def test_each_bundle_type_gives_readings_with_patient_context(
    builder: FhirReadingBuilder, kind: str
) -> None:
    batch = read_bundle(builder, s.bundle(kind, stream()))
    assert [r.kind for r in batch.readings] == [Kind.PAO2, Kind.FIO2]
    assert {r.patient_key for r in batch.readings} == {"HG100001"}
    assert not batch.rejections


def test_transaction_deletes_are_counted_and_ignored(builder: FhirReadingBuilder) -> None:
    batch = read_bundle(builder, s.bundle("transaction", stream(), deletes=3))
    assert batch.skipped["DELETE entry"] == 3
    assert len(batch.readings) == 2


def test_searchset_outcome_entries_are_not_read(builder: FhirReadingBuilder) -> None:
    bundle = s.bundle("searchset", stream())
    bundle["entry"].append(
        {
            "resource": {"resourceType": "OperationOutcome", "issue": []},
            "search": {"mode": "outcome"},
        }
    )
    batch = read_bundle(builder, bundle)
    assert batch.skipped["search outcome entry"] == 1 and len(batch.readings) == 2


def test_post_entry_without_id_takes_the_uuid_of_its_full_url(builder: FhirReadingBuilder) -> None:
    obs = s.quantity_obs("x", "2703-7", 9.8, "kPa")
    del obs["id"]
    bundle = {
        "resourceType": "Bundle",
        "type": "transaction",
        "entry": [
            {
                "fullUrl": "urn:uuid:5a1d7c1e-0000-4000-8000-000000000001",
                "resource": obs,
                "request": {"method": "POST", "url": "Observation"},
            },
        ],
    }
    batch = read_bundle(builder, bundle)
    assert batch.readings[0].logical_id.endswith("Observation/5a1d7c1e-0000-4000-8000-000000000001")


def test_invalid_bundle_json_is_one_rejection(builder: FhirReadingBuilder) -> None:
    batch = read_bundle_bytes(
        builder, b'{"resourceType": "Bundle", "entry": [', source="upload.json"
    )
    assert batch.rejections[0].reason.startswith("upload.json: invalid JSON:")


def write_ndjson(path: Path, lines: list[bytes]) -> None:
    path.write_bytes(b"\n".join(lines) + b"\n")


def test_ndjson_bad_line_is_rejected_by_number_and_the_rest_go_on(
    builder: FhirReadingBuilder, tmp_path: Path
) -> None:
    lines = [orjson.dumps(s.patient())]
    lines += [orjson.dumps(s.quantity_obs(f"o{n}", "2019-8", 40 + n, "mm[Hg]")) for n in range(20)]
    lines[16] = lines[16][:40]  # line 17 truncated mid-resource
    lines.append(orjson.dumps(s.quantity_obs("last", "2019-8", 39, "mm[Hg]"))[:-3])  # truncated end
    path = tmp_path / "Observation.ndjson"
    write_ndjson(path, lines)
    batch = read_ndjson(builder, path)
    assert len(batch.readings) == 19
    reasons = [r.reason for r in batch.rejections]
    assert len(reasons) == 2
    assert reasons[0].startswith("line 17: invalid JSON: ")
    assert reasons[1].startswith("line 22: invalid JSON: ")
    assert batch.rejections[0].source == "Observation.ndjson:17"


def test_ndjson_rejection_of_a_resource_names_its_line(
    builder: FhirReadingBuilder, tmp_path: Path
) -> None:
    path = tmp_path / "o.ndjson"
    write_ndjson(
        path, [orjson.dumps(s.quantity_obs("o1", "2703-7", 9, "furlongs", ucum=False)), b"[1, 2]"]
    )
    reasons = [r.reason for r in read_ndjson(builder, path).rejections]
    assert reasons[0].startswith("line 1: Observation/o1 valueQuantity.unit 'furlongs'")
    assert reasons[1] == "line 2: not a JSON object (a FHIR resource)"


def test_iter_ndjson_streams_without_reading_the_file_whole(tmp_path: Path) -> None:
    """A FIFO whose writer waits until the first resource was consumed: a reader that
    loaded the whole file first would never see it (bounded by a timeout)."""
    fifo = tmp_path / "feed.ndjson"
    os.mkfifo(fifo)
    first_seen = threading.Event()
    writer_saw_reader = []

    def writer() -> None:
        with open(fifo, "wb") as fh:
            fh.write(orjson.dumps(s.patient()) + b"\n")
            fh.flush()
            writer_saw_reader.append(first_seen.wait(timeout=10))
            fh.write(orjson.dumps(s.device_obs()) + b"\n")

    thread = threading.Thread(target=writer)
    thread.start()
    got = []
    for number, item in iter_ndjson(fifo):
        got.append((number, item))
        first_seen.set()
    thread.join(timeout=15)
    assert writer_saw_reader == [True]
    assert [n for n, _ in got] == [1, 2]
    assert isinstance(got[1][1], dict) and got[1][1]["resourceType"] == "Observation"
