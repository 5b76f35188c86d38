"""SMART Backend Services against the real FHIR test server's token endpoint
(``smart_fhir_server`` in conftest.py: sekmet-fhir 0.1.1 with gasgap's test clients
registered by JWKS), over real sockets on 127.0.0.1.

What the server checks is the server's own code (PyJWT verification of the assertion
against the registered JWKS, ``exp`` at most 5 minutes ahead, ``jti`` not reused, scopes
granted per client), which is what SMART App Launch v2 Backend Services asks of it
(reference sheet section 12). The expected refusals are the OAuth 2.0 error codes of
RFC 6749 section 5.2 (invalid_client, invalid_scope).
"""

from __future__ import annotations

import time
import uuid
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from typing import Any

import httpx
import pytest

from adapters.codes import CodeTable
from adapters.fhir.poller import FhirPoller, FhirSourceError
from adapters.fhir.smart import AccessToken, SmartAuth, SmartAuthError, SmartSettings
from monitor.engine.model import Kind
from tests import fhir_samples as s
from tests.integration.fhir.conftest import LOADER_TOKEN, SmartServer

pytestmark = pytest.mark.fhirserver

KEY_ENV = "GASGAP_TEST_SMART_KEY"


_MADE: list[SmartAuth] = []


@pytest.fixture(autouse=True)
def _close_auths() -> Iterator[None]:
    yield
    while _MADE:
        _MADE.pop().close()


def smart(server: SmartServer, pem: str, **over: Any) -> SmartAuth:
    values: dict[str, Any] = {
        "client_id": "gasgap-test",
        "private_key_env": KEY_ENV,
        "key_id": "hg-ec-1",
        "algorithm": "ES384",
    }
    wall = over.pop("wall_clock", None)
    values.update(over)
    kwargs: dict[str, Any] = {"lookup": lambda name: pem}
    if wall is not None:
        kwargs["wall_clock"] = wall
    _MADE.append(SmartAuth(SmartSettings.model_validate(values), server.base_url, **kwargs))
    return _MADE[-1]


def loader(server: SmartServer) -> httpx.Client:
    return httpx.Client(
        base_url=server.base_url,
        timeout=10,
        headers={
            "Authorization": f"Bearer {LOADER_TOKEN}",
            "Content-Type": "application/fhir+json",
        },
    )


def put(client: httpx.Client, resource: dict[str, Any]) -> None:
    response = client.put(f"/{resource['resourceType']}/{resource['id']}", json=resource)
    assert response.status_code in (200, 201), response.text


@pytest.fixture
def ward(smart_fhir_server: SmartServer) -> Iterator[dict[str, str]]:
    tag = uuid.uuid4().hex[:8]
    ids = {"pid": f"hg-pat-{tag}", "eid": f"hg-enc-{tag}", "mrn": f"HG{tag.upper()}", "tag": tag}
    with loader(smart_fhir_server) as client:
        put(client, s.patient(ids["pid"], ids["mrn"], "1949-06-03"))
        put(client, s.encounter(ids["eid"], ids["pid"]))
        put(
            client,
            s.quantity_obs(
                f"pao2-{tag}",
                "2703-7",
                68.0,
                "mm[Hg]",
                pid=ids["pid"],
                eid=ids["eid"],
                when="2026-11-30T09:40:00+01:00",
            ),
        )
    yield ids


@pytest.mark.parametrize(
    ("client", "kid", "alg"),
    [("gasgap-test", "hg-ec-1", "ES384"), ("gasgap-rsa", "hg-rsa-1", "RS384")],
)
def test_registered_key_gets_a_token_found_by_discovery(
    smart_fhir_server: SmartServer, client: str, kid: str, alg: str
) -> None:
    pem = smart_fhir_server.ec_key_pem if alg == "ES384" else smart_fhir_server.rsa_key_pem
    # no token_url: discovered from .well-known/smart-configuration
    auth = smart(smart_fhir_server, pem, client_id=client, key_id=kid, algorithm=alg)
    token = auth.token()
    assert auth.token_url() == smart_fhir_server.token_url
    assert set(token.scopes) >= {"system/Observation.rs", "system/Patient.rs"}
    # the token opens the FHIR API, which is closed without one
    with httpx.Client(timeout=10) as plain:
        assert plain.get(f"{smart_fhir_server.base_url}/Patient").status_code == 401
    with httpx.Client(timeout=10, auth=auth) as client:
        assert client.get(f"{smart_fhir_server.base_url}/Patient").status_code == 200
    assert auth.token() is token  # cached: no second trip to the token endpoint
    assert auth.tokens_fetched == 1


def test_a_key_nobody_registered_is_refused_as_invalid_client(
    smart_fhir_server: SmartServer,
) -> None:
    auth = smart(smart_fhir_server, smart_fhir_server.stranger_key_pem)
    with pytest.raises(SmartAuthError) as info:
        auth.token()
    assert info.value.error == "invalid_client" and not info.value.retryable
    assert "gasgap-test" in str(info.value)
    assert "PRIVATE KEY" not in str(info.value)


def test_an_expired_assertion_is_refused(smart_fhir_server: SmartServer) -> None:
    # an assertion signed by a machine whose clock is ten minutes behind: exp is past
    auth = smart(
        smart_fhir_server, smart_fhir_server.ec_key_pem, wall_clock=lambda: time.time() - 600
    )
    with pytest.raises(SmartAuthError) as info:
        auth.token()
    assert info.value.error == "invalid_client"
    assert "clock" in str(info.value)  # the hint names the likely cause


def test_a_scope_the_client_was_not_granted_is_refused(smart_fhir_server: SmartServer) -> None:
    auth = smart(smart_fhir_server, smart_fhir_server.ec_key_pem, scopes=["system/Observation.cud"])
    with pytest.raises(SmartAuthError) as info:
        auth.token()
    assert info.value.error == "invalid_scope"


def test_a_token_without_the_observation_scope_is_reported_by_the_poll(
    smart_fhir_server: SmartServer, ward: dict[str, str]
) -> None:
    # the EHR granted Patient only: the token comes, the Observation search is refused
    auth = smart(
        smart_fhir_server,
        smart_fhir_server.ec_key_pem,
        client_id="gasgap-narrow",
        scopes=["system/Patient.rs"],
    )
    with (
        FhirPoller(
            smart_fhir_server.base_url, codes=CodeTable.load(), auth=auth, sleep=lambda _s: None
        ) as poller,
        pytest.raises(FhirSourceError) as info,
    ):
        poller.poll(None)
    assert "HTTP 403" in str(info.value) and "Observation" in str(info.value)


def test_a_polled_source_behind_smart_reads_its_gas(
    smart_fhir_server: SmartServer, ward: dict[str, str]
) -> None:
    auth = smart(smart_fhir_server, smart_fhir_server.ec_key_pem)
    start = datetime.now(UTC) - timedelta(minutes=5)
    with FhirPoller(
        smart_fhir_server.base_url,
        codes=CodeTable.load(),
        auth=auth,
        patient_id_system=s.MRN_SYSTEM,
        sleep=lambda _s: None,
    ) as poller:
        batch = poller.poll(start)
        mine = [r for r in batch.readings if r.patient_key == ward["mrn"]]
        assert [(r.kind, r.value) for r in mine] == [(Kind.PAO2, pytest.approx(68.0))]
        assert mine[0].birth_date is not None  # the Patient search went through too
        # the server stops taking the token (revoked, restarted): 401, new token, retry
        assert auth._token is not None
        auth._token = AccessToken(
            "revoked-" + auth._token.value[-8:], auth._token.expires_at, auth._token.scopes
        )
        again = poller.poll(start)
    assert [r.delivery_id for r in again.readings if r.patient_key == ward["mrn"]] == [
        r.delivery_id for r in mine
    ]
    assert auth.tokens_fetched == 2


def test_fhir_write_back_signs_in_with_smart_and_writes_its_flag(
    smart_fhir_server: SmartServer,
) -> None:
    # The write-back channel takes [channels.<alias>.smart] like a source: a token from
    # the server's endpoint (client gasgap-writer, granted Flag and Communication
    # create/update only), then the PUTs of FHIR R4 Flag and Communication.
    from adapters.notify.fhir import FhirChannel, resource_id
    from tests.integration.notify.conftest import make_notification

    options = {
        "type": "fhir",
        "base_url": smart_fhir_server.base_url,
        "smart": {
            "client_id": "gasgap-writer",
            "private_key_env": KEY_ENV,
            "key_id": "hg-ec-1",
            "algorithm": "ES384",
            "scopes": ["system/Flag.cu", "system/Communication.cu"],
        },
    }
    channel = FhirChannel("ehr-writeback", options, secrets={KEY_ENV: smart_fhir_server.ec_key_pem})
    try:
        note = make_notification()
        result = channel.send(note)
    finally:
        channel.close()
    assert result.ok, result
    with loader(smart_fhir_server) as client:
        flag = client.get(f"/Flag/{resource_id('gasgap-flag', note.alert_id)}")
    assert flag.status_code == 200, flag.text
    assert flag.json()["resourceType"] == "Flag"


def test_fhir_write_back_without_the_write_scope_is_refused_and_not_retried(
    smart_fhir_server: SmartServer,
) -> None:
    from adapters.notify.fhir import FhirChannel
    from tests.integration.notify.conftest import make_notification

    options = {
        "type": "fhir",
        "base_url": smart_fhir_server.base_url,
        "smart": {
            "client_id": "gasgap-narrow",  # granted system/Patient.rs only
            "private_key_env": KEY_ENV,
            "key_id": "hg-ec-1",
            "algorithm": "ES384",
            "scopes": ["system/Flag.cu"],
        },
    }
    channel = FhirChannel("ehr-writeback", options, secrets={KEY_ENV: smart_fhir_server.ec_key_pem})
    try:
        result = channel.send(make_notification())
    finally:
        channel.close()
    assert not result.ok and not result.retryable, result
    assert "invalid_scope" in (result.detail or "")
