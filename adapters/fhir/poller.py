"""Poll a FHIR R4 server over REST for new and changed Observations.

One poll searches ``Observation?code=<system|code,...>&_lastUpdated=ge<watermark>
&_count=N`` (plus ``_revinclude=Observation:has-member`` so a panel comes with its
members), follows the Bundle's ``next`` links, then fetches the Patient and Encounter
of every subject and encounter not yet in the poller's cache (``Patient?_id=a,b``),
and reads everything through one ``FhirReadingBuilder``.

Only standard FHIR REST is used, so any conformant server will do. The watermark is
inclusive (``ge``): the boundary resource comes again on the next poll and storage's
idempotent insert by delivery id drops it.
"""

from __future__ import annotations

import base64
import email.utils
import logging
import time
from collections import Counter
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any
from urllib.parse import urlsplit

import httpx
import orjson

from adapters.codes import LOINC, CodeTable
from adapters.fhir.bundles import bundle_entries
from adapters.fhir.limits import split_too_deep
from adapters.fhir.observations import (
    FhirBatch,
    FhirReadingBuilder,
    FhirRejection,
    ObservationRefused,
    content_hash,
    fhir_instant,
    reference_key,
)
from adapters.fhir.smart import SmartAuth, SmartAuthError
from monitor.engine.errors import MonitorError
from monitor.engine.model import CensoredValue, Kind, Reading

log = logging.getLogger("gasgap.fhir.poller")

_RETRY_STATUS = {429, 500, 502, 503, 504}
_MAX_BACKOFF_S = 60.0


class FhirSourceError(MonitorError, RuntimeError):
    """The FHIR server could not be read (after retries, or with a non-retryable answer)."""


@dataclass(frozen=True, slots=True)
class BearerAuth:
    token: str

    def headers(self) -> dict[str, str]:
        return {"Authorization": f"Bearer {self.token}"}


@dataclass(frozen=True, slots=True)
class BasicAuth:
    username: str
    password: str

    def headers(self) -> dict[str, str]:
        pair = f"{self.username}:{self.password}".encode()
        return {"Authorization": "Basic " + base64.b64encode(pair).decode("ascii")}


@dataclass(slots=True)
class PollBatch:
    """What one poll brought.

    ``watermark`` is the latest ``meta.lastUpdated`` seen (or the ``since`` given when
    nothing came). The caller stores it only after committing ``readings`` (and
    quarantining ``rejections``) in the same transaction, so a crash mid-batch makes
    the next poll fetch the batch again rather than lose it.
    """

    readings: list[Reading] = field(default_factory=list)
    rejections: list[FhirRejection] = field(default_factory=list)
    skipped_codes: Counter[str] = field(default_factory=Counter)
    skipped: Counter[str] = field(default_factory=Counter)
    #: Results sent as beyond a limit: kept and shown, never readings.
    censored: list[CensoredValue] = field(default_factory=list)
    watermark: datetime | None = None
    pages: int = 0


class FhirPoller:
    """A REST poller for one FHIR source; keeps Patient/Encounter context between polls."""

    def __init__(
        self,
        base_url: str,
        *,
        codes: CodeTable,
        auth: BearerAuth | BasicAuth | SmartAuth | None = None,
        page_size: int = 100,
        client: httpx.Client | None = None,
        sleep: Callable[[float], None] = time.sleep,
        max_retries: int = 5,
        source_system: str | None = None,
        patient_id_system: str | None = None,
        timeout_s: float = 30.0,
        include_panels: bool = True,
        clock: Callable[[], datetime] = lambda: datetime.now(UTC),
    ) -> None:
        self.base_url = base_url.rstrip("/")
        self.codes = codes
        self.page_size = page_size
        self.max_retries = max_retries
        self.include_panels = include_panels
        self._sleep = sleep
        # SMART tokens change over time: they are added per request by the httpx.Auth
        self._auth: SmartAuth | None = auth if isinstance(auth, SmartAuth) else None
        static = auth.headers() if isinstance(auth, BearerAuth | BasicAuth) else {}
        self._headers = {"Accept": "application/fhir+json", **static}
        self._client = client or httpx.Client(timeout=timeout_s)
        self._origin = urlsplit(self.base_url)[:2]
        self.builder = FhirReadingBuilder(
            codes,
            source_system=source_system or self.base_url,
            patient_id_system=patient_id_system,
            received_at_fn=clock,
        )

    def close(self) -> None:
        """Close the HTTP client (also when it was given: the poller owns it from then on)."""
        self._client.close()
        if self._auth is not None:
            self._auth.close()

    def __enter__(self) -> FhirPoller:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # --- the poll ------------------------------------------------------------------

    def search_codes(self) -> list[str]:
        """``system|code`` tokens of every LOINC code gasgap knows."""
        return [f"{LOINC}|{c}" for c in self.codes.codes_for(list(Kind), LOINC)]

    def poll(self, since: datetime | None) -> PollBatch:
        """Fetch Observations updated at or after ``since`` (all when None).

        Raises FhirSourceError when the server cannot be read; nothing of a failed
        poll is returned, so the caller's watermark stays where it was.
        """
        params: dict[str, str] = {
            "code": ",".join(self.search_codes()),
            "_count": str(self.page_size),
        }
        if since is not None:
            params["_lastUpdated"] = "ge" + since.astimezone(UTC).isoformat().replace("+00:00", "Z")
        if self.include_panels:
            params["_revinclude"] = "Observation:has-member"
        result = PollBatch(watermark=since)
        unique: dict[tuple[object, ...], tuple[dict[str, Any], str | None]] = {}
        for page in self._pages(f"{self.base_url}/Observation", params):
            result.pages += 1
            for resource, full_url in bundle_entries(page, result.skipped):
                # offset paging over a changing result set can repeat an entry
                meta = resource.get("meta") or {}
                version = meta.get("versionId") if resource.get("id") else None
                key: tuple[object, ...] = (
                    resource.get("resourceType"),
                    resource.get("id"),
                    version or content_hash(resource),
                )
                if key in unique:
                    result.skipped["repeated search entry"] += 1
                unique[key] = (resource, full_url)
        found = list(unique.values())
        for resource, _ in found:
            result.watermark = _later(result.watermark, resource, result.skipped)
        # A resource nested too deep is refused unread (kept with its reason) and the
        # watermark moves past it, so the good results behind it still arrive.
        kept, deep = split_too_deep([res for res, _ in found])
        result.rejections += [
            FhirRejection(f"{self.base_url}/Observation", reason, head.encode())
            for _, reason, head in deep
        ]
        found = [found[i] for i in kept]
        self._fetch_context(found)
        self.builder.note_panels(res for res, _ in found)
        batch = FhirBatch()
        for resource, full_url in found:
            self.builder.read(resource, full_url=full_url, into=batch)
        result.readings, result.rejections = batch.readings, result.rejections + batch.rejections
        result.censored = batch.censored
        result.skipped_codes.update(batch.skipped_codes)
        result.skipped.update(batch.skipped)
        log.info(
            "FHIR poll of %s: %d pages, %d readings, %d rejected",
            self.base_url,
            result.pages,
            len(result.readings),
            len(result.rejections),
        )
        return result

    def _fetch_context(self, found: list[tuple[dict[str, Any], str | None]]) -> None:
        wanted: dict[str, set[str]] = {"Patient": set(), "Encounter": set()}
        for resource, _ in found:
            if resource.get("resourceType") != "Observation":
                continue
            for field_name, rtype, cache in (
                ("subject", "Patient", self.builder.patients),
                ("encounter", "Encounter", self.builder.encounters),
            ):
                key = reference_key((resource.get(field_name) or {}).get("reference"))
                if key and key.startswith(f"{rtype}/") and key not in cache:
                    wanted[rtype].add(key.split("/", 1)[1])
        for rtype, ids in wanted.items():
            ordered = sorted(ids)
            for start in range(0, len(ordered), self.page_size):
                chunk = ordered[start : start + self.page_size]
                params = {"_id": ",".join(chunk), "_count": str(self.page_size)}
                for page in self._pages(f"{self.base_url}/{rtype}", params):
                    for resource, full_url in bundle_entries(page, Counter()):
                        self.builder.remember(resource, full_url)

    # --- HTTP ----------------------------------------------------------------------

    def _pages(self, url: str, params: dict[str, str] | None) -> Iterator[dict[str, Any]]:
        next_url: str | None = url
        while next_url:
            page = self._get_json(next_url, params)
            params = None  # a next link carries its own query
            yield page
            next_url = next(
                (
                    link.get("url")
                    for link in page.get("link") or []
                    if link.get("relation") == "next"
                ),
                None,
            )
            if next_url and urlsplit(next_url)[:2] != self._origin:
                raise FhirSourceError(
                    f"next link to {urlsplit(next_url).netloc!r} leaves {self.base_url}: "
                    "refusing to send credentials there"
                )

    def _get_json(self, url: str, params: dict[str, str] | None) -> dict[str, Any]:
        attempt = 0
        # Messages and logs name the path only: a query may carry patient ids (_id=...).
        where = urlsplit(url).path
        while True:
            problem: str
            wait: float | None = None
            try:
                response = self._client.get(
                    url, params=params, headers=self._headers, auth=self._auth
                )
            except SmartAuthError as exc:
                if not exc.retryable:
                    raise FhirSourceError(f"GET {where}: no access token: {exc}") from None
                problem = f"no access token ({exc})"
            except httpx.TimeoutException as exc:
                problem = f"timed out ({type(exc).__name__})"
            except httpx.TransportError as exc:
                problem = f"could not connect ({type(exc).__name__}: {exc})"
            else:
                if response.status_code == 200:
                    return _decode_bundle(where, response.content)
                problem = f"HTTP {response.status_code}{_outcome(response.content)}"
                if response.status_code not in _RETRY_STATUS:
                    raise FhirSourceError(f"GET {where}: {problem}")
                wait = _retry_after(response.headers.get("Retry-After"))
            if attempt >= self.max_retries:
                raise FhirSourceError(
                    f"GET {where}: {problem}; gave up after {self.max_retries} retries"
                )
            delay = min(_MAX_BACKOFF_S, wait if wait is not None else 2.0**attempt)
            log.warning("GET %s: %s; retry %d in %.1f s", where, problem, attempt + 1, delay)
            self._sleep(delay)
            attempt += 1


def _decode_bundle(where: str, body: bytes) -> dict[str, Any]:
    try:
        data = orjson.loads(body)
    except orjson.JSONDecodeError as exc:
        raise FhirSourceError(f"GET {where}: the answer is not JSON: {exc}") from exc
    if not isinstance(data, dict) or data.get("resourceType") != "Bundle":
        raise FhirSourceError(f"GET {where}: expected a Bundle, got {str(data)[:80]!r}")
    return data


def _outcome(body: bytes) -> str:
    """The diagnostics of an OperationOutcome answer, if there is one."""
    try:
        data = orjson.loads(body)
        issues = data.get("issue") or []
        text = "; ".join(str(i.get("diagnostics") or i.get("code")) for i in issues[:2])
        return f" ({text})" if text else ""
    except (orjson.JSONDecodeError, AttributeError):
        return ""


def _retry_after(value: str | None) -> float | None:
    """Retry-After as seconds (delta-seconds or an HTTP date), None when absent or odd."""
    if not value:
        return None
    if value.strip().isdigit():
        return float(value.strip())
    try:
        when = email.utils.parsedate_to_datetime(value)
    except (TypeError, ValueError):
        return None
    return max(0.0, (when - datetime.now(UTC)).total_seconds())


def _later(
    current: datetime | None, resource: dict[str, Any], skipped: Counter[str]
) -> datetime | None:
    """The later of ``current`` and the resource's meta.lastUpdated."""
    stamp = (resource.get("meta") or {}).get("lastUpdated")
    if not stamp:
        return current
    try:
        seen = fhir_instant(str(stamp), "meta.lastUpdated")
    except ObservationRefused:
        skipped["meta.lastUpdated unreadable (watermark not moved by it)"] += 1
        return current
    return seen if current is None or seen > current else current
