"""Bundles and NDJSON files: iterate the resources they carry.

Bundle types handled: ``searchset`` (entries of search mode ``outcome`` are counted,
not read), ``collection``, ``transaction``/``batch`` (an entry whose ``request.method``
is DELETE is counted and ignored: gasgap learns of withdrawn results through
``entered-in-error``, not through deletion), ``history`` and
``subscription-notification`` (same rules). NDJSON is FHIR bulk data: one resource a
line, streamed, never loaded whole.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import orjson

from adapters.fhir.observations import CONTEXT_TYPES, FhirBatch, FhirReadingBuilder, FhirRejection


def bundle_entries(
    bundle: dict[str, Any], skipped: Counter[str]
) -> Iterator[tuple[dict[str, Any], str | None]]:
    """(resource, fullUrl) of each entry gasgap should read; the rest counted in ``skipped``."""
    for entry in bundle.get("entry") or []:
        if not isinstance(entry, dict):
            skipped["malformed Bundle entry"] += 1
            continue
        method = ((entry.get("request") or {}).get("method") or "").upper()
        if method == "DELETE":
            skipped["DELETE entry"] += 1
            continue
        if (entry.get("search") or {}).get("mode") == "outcome":
            skipped["search outcome entry"] += 1
            continue
        resource = entry.get("resource")
        if not isinstance(resource, dict):
            skipped["Bundle entry without resource"] += 1
            continue
        yield resource, entry.get("fullUrl")


def read_bundle(builder: FhirReadingBuilder, bundle: dict[str, Any]) -> FhirBatch:
    """Read one Bundle: context (Patient, Encounter, Specimen, DiagnosticReport) first,
    panels noted, then the rest, so the order of entries inside the Bundle does not
    matter."""
    batch = FhirBatch()
    if bundle.get("resourceType") != "Bundle":
        return builder.read(bundle)
    entries = list(bundle_entries(bundle, batch.skipped))
    builder.note_panels(res for res, _ in entries)
    context_first = sorted(
        entries, key=lambda e: 0 if e[0].get("resourceType") in CONTEXT_TYPES else 1
    )
    for resource, full_url in context_first:
        if resource.get("resourceType") == "Bundle":
            batch.extend(read_bundle(builder, resource))
        else:
            builder.read(resource, full_url=full_url, into=batch)
    return batch


def read_bundle_bytes(
    builder: FhirReadingBuilder, body: bytes, source: str = "Bundle"
) -> FhirBatch:
    """Decode JSON (orjson) and read it; invalid JSON is one rejection, not an exception."""
    try:
        data = orjson.loads(body)
    except orjson.JSONDecodeError as exc:
        batch = FhirBatch()
        batch.rejections.append(FhirRejection(source, f"{source}: invalid JSON: {exc}", body))
        return batch
    if not isinstance(data, dict):
        batch = FhirBatch()
        batch.rejections.append(FhirRejection(source, f"{source}: not a JSON object", body))
        return batch
    return read_bundle(builder, data)


def iter_ndjson(path: str | Path) -> Iterator[tuple[int, bytes | dict[str, Any]]]:
    """(line number, resource) for each line of an NDJSON file, streamed.

    A line that is not a JSON object comes back as its raw bytes (the caller rejects
    it with ``ndjson_line_reason``); blank lines are passed over. Line numbers start
    at 1.
    """
    with open(path, "rb") as fh:
        for number, line in enumerate(fh, start=1):
            stripped = line.strip()
            if not stripped:
                continue
            try:
                data = orjson.loads(stripped)
            except orjson.JSONDecodeError:
                yield number, stripped
                continue
            yield number, (data if isinstance(data, dict) else stripped)


def ndjson_line_reason(number: int, raw: bytes) -> str:
    """Why a raw NDJSON line was not a resource: 'line 17: invalid JSON: ...'."""
    try:
        orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        return f"line {number}: invalid JSON: {exc}"
    return f"line {number}: not a JSON object (a FHIR resource)"


def read_ndjson(builder: FhirReadingBuilder, path: str | Path) -> FhirBatch:
    """Read an NDJSON file line by line. Bad lines are rejected; the others go on.

    Resources are read in file order. Identity does not depend on it (readings that
    come before their Patient get a provisional key, re-keyed when the link is learnt:
    ``FhirBatch.rekeys``); Specimen and panel context does, so a caller that can should
    pass context files first, or read them with ``builder.remember`` beforehand.
    """
    batch = FhirBatch()
    name = Path(path).name
    for number, item in iter_ndjson(path):
        if isinstance(item, bytes):
            batch.rejections.append(
                FhirRejection(f"{name}:{number}", ndjson_line_reason(number, item), item)
            )
            continue
        before = len(batch.rejections)
        builder.note_panels([item])
        builder.read(item, into=batch)
        for i in range(before, len(batch.rejections)):
            rej = batch.rejections[i]
            batch.rejections[i] = FhirRejection(rej.source, f"line {number}: {rej.reason}", rej.raw)
    return batch
