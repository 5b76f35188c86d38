"""FhirPoller over httpx.MockTransport: search parameters, retries, auth, paging.

Retry-After semantics are RFC 9110 section 10.2.3 (delay-seconds or an HTTP-date);
the Basic scheme is RFC 7617 (checked against httpx's own BasicAuth here).
"""

from __future__ import annotations

from collections.abc import Callable
from datetime import UTC, datetime

import httpx
import pytest

from adapters.codes import CodeTable
from adapters.fhir.poller import BasicAuth, BearerAuth, FhirPoller, FhirSourceError
from tests import fhir_samples as s

BASE = "https://ehr.hollowmere.invalid/fhir"


def searchset(resources: list[dict], next_url: str | None = None) -> dict:
    bundle = s.bundle("searchset", resources)
    bundle["link"] = [{"relation": "self", "url": BASE}]
    if next_url:
        bundle["link"].append({"relation": "next", "url": next_url})
    return bundle


def make(
    handler: Callable[[httpx.Request], httpx.Response], **kw: object
) -> tuple[FhirPoller, list[float]]:
    slept: list[float] = []
    poller = FhirPoller(
        BASE,
        codes=CodeTable.load(),
        client=httpx.Client(transport=httpx.MockTransport(handler)),
        sleep=slept.append,
        source_system="hollowmere-ehr",
        patient_id_system=s.MRN_SYSTEM,
        **kw,  # type: ignore[arg-type]
    )
    return poller, slept


def serve(pages: dict[str, dict]) -> Callable[[httpx.Request], httpx.Response]:
    """Answer Observation searches from ``pages`` (by path+query marker) and context by _id."""

    def handler(request: httpx.Request) -> httpx.Response:
        path = request.url.path
        if path.endswith("/Patient"):
            return httpx.Response(200, json=searchset([s.patient()]))
        if path.endswith("/Encounter"):
            return httpx.Response(200, json=searchset([s.encounter()]))
        marker = request.url.params.get("page", "1")
        return httpx.Response(200, json=pages[marker])

    return handler


def test_search_asks_for_known_codes_since_the_watermark() -> None:
    seen: list[httpx.Request] = []

    def handler(request: httpx.Request) -> httpx.Response:
        seen.append(request)
        return httpx.Response(200, json=searchset([]))

    poller, _ = make(handler, page_size=25)
    with poller:
        poller.poll(datetime(2026, 11, 30, 8, 0, tzinfo=UTC))
    params = seen[0].url.params
    assert seen[0].url.path == "/fhir/Observation"
    assert params["_lastUpdated"] == "ge2026-11-30T08:00:00Z"
    assert params["_count"] == "25"
    codes = params["code"].split(",")
    assert "http://loinc.org|2703-7" in codes and "http://loinc.org|3150-0" in codes
    assert seen[0].headers["accept"] == "application/fhir+json"


def test_paging_follows_next_and_fetches_context_once() -> None:
    pages = {
        "1": searchset(
            [s.quantity_obs("o1", "2703-7", 10, "kPa")], next_url=f"{BASE}/Observation?page=2"
        ),
        "2": searchset([s.quantity_obs("o2", "3150-0", 40, "%")]),
    }
    calls: list[str] = []
    inner = serve(pages)

    def handler(request: httpx.Request) -> httpx.Response:
        calls.append(request.url.path)
        return inner(request)

    poller, _ = make(handler)
    with poller:
        batch = poller.poll(None)
        assert batch.pages == 2 and len(batch.readings) == 2
        assert {r.patient_key for r in batch.readings} == {"HG100001"}
        poller.poll(None)
    assert calls.count("/fhir/Patient") == 1  # cached for the second poll
    assert calls.count("/fhir/Encounter") == 1


def test_429_waits_as_retry_after_says_then_succeeds() -> None:
    answers = [
        httpx.Response(429, headers={"Retry-After": "7"}),
        httpx.Response(200, json=searchset([])),
    ]
    poller, slept = make(lambda request: answers.pop(0))
    with poller:
        poller.poll(None)
    assert slept == [7.0]


def test_503_backs_off_exponentially_and_gives_up_with_a_clear_error() -> None:
    poller, slept = make(lambda request: httpx.Response(503), max_retries=4)
    with poller, pytest.raises(FhirSourceError) as err:
        poller.poll(None)
    assert slept == [1.0, 2.0, 4.0, 8.0]
    assert "HTTP 503" in str(err.value) and "gave up after 4 retries" in str(err.value)


def test_timeouts_are_retried() -> None:
    answers: list[object] = [httpx.ReadTimeout("slow"), httpx.Response(200, json=searchset([]))]

    def handler(request: httpx.Request) -> httpx.Response:
        answer = answers.pop(0)
        if isinstance(answer, Exception):
            raise answer
        assert isinstance(answer, httpx.Response)
        return answer

    poller, slept = make(handler)
    with poller:
        assert poller.poll(None).pages == 1
    assert slept == [1.0]


def test_client_errors_are_not_retried_and_carry_the_outcome() -> None:
    outcome = {
        "resourceType": "OperationOutcome",
        "issue": [
            {"severity": "error", "code": "invalid", "diagnostics": "Unknown parameter _revinclude"}
        ],
    }
    poller, slept = make(lambda request: httpx.Response(400, json=outcome))
    with (
        poller,
        pytest.raises(FhirSourceError, match="HTTP 400 \\(Unknown parameter _revinclude\\)"),
    ):
        poller.poll(None)
    assert slept == []


def test_bearer_token_is_sent() -> None:
    seen: list[httpx.Request] = []

    def handler(request: httpx.Request) -> httpx.Response:
        seen.append(request)
        return httpx.Response(200, json=searchset([]))

    poller, _ = make(handler, auth=BearerAuth("invented-token-1"))
    with poller:
        poller.poll(None)
    assert seen[0].headers["authorization"] == "Bearer invented-token-1"


def test_basic_auth_header_matches_httpx() -> None:
    seen: list[httpx.Request] = []

    def handler(request: httpx.Request) -> httpx.Response:
        seen.append(request)
        return httpx.Response(200, json=searchset([]))

    poller, _ = make(handler, auth=BasicAuth("gasgap", "not-a-real-secret"))
    with poller:
        poller.poll(None)
    reference = httpx.Request("GET", BASE)
    reference = next(httpx.BasicAuth("gasgap", "not-a-real-secret").auth_flow(reference))
    assert seen[0].headers["authorization"] == reference.headers["authorization"]


def test_next_link_to_another_host_is_refused() -> None:
    page = searchset([], next_url="https://elsewhere.invalid/fhir/Observation?page=2")
    poller, _ = make(lambda request: httpx.Response(200, json=page))
    with poller, pytest.raises(FhirSourceError, match="leaves"):
        poller.poll(None)


def test_watermark_is_the_latest_last_updated_and_never_earlier_than_since() -> None:
    older = s.quantity_obs("o1", "2703-7", 10, "kPa")
    older["meta"] = {"versionId": "1", "lastUpdated": "2026-11-30T08:00:01.250+00:00"}
    newer = s.quantity_obs("o2", "2703-7", 11, "kPa")
    newer["meta"] = {"versionId": "4", "lastUpdated": "2026-11-30T09:30:00Z"}
    poller, _ = make(serve({"1": searchset([newer, older])}))
    with poller:
        batch = poller.poll(datetime(2026, 11, 30, 7, 0, tzinfo=UTC))
        assert batch.watermark == datetime(2026, 11, 30, 9, 30, tzinfo=UTC)
    empty, _ = make(serve({"1": searchset([])}))
    since = datetime(2026, 11, 30, 7, 0, tzinfo=UTC)
    with empty:
        assert empty.poll(since).watermark == since


def test_a_page_that_is_not_a_bundle_is_a_source_error() -> None:
    poller, _ = make(lambda request: httpx.Response(200, content=b"<html>maintenance</html>"))
    with poller, pytest.raises(FhirSourceError, match="not JSON"):
        poller.poll(None)


def test_an_entry_repeated_across_pages_is_read_once() -> None:
    obs = s.quantity_obs("o1", "2703-7", 10, "kPa", version="2")
    pages = {
        "1": searchset([obs], next_url=f"{BASE}/Observation?page=2"),
        "2": searchset([obs]),  # the result set shifted under offset paging
    }
    poller, _ = make(serve(pages))
    with poller:
        batch = poller.poll(None)
    assert len(batch.readings) == 1
    assert batch.skipped["repeated search entry"] == 1
