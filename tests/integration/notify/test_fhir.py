"""FHIR write-back: resources checked with fhir.resources, then written to the real FHIR
test server (``fhir_server``; skipped on a developer machine without it, failed in CI)."""

import re

import httpx
import pytest
from fhir.resources.R4B.communication import Communication
from fhir.resources.R4B.flag import Flag

from adapters.notify import DeliveryFailed, build_channel, map_fhir_model_errors
from adapters.notify.fhir import FhirChannel, FhirOptions, build_communication, build_flag
from monitor.engine.model import ADVISORY, Priority
from tests.integration.notify.conftest import LOOPBACK, free_port, make_notification

# FHIR R4B, Flag.status: required binding to flag-status = active | inactive | entered-in-error.
FLAG_STATUS_CODES = {"active", "inactive", "entered-in-error"}
# FHIR R4B, Communication.priority: required binding to request-priority.
REQUEST_PRIORITY_CODES = {"routine", "urgent", "asap", "stat"}
# FHIR R4B datatypes, "id": [A-Za-z0-9\-\.]{1,64}.
FHIR_ID = re.compile(r"[A-Za-z0-9\-.]{1,64}")

OPTIONS = FhirOptions(base_url="http://127.0.0.1:9/fhir")


@pytest.mark.parametrize(
    ("event", "status"),
    [
        ("raised", "active"),
        ("escalated", "active"),
        ("resolved", "inactive"),
        ("retracted", "entered-in-error"),
    ],
)
def test_flag_round_trips_through_fhir_resources_with_a_valid_status(
    event: str, status: str
) -> None:
    flag = build_flag(make_notification(event=event), OPTIONS)
    again = Flag.model_validate_json(flag.model_dump_json(exclude_none=True))
    assert again.status == status and status in FLAG_STATUS_CODES
    assert FHIR_ID.fullmatch(again.id or "")
    assert ADVISORY in (again.code.text or "")
    assert again.subject.identifier.system == "urn:oid:2.999.1.1.1"
    assert (again.period.end is not None) is (event in ("resolved", "retracted"))


@pytest.mark.parametrize("priority", list(Priority))
def test_communication_round_trips_through_fhir_resources(priority: Priority) -> None:
    n = make_notification(priority=priority)
    flag = build_flag(n, OPTIONS)
    comm = build_communication(n, OPTIONS, flag)
    again = Communication.model_validate_json(comm.model_dump_json(exclude_none=True))
    assert again.priority in REQUEST_PRIORITY_CODES
    assert again.status == "completed"
    assert FHIR_ID.fullmatch(again.id or "")
    assert again.about[0].reference == f"Flag/{flag.id}"
    assert any(p.contentString == ADVISORY for p in again.payload)


def test_resource_ids_are_stable_for_a_retry_and_do_not_show_the_patient_key() -> None:
    first, retry, other = make_notification(1), make_notification(1), make_notification(2)
    assert build_flag(first, OPTIONS).id == build_flag(retry, OPTIONS).id
    assert build_flag(first, OPTIONS).id != build_flag(other, OPTIONS).id
    resolved = make_notification(1, event="resolved", idempotency_key="alert-0001:resolved:2")
    assert build_flag(resolved, OPTIONS).id == build_flag(first, OPTIONS).id  # same Flag
    assert "hgh-pt" not in (build_flag(first, OPTIONS).id or "")


def test_narrative_escapes_markup_from_values() -> None:
    flag = build_flag(make_notification(patient_display="<script>alert(1)</script>"), OPTIONS)
    assert flag.text is not None
    assert "<script>" not in flag.text.div
    assert "&lt;script&gt;" in flag.text.div


def test_a_resource_fhir_resources_refuses_is_dead_not_retried() -> None:
    with pytest.raises(DeliveryFailed) as caught, map_fhir_model_errors("Flag"):
        Flag.model_validate({"resourceType": "Flag", "id": "not a valid id!"})
    assert caught.value.retryable is False
    assert "Flag failed FHIR validation" in caught.value.detail


def test_fhir_server_unreachable_is_retryable() -> None:
    closed = f"http://{LOOPBACK}:{free_port()}/fhir"  # nothing listens there
    channel = build_channel("record", {"type": "fhir", "base_url": closed})
    result = channel.send(make_notification())
    channel.close()
    assert not result.ok and result.retryable


# --- against the real FHIR test server ------------------------------------------------


@pytest.fixture
def fhir_channel(fhir_server: str) -> FhirChannel:
    channel = build_channel("record", {"type": "fhir", "base_url": fhir_server, "timeout_s": 10})
    assert isinstance(channel, FhirChannel)
    return channel


def _search_total(base: str, kind: str, identifier: str) -> int:
    bundle = httpx.get(f"{base}/{kind}", params={"identifier": identifier}, timeout=10).json()
    assert bundle["resourceType"] == "Bundle"
    return len(bundle.get("entry", []))


@pytest.mark.fhirserver
def test_fhir_write_back_creates_flag_and_communication(
    fhir_server: str, fhir_channel: FhirChannel
) -> None:
    n = make_notification(31)
    result = fhir_channel.send(n)
    assert result.ok, result.detail

    flag_id = build_flag(n, fhir_channel.options).id
    stored = httpx.get(f"{fhir_server}/Flag/{flag_id}", timeout=10)
    assert stored.status_code == 200
    flag = Flag.model_validate(stored.json())  # the server's copy is still valid R4B
    assert flag.status == "active"
    assert ADVISORY in (flag.code.text or "")

    comm_id = build_communication(n, fhir_channel.options, flag).id
    stored_comm = Communication.model_validate(
        httpx.get(f"{fhir_server}/Communication/{comm_id}", timeout=10).json()
    )
    assert stored_comm.about[0].reference == f"Flag/{flag_id}"
    fhir_channel.close()


@pytest.mark.fhirserver
def test_fhir_retry_and_later_events_update_one_flag_not_add_copies(
    fhir_server: str, fhir_channel: FhirChannel
) -> None:
    raised = make_notification(32)
    retracted = make_notification(32, event="retracted", idempotency_key="alert-0032:retracted:2")
    for n in (raised, raised, retracted):  # the second send is a retry of the first
        assert fhir_channel.send(n).ok

    flag_id = build_flag(raised, fhir_channel.options).id
    flag = Flag.model_validate(httpx.get(f"{fhir_server}/Flag/{flag_id}", timeout=10).json())
    assert flag.status == "entered-in-error"
    assert _search_total(fhir_server, "Flag", "urn:oid:2.999.1.1.2|alert-0032") == 1
    raised_key = "urn:oid:2.999.1.1.3|alert-0032:raised:1"
    assert _search_total(fhir_server, "Communication", raised_key) == 1
    fhir_channel.close()
