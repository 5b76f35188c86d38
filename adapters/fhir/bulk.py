"""FHIR Bulk Data Access ``$export`` client: the backfill of a new site.

The flow (Bulk Data Access IG v2, reference sheet section 12):

1. kick-off: ``GET [base]/$export`` (system), ``[base]/Patient/$export`` or
   ``[base]/Group/[id]/$export`` with ``Prefer: respond-async``, ``_type``,
   ``_typeFilter`` and ``_since``; the server answers 202 with ``Content-Location``, the
   status URL;
2. status: ``GET`` the status URL until it answers 200 with the manifest (202 while
   running, with ``X-Progress`` and ``Retry-After``, both honoured);
3. download each output file (NDJSON, one or more per resource type), with the access
   token when the manifest says ``requiresAccessToken``;
4. ``DELETE`` the status URL: the server may drop the job and its files.

Every step is written to a small state file in the download folder
(``export-state.json``) before the next one starts, so a crash or a restart carries on:
the job is not kicked off again, finished files are not fetched again, and a file cut
off mid-way is fetched again whole (it is written to ``.part`` and renamed when
complete).

No reading is made here: the files are read by the caller through the historical
ingest path. ``combine_for_loading`` writes them as one NDJSON file in the order that
path reads best (patients, encounters, then observations by ``meta.lastUpdated``).
"""

from __future__ import annotations

import email.utils
import json
import logging
import os
import re
import time
from collections.abc import Callable, Iterable
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime
from enum import StrEnum
from pathlib import Path
from typing import Any, Protocol
from urllib.parse import quote, urljoin, urlsplit

import httpx
import orjson

from adapters.codes import LOINC, CodeTable
from adapters.fhir.poller import BasicAuth, BearerAuth
from adapters.fhir.smart import SmartAuth, SmartAuthError
from monitor.engine.errors import MonitorError
from monitor.engine.model import Kind

log = logging.getLogger("gasgap.fhir.bulk")

STATE_FILE = "export-state.json"
STATE_VERSION = 1
#: What gasgap reads from an export.
DEFAULT_TYPES = ("Patient", "Encounter", "Observation")
_RETRY_STATUS = {429, 500, 502, 503, 504}
_TYPE_NAME = re.compile(r"^[A-Z][A-Za-z]{1,63}$")


class ExportLevel(StrEnum):
    SYSTEM = "system"
    PATIENT = "patient"
    GROUP = "group"


class BulkExportError(MonitorError, RuntimeError):
    """The export cannot go on; the message says which step failed and what to do."""


@dataclass(frozen=True, slots=True)
class ExportRequest:
    """What to export. ``since`` is sent as ``_since`` (resources changed after it)."""

    level: ExportLevel = ExportLevel.SYSTEM
    group_id: str | None = None
    types: tuple[str, ...] = DEFAULT_TYPES
    type_filters: tuple[str, ...] = ()
    since: datetime | None = None

    def __post_init__(self) -> None:
        if (self.level is ExportLevel.GROUP) != (self.group_id is not None):
            raise ValueError("a group id is given with, and only with, the group level")
        if self.group_id is not None and not re.fullmatch(r"[A-Za-z0-9\-.]{1,64}", self.group_id):
            raise ValueError(f"group id {self.group_id!r} is not a FHIR id")
        for name in self.types:
            if not _TYPE_NAME.match(name):
                raise ValueError(f"_type {name!r} is not a resource type name")
        if self.since is not None and self.since.tzinfo is None:
            raise ValueError("since must carry a time zone")

    def path(self) -> str:
        if self.level is ExportLevel.GROUP:
            return f"Group/{self.group_id}/$export"
        return "Patient/$export" if self.level is ExportLevel.PATIENT else "$export"

    def params(self) -> list[tuple[str, str | int | float | bool | None]]:
        out: list[tuple[str, str | int | float | bool | None]] = [("_type", ",".join(self.types))]
        out += [("_typeFilter", f) for f in self.type_filters]
        if self.since is not None:
            out.append(("_since", _instant(self.since)))
        return out

    def as_state(self) -> dict[str, Any]:
        return {"path": self.path(), "params": [list(p) for p in self.params()]}


def observation_type_filter(codes: CodeTable) -> str:
    """``_typeFilter`` for the Observations gasgap maps: one query whose ``code`` lists
    every LOINC code gasgap reads (a comma-separated OR, FHIR search).

    The query's values are percent-encoded, so its commas are not read as the commas
    that separate several ``_typeFilter`` queries (Bulk Data IG v2 asks for an encoded
    query; from memory). A panel's own code (e.g. a gas panel that only points at its
    members) is not in the list, so the members come without their panel and are tied
    by time instead.
    """
    tokens = [quote(f"{LOINC}|{code}", safe="") for code in codes.codes_for(list(Kind), LOINC)]
    return "Observation?code=" + "%2C".join(tokens)


class ExportProgress(Protocol):
    """What the caller shows while an export runs (a bar on a terminal, lines in a log)."""

    def status(self, text: str, wait_s: float) -> None: ...
    def file_started(self, name: str, index: int, count: int) -> None: ...
    def file_bytes(self, size: int) -> None: ...
    def file_done(self, name: str, size: int) -> None: ...


class QuietProgress:
    def status(self, text: str, wait_s: float) -> None:
        log.info("export: %s; next check in %.0f s", text, wait_s)

    def file_started(self, name: str, index: int, count: int) -> None:
        pass

    def file_bytes(self, size: int) -> None:
        pass

    def file_done(self, name: str, size: int) -> None:
        log.info("export: %s downloaded (%d bytes)", name, size)


@dataclass(slots=True)
class ExportFile:
    url: str
    type: str
    name: str
    count: int | None = None
    done: bool = False
    error: bool = False
    """An ``error`` entry of the manifest (OperationOutcome NDJSON), not data."""


@dataclass(slots=True)
class ExportState:
    base_url: str
    request: dict[str, Any]
    status_url: str | None = None
    kicked_off_at: str | None = None
    transaction_time: str | None = None
    requires_token: bool = True
    files: list[ExportFile] = field(default_factory=list)
    manifest_read: bool = False
    deleted: bool = False
    loaded: bool = False
    version: int = STATE_VERSION

    def save(self, folder: Path) -> None:
        path = folder / STATE_FILE
        tmp = path.with_suffix(".tmp")
        tmp.write_bytes(orjson.dumps(asdict(self), option=orjson.OPT_INDENT_2))
        os.replace(tmp, path)

    @classmethod
    def load(cls, folder: Path) -> ExportState | None:
        path = folder / STATE_FILE
        if not path.exists():
            return None
        try:
            data = orjson.loads(path.read_bytes())
            if data.get("version") != STATE_VERSION:
                raise ValueError(f"version {data.get('version')!r}")
            data["files"] = [ExportFile(**f) for f in data.get("files") or []]
            return cls(**data)
        except (orjson.JSONDecodeError, TypeError, ValueError) as exc:
            raise BulkExportError(
                f"{path}: the export state cannot be read ({exc}); remove the folder's "
                "contents (or give another --dir) to start a new export"
            ) from None


@dataclass(slots=True)
class ExportResult:
    data_files: list[Path]
    error_files: list[Path]
    transaction_time: str | None
    resumed: bool
    state: ExportState


Auth = SmartAuth | BearerAuth | BasicAuth | None


class BulkExporter:
    """Runs (or resumes) one ``$export`` into ``folder``."""

    def __init__(
        self,
        base_url: str,
        folder: Path,
        *,
        auth: Auth = None,
        client: httpx.Client | None = None,
        progress: ExportProgress | None = None,
        sleep: Callable[[float], None] = time.sleep,
        monotonic: Callable[[], float] = time.monotonic,
        max_wait_s: float = 12 * 3600.0,
        max_retries: int = 5,
        timeout_s: float = 120.0,
    ) -> None:
        self.base_url = base_url.rstrip("/")
        self.folder = folder
        self.progress: ExportProgress = progress or QuietProgress()
        self._auth = auth
        self._client = client or httpx.Client(timeout=timeout_s)
        self._sleep = sleep
        self._monotonic = monotonic
        self.max_wait_s = max_wait_s
        self.max_retries = max_retries
        self._origin = urlsplit(self.base_url)[:2]

    def close(self) -> None:
        self._client.close()

    def __enter__(self) -> BulkExporter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # --- the whole run ----------------------------------------------------------------

    def run(self, request: ExportRequest) -> ExportResult:
        """Kick off (or resume) the export, wait for it, download, delete the job."""
        self.folder.mkdir(parents=True, exist_ok=True)
        state = ExportState.load(self.folder)
        resumed = state is not None
        if state is None:
            state = ExportState(self.base_url, request.as_state())
            state.save(self.folder)
        elif state.base_url != self.base_url or state.request != request.as_state():
            raise BulkExportError(
                f"{self.folder} holds another export ({state.base_url} "
                f"{state.request.get('path')}); finish it with the same options, or use "
                "another --dir"
            )
        if state.status_url is None:
            state.status_url = self.kick_off(request)
            state.kicked_off_at = datetime.now(UTC).isoformat()
            state.save(self.folder)
        if not state.manifest_read:
            self._read_manifest(state, self.wait(state.status_url))
            state.save(self.folder)
        self.download(state)
        if not state.deleted:
            self.delete(state.status_url)
            state.deleted = True
            state.save(self.folder)
        return ExportResult(
            data_files=[self.folder / f.name for f in state.files if not f.error],
            error_files=[self.folder / f.name for f in state.files if f.error],
            transaction_time=state.transaction_time,
            resumed=resumed,
            state=state,
        )

    def mark_loaded(self, state: ExportState) -> None:
        state.loaded = True
        state.save(self.folder)

    # --- steps ------------------------------------------------------------------------

    def kick_off(self, request: ExportRequest) -> str:
        url = f"{self.base_url}/{request.path()}"
        headers = {"Accept": "application/fhir+json", "Prefer": "respond-async"}
        response = self._request("GET", url, params=request.params(), headers=headers)
        if response.status_code != 202:
            raise BulkExportError(
                f"$export kick-off at {_path(url)}: HTTP {response.status_code}"
                f"{_outcome(response)}; expected 202 (does the server offer Bulk Data "
                "export at this level?)"
            )
        location = response.headers.get("Content-Location")
        if not location:
            raise BulkExportError(f"$export kick-off at {_path(url)}: 202 without Content-Location")
        status_url = urljoin(url, location)
        self._same_origin(status_url, "status URL")
        log.info("export kicked off at %s", _path(url))
        return str(status_url)

    def wait(self, status_url: str) -> dict[str, Any]:
        """Poll the status URL until the manifest comes; honours Retry-After."""
        started = self._monotonic()
        delay = 1.0
        while True:
            response = self._request("GET", status_url, headers={"Accept": "application/json"})
            if response.status_code == 200:
                try:
                    manifest = response.json()
                except ValueError:
                    raise BulkExportError(
                        f"{_path(status_url)}: the manifest is not JSON"
                    ) from None
                if not isinstance(manifest, dict) or not isinstance(manifest.get("output"), list):
                    raise BulkExportError(f"{_path(status_url)}: the manifest has no output list")
                return manifest
            if response.status_code == 404:
                raise BulkExportError(
                    f"{_path(status_url)}: the export job is gone from the server (expired or "
                    "deleted); remove the download folder's contents to start a new export"
                )
            if response.status_code != 202:
                raise BulkExportError(
                    f"export failed: {_path(status_url)} answered HTTP {response.status_code}"
                    f"{_outcome(response)}"
                )
            wait = _retry_after(response.headers.get("Retry-After"))
            wait = delay if wait is None else min(max(wait, 1.0), 3600.0)
            delay = min(delay * 2, 60.0)
            if self._monotonic() - started + wait > self.max_wait_s:
                raise BulkExportError(
                    f"export not finished after {self.max_wait_s:.0f} s; run the command again "
                    "to carry on waiting (the job is kept)"
                )
            self.progress.status(response.headers.get("X-Progress") or "in progress", wait)
            self._sleep(wait)

    def _read_manifest(self, state: ExportState, manifest: dict[str, Any]) -> None:
        state.transaction_time = str(manifest.get("transactionTime") or "") or None
        state.requires_token = bool(manifest.get("requiresAccessToken", True))
        files: list[ExportFile] = []
        for kind, error in (("output", False), ("error", True)):
            for i, item in enumerate(manifest.get(kind) or []):
                if not isinstance(item, dict) or not isinstance(item.get("url"), str):
                    raise BulkExportError(f"manifest {kind}[{i}] has no url")
                rtype = str(item.get("type") or "unknown")
                safe = re.sub(r"[^A-Za-z0-9]", "", rtype)[:64] or "unknown"
                name = f"{'error-' if error else ''}{len(files) + 1:03d}-{safe}.ndjson"
                count = item.get("count")
                files.append(
                    ExportFile(
                        item["url"],
                        rtype,
                        name,
                        count if isinstance(count, int) else None,
                        error=error,
                    )
                )
        state.files = files
        state.manifest_read = True
        log.info("export complete: %d files", len(files))

    def download(self, state: ExportState) -> None:
        todo = [f for f in state.files if not f.done]
        for index, item in enumerate(state.files, start=1):
            if item.done:
                continue
            self.progress.file_started(item.name, index, len(state.files))
            size = self._fetch_file(item, state.requires_token)
            item.done = True
            state.save(self.folder)
            self.progress.file_done(item.name, size)
        if todo:
            log.info("export: %d files downloaded", len(todo))

    def delete(self, status_url: str) -> None:
        """Tell the server it may drop the job and its files (a refusal is only logged:
        the server drops them when they expire)."""
        try:
            response = self._request("DELETE", status_url, headers={"Accept": "application/json"})
        except BulkExportError as exc:
            log.warning("export job not deleted: %s", exc)
            return
        if response.status_code >= 300 and response.status_code != 404:
            log.warning(
                "export job not deleted: HTTP %d%s; the server drops it when it expires",
                response.status_code,
                _outcome(response),
            )

    # --- HTTP -----------------------------------------------------------------------

    def _fetch_file(self, item: ExportFile, requires_token: bool) -> int:
        if requires_token:
            self._same_origin(item.url, "a file that needs the access token")
        part = self.folder / (item.name + ".part")
        headers = {"Accept": "application/fhir+ndjson"}
        attempt = 0
        while True:
            size = 0
            problem: str
            try:
                smart = self._auth if isinstance(self._auth, SmartAuth) else None
                with self._client.stream(
                    "GET",
                    item.url,
                    headers={**headers, **self._static_headers(requires_token)},
                    auth=smart if requires_token else None,
                ) as response:
                    if response.status_code == 200:
                        with open(part, "wb") as out:
                            for chunk in response.iter_bytes(1 << 16):
                                out.write(chunk)
                                size += len(chunk)
                                self.progress.file_bytes(len(chunk))
                        os.replace(part, self.folder / item.name)
                        return size
                    response.read()
                    problem = f"HTTP {response.status_code}{_outcome(response)}"
                    if response.status_code not in _RETRY_STATUS:
                        raise BulkExportError(
                            f"download of {item.name} ({_path(item.url)}): {problem}"
                            + (
                                "; the export expired: remove the download folder's contents "
                                "to start again"
                                if response.status_code in (404, 410)
                                else ""
                            )
                        )
            except SmartAuthError as exc:
                if not exc.retryable:
                    raise BulkExportError(
                        f"download of {item.name}: no access token: {exc}"
                    ) from None
                problem = str(exc)
            except httpx.TransportError as exc:
                problem = f"{type(exc).__name__}"
            if attempt >= self.max_retries:
                raise BulkExportError(
                    f"download of {item.name}: {problem}; gave up after {attempt} retries "
                    "(run the command again to carry on)"
                )
            attempt += 1
            log.warning("download of %s: %s; retry %d", item.name, problem, attempt)
            self._sleep(min(60.0, 2.0**attempt))

    def _static_headers(self, with_credentials: bool = True) -> dict[str, str]:
        if with_credentials and isinstance(self._auth, BearerAuth | BasicAuth):
            return self._auth.headers()
        return {}

    def _request(
        self,
        method: str,
        url: str,
        *,
        params: list[tuple[str, str | int | float | bool | None]] | None = None,
        headers: dict[str, str],
    ) -> httpx.Response:
        attempt = 0
        while True:
            try:
                response = self._client.request(
                    method,
                    url,
                    params=params,
                    headers={**headers, **self._static_headers()},
                    auth=self._auth if isinstance(self._auth, SmartAuth) else None,
                )
            except SmartAuthError as exc:
                if not exc.retryable:
                    raise BulkExportError(
                        f"{method} {_path(url)}: no access token: {exc}"
                    ) from None
                problem = str(exc)
            except httpx.TransportError as exc:
                problem = f"could not connect ({type(exc).__name__})"
            else:
                if response.status_code not in _RETRY_STATUS:
                    return response
                problem = f"HTTP {response.status_code}"
                wait = _retry_after(response.headers.get("Retry-After"))
                if wait is not None and attempt < self.max_retries:
                    attempt += 1
                    self._sleep(min(wait, 3600.0))
                    continue
            if attempt >= self.max_retries:
                raise BulkExportError(
                    f"{method} {_path(url)}: {problem}; gave up after {attempt} retries "
                    "(run the command again to carry on)"
                )
            attempt += 1
            log.warning("%s %s: %s; retry %d", method, _path(url), problem, attempt)
            self._sleep(min(60.0, 2.0**attempt))

    def _same_origin(self, url: str, what: str) -> None:
        if urlsplit(url)[:2] != self._origin:
            raise BulkExportError(
                f"{what} is on {urlsplit(url).netloc!r}, not on {self.base_url}: refusing to "
                "send credentials there"
            )


# --- loading order ---------------------------------------------------------------------


_RANK = {"Patient": 0, "Encounter": 1}


def combine_for_loading(files: Iterable[Path], out: Path) -> tuple[Path, int]:
    """Write the downloaded NDJSON files as one file: every Patient, then every
    Encounter, then the rest (Observations) in order of ``meta.lastUpdated``, then any
    line that is not a JSON object (left for ingest to quarantine with its reason).

    One file, because each input file is read with its own context; this order lets
    each Observation find its patient and encounter, and the history be judged in the
    order it happened. Memory holds a sort key per line, not the lines. Returns the
    path and the number of lines.
    """
    keys: list[tuple[int, str, int, int, int]] = []
    paths = list(files)
    for index, path in enumerate(paths):
        offset = 0
        with open(path, "rb") as fh:
            for line in fh:
                length = len(line)
                if line.strip():
                    keys.append((*_sort_key(line), index, offset, length))
                offset += length
    keys.sort()
    tmp = out.with_suffix(".tmp")
    handles = [open(p, "rb") for p in paths]  # noqa: SIM115 - closed below
    try:
        with open(tmp, "wb") as dest:
            for _, _, index, offset, length in keys:
                fh = handles[index]
                fh.seek(offset)
                line = fh.read(length)
                dest.write(line if line.endswith(b"\n") else line + b"\n")
    finally:
        for fh in handles:
            fh.close()
    os.replace(tmp, out)
    return out, len(keys)


def _sort_key(line: bytes) -> tuple[int, str]:
    try:
        item = orjson.loads(line)
    except orjson.JSONDecodeError:
        return 3, ""
    if not isinstance(item, dict):
        return 3, ""
    meta = item.get("meta")
    updated = meta.get("lastUpdated") if isinstance(meta, dict) else None
    stamp = _utc_text(updated) if isinstance(updated, str) else ""
    return _RANK.get(str(item.get("resourceType")), 2), stamp


def _utc_text(stamp: str) -> str:
    """An instant as sortable UTC text (unreadable ones sort first, as they came)."""
    try:
        return datetime.fromisoformat(stamp.replace("Z", "+00:00")).astimezone(UTC).isoformat()
    except ValueError:
        return ""


# --- helpers ---------------------------------------------------------------------------


def _instant(when: datetime) -> str:
    return when.astimezone(UTC).isoformat().replace("+00:00", "Z")


def _path(url: str) -> str:
    """Where, without the query (a query may carry patient ids)."""
    parts = urlsplit(url)
    return f"{parts.scheme}://{parts.netloc}{parts.path}"


def _outcome(response: httpx.Response) -> str:
    try:
        data = json.loads(response.content or b"{}")
        issues = data.get("issue") or []
        text = "; ".join(str(i.get("diagnostics") or i.get("code")) for i in issues[:2])
        return f" ({' '.join(text.split())[:200]})" if text else ""
    except (ValueError, AttributeError):
        return ""


def _retry_after(value: str | None) -> float | None:
    if not value:
        return None
    if value.strip().isdigit():
        return float(value.strip())
    try:
        when = email.utils.parsedate_to_datetime(value)
    except (TypeError, ValueError):
        return None
    return max(0.0, (when - datetime.now(UTC)).total_seconds())
