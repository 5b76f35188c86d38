"""The poller against a real FHIR R4 server (tests/fhir_server.py), over real sockets
on 127.0.0.1.

Expected canonical values are worked by hand from the invented inputs, with the kPa
factor from pint (1 kPa = 7.500616 mmHg, reference sheet section 10, [COMP] Pint
0.25.3) computed here through pint itself, not through gasgap's own conversion.
"""

from __future__ import annotations

import uuid
from collections.abc import Callable, Iterator
from datetime import UTC, datetime, timedelta

import httpx
import pint
import pytest

from adapters.codes import CodeTable
from adapters.fhir.poller import FhirPoller, PollBatch
from monitor.engine.model import Kind, Specimen, Status
from tests import fhir_samples as s

pytestmark = pytest.mark.fhirserver

_UREG = pint.UnitRegistry()


def kpa_in_mmhg(kpa: float) -> float:
    return float(_UREG.Quantity(kpa, "kPa").to("mmHg").magnitude)


@pytest.fixture
def ward(fhir_server: str) -> Iterator[dict[str, str]]:
    """A fresh invented patient on the server; ids unique per test so tests don't mix."""
    tag = uuid.uuid4().hex[:8]
    ids = {"pid": f"hg-pat-{tag}", "eid": f"hg-enc-{tag}", "mrn": f"HG{tag.upper()}", "tag": tag}
    with httpx.Client(base_url=fhir_server, timeout=10) as client:
        put(client, s.patient(ids["pid"], ids["mrn"], "1958-02-17"))
        put(client, s.encounter(ids["eid"], ids["pid"]))
    yield ids


def put(client: httpx.Client, resource: dict) -> dict:
    response = client.put(
        f"/{resource['resourceType']}/{resource['id']}",
        json=resource,
        headers={"Content-Type": "application/fhir+json"},
    )
    assert response.status_code in (200, 201), response.text
    return dict(response.json())


@pytest.fixture
def poller() -> Iterator[Callable[..., FhirPoller]]:
    made: list[FhirPoller] = []

    def make(base_url: str, page_size: int = 100) -> FhirPoller:
        made.append(new_poller(base_url, page_size))
        return made[-1]

    yield make
    for p in made:
        p.close()


def new_poller(base_url: str, page_size: int) -> FhirPoller:
    return FhirPoller(
        base_url,
        codes=CodeTable.load(),
        page_size=page_size,
        source_system="hollowmere-test",
        patient_id_system=s.MRN_SYSTEM,
        sleep=lambda _s: None,
    )


def mine(batch: PollBatch, mrn: str) -> list:
    return [r for r in batch.readings if r.patient_key == mrn]


def write_gas(client: httpx.Client, ids: dict[str, str]) -> None:
    t = ids["tag"]
    pid, eid = ids["pid"], ids["eid"]
    when = "2026-11-30T08:15:00+01:00"
    put(client, s.quantity_obs(f"pao2-{t}", "2703-7", 10.5, "kPa", pid=pid, eid=eid, when=when))
    put(client, s.quantity_obs(f"paco2-{t}", "2019-8", 41.0, "mm[Hg]", pid=pid, eid=eid, when=when))
    put(client, s.quantity_obs(f"fio2-{t}", "3150-0", 40, "%", pid=pid, eid=eid, when=when))
    put(client, s.venous_po2(f"vbg-{t}", pid=pid))


def test_poll_reads_gas_with_canonical_values_and_context(
    fhir_server: str, ward: dict[str, str], poller: Callable[..., FhirPoller]
) -> None:
    start = datetime.now(UTC) - timedelta(seconds=5)
    with httpx.Client(base_url=fhir_server, timeout=10) as client:
        write_gas(client, ward)
    batch = poller(fhir_server).poll(start)
    got = {r.logical_id.rsplit("/", 1)[-1]: r for r in mine(batch, ward["mrn"])}
    t = ward["tag"]
    assert set(got) == {f"pao2-{t}", f"paco2-{t}", f"fio2-{t}", f"vbg-{t}"}
    pao2 = got[f"pao2-{t}"]
    assert pao2.kind is Kind.PAO2 and pao2.specimen is Specimen.ARTERIAL
    assert pao2.value == pytest.approx(kpa_in_mmhg(10.5), rel=1e-6)  # 78.756 mmHg per pint
    assert pao2.original_value == "10.5" and pao2.original_unit == "kPa"
    assert got[f"paco2-{t}"].value == pytest.approx(41.0)
    assert got[f"fio2-{t}"].value == pytest.approx(0.40)  # 40 % charted -> fraction 0.40
    venous = got[f"vbg-{t}"]
    assert venous.specimen is Specimen.VENOUS  # specimen display overrides arterial 2703-7
    assert pao2.effective_at == datetime(2026, 11, 30, 7, 15, tzinfo=UTC)
    assert pao2.birth_date is not None and pao2.birth_date.isoformat() == "1958-02-17"
    assert pao2.location is not None and pao2.location.unit == "ICU-North"
    assert pao2.location.bed == "2"
    assert pao2.delivery_id.startswith(pao2.logical_id + "/_history/")
    assert batch.watermark is not None and batch.watermark >= start


def test_paging_follows_next_links(
    fhir_server: str, ward: dict[str, str], poller: Callable[..., FhirPoller]
) -> None:
    start = datetime.now(UTC) - timedelta(seconds=5)
    with httpx.Client(base_url=fhir_server, timeout=10) as client:
        write_gas(client, ward)
    small = poller(fhir_server, page_size=2).poll(start)
    whole = poller(fhir_server, page_size=100).poll(start)
    assert small.pages >= 2
    assert sorted(r.delivery_id for r in mine(small, ward["mrn"])) == sorted(
        r.delivery_id for r in mine(whole, ward["mrn"])
    )
    assert len(mine(small, ward["mrn"])) == 4


def test_second_poll_brings_only_updates_as_new_deliveries(
    fhir_server: str, ward: dict[str, str], poller: Callable[..., FhirPoller]
) -> None:
    start = datetime.now(UTC) - timedelta(seconds=5)
    src = poller(fhir_server)
    with httpx.Client(base_url=fhir_server, timeout=10) as client:
        write_gas(client, ward)
        first = src.poll(start)
        assert first.watermark is not None
        again = src.poll(first.watermark)
        # ge is inclusive: at most the boundary resource comes back, with the same delivery id
        first_ids = {r.delivery_id for r in first.readings}
        assert {r.delivery_id for r in again.readings} <= first_ids
        assert again.watermark == first.watermark  # never moves back

        t = ward["tag"]
        withdrawn = s.quantity_obs(
            f"pao2-{t}",
            "2703-7",
            10.5,
            "kPa",
            pid=ward["pid"],
            eid=ward["eid"],
            when="2026-11-30T08:15:00+01:00",
            status="entered-in-error",
        )
        put(client, withdrawn)
        third = src.poll(first.watermark)
    assert third.watermark is not None and third.watermark > first.watermark
    before = next(r for r in first.readings if r.logical_id.endswith(f"/pao2-{t}"))
    after = [r for r in third.readings if r.logical_id == before.logical_id]
    assert len(after) == 1
    assert after[0].status is Status.RETRACTED
    assert after[0].delivery_id != before.delivery_id  # new versionId -> new delivery
    new_ids = {r.delivery_id for r in third.readings} - {r.delivery_id for r in first.readings}
    assert new_ids == {after[0].delivery_id}


def test_poll_of_a_quiet_server_keeps_the_watermark(
    fhir_server: str, poller: Callable[..., FhirPoller]
) -> None:
    future = datetime.now(UTC) + timedelta(days=1)
    batch = poller(fhir_server).poll(future)
    assert batch.readings == [] and batch.watermark == future


def test_panel_members_are_tied_by_the_panel_id(
    fhir_server: str, ward: dict[str, str], poller: Callable[..., FhirPoller]
) -> None:
    start = datetime.now(UTC) - timedelta(seconds=5)
    t = ward["tag"]
    resources = s.gas_panel_with_members(ward["pid"])
    for res in resources:
        res["id"] = f"{res['id']}-{t}"
        for member in res.get("hasMember", []):
            member["reference"] += f"-{t}"
    with httpx.Client(base_url=fhir_server, timeout=10) as client:
        for res in resources:
            put(client, res)
    batch = poller(fhir_server).poll(start)
    readings = mine(batch, ward["mrn"])
    assert {r.kind for r in readings} == {Kind.PAO2, Kind.PACO2, Kind.PH}
    # the panel (24336-0) is not searched for by code; _revinclude brings it along
    assert {r.panel_id for r in readings} == {f"hg-gas-1-{t}"}
