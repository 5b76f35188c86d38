"""PostgreSQL: FHIR NDJSON ingest (``bench.ingest``'s pipeline path) on PostgreSQL, by
one process, then two processes at once.

- one process: the whole file;
- two processes, each half the patients (the file split by patient): what a second
  process adds when the work divides cleanly;
- two processes, the same whole file each: every reading arrives twice, so this shows
  the cost of idempotency (the second copy of each delivery is found and dropped) and
  of the two processes waiting on each other's locks.

Each scenario gets a fresh schema on the server (``GASGAP_BENCH_PG_URL``, default the
test server postgresql+psycopg://postgres@127.0.0.1:5432/test), dropped afterwards.
"""

from __future__ import annotations

import os
import tempfile
import uuid
import zlib
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from bench.common import feed, finish_worker, heading, line, rate, start_worker

DEFAULT_PG_URL = "postgresql+psycopg://postgres@127.0.0.1:5432/test"
INGEST = "bench.ingest"


def server_url() -> str:
    return os.environ.get("GASGAP_BENCH_PG_URL", DEFAULT_PG_URL)


@contextmanager
def fresh_schema(url: str) -> Iterator[str]:
    """A new empty schema for one scenario; yields the URL whose search_path is it."""
    import sqlalchemy as sa

    name = f"bench_{uuid.uuid4().hex[:10]}"
    engine = sa.create_engine(url)
    with engine.begin() as conn:
        conn.execute(sa.schema.CreateSchema(name))
    sep = "&" if "?" in url else "?"
    try:
        yield f"{url}{sep}options=-csearch_path%3D{name}"
    finally:
        with engine.begin() as conn:
            conn.execute(sa.schema.DropSchema(name, cascade=True))
        engine.dispose()


def _patient_of(item: dict[str, Any]) -> str:
    if item.get("resourceType") == "Patient":
        return str(item.get("id", ""))
    reference = (item.get("subject") or {}).get("reference", "")
    return str(reference).rsplit("/", 1)[-1]


def split_by_patient(path: Path, out_dir: Path) -> tuple[Path, Path]:
    """The NDJSON file as two files, each with every line of half the patients (by a
    stable hash of the patient id), in the original order."""
    import orjson

    halves = (out_dir / "half-0.ndjson", out_dir / "half-1.ndjson")
    with open(path, "rb") as src, open(halves[0], "wb") as a, open(halves[1], "wb") as b:
        for raw in src:
            if not raw.strip():
                continue
            side = zlib.crc32(_patient_of(orjson.loads(raw)).encode()) % 2
            (a if side == 0 else b).write(raw)
    return halves


def _ingest(paths: list[Path], url: str) -> dict[str, Any]:
    """One worker per path, all at once, on the same database; their figures."""
    # Migrate first, so the workers do not also measure (or race) the schema creation.
    from storage.db import upgrade

    upgrade(url)
    workers = [
        start_worker(INGEST, ["--mode", "pipeline", "--path", str(p), "--db-url", url])
        for p in paths
    ]
    results = [finish_worker(w) for w in workers]
    wall = max(r["seconds"] for r in results)
    readings = sum(r["readings"] for r in results)
    return {
        "wall_s": wall,
        "readings": readings,
        "stored": sum(r["stored"] for r in results),
        "duplicates": sum(r["duplicates"] for r in results),
        "readings_per_s": round(rate(readings, wall), 1),
        "workers": results,
    }


def run(*, beds: int, days: float) -> dict[str, Any]:
    url = server_url()
    heading(f"PostgreSQL: FHIR ingest, {beds}-bed ICU, {days:g} days, {url.split('@')[-1]}")
    try:
        import sqlalchemy as sa

        engine = sa.create_engine(url)
        with engine.connect():
            pass
        engine.dispose()
    except Exception as exc:  # the server is optional for the rest of the benchmarks
        line("skipped", f"PostgreSQL not reachable: {type(exc).__name__}")
        return {"skipped": str(exc)}
    path = feed(beds, days) / "feed-ehr.ndjson"
    results: dict[str, Any] = {}
    with tempfile.TemporaryDirectory(prefix="gasgap-bench-") as tmp:
        halves = list(split_by_patient(path, Path(tmp)))
        scenarios = {
            "one process, whole file": [path],
            "two processes, half the patients each": halves,
            "two processes, the same file each": [path, path],
        }
        for label, paths in scenarios.items():
            with fresh_schema(url) as schema_url:
                figures = _ingest(paths, schema_url)
            results[label] = figures
            line(
                label,
                f"{figures['wall_s']:.1f} s, {figures['readings_per_s']:,.0f} readings/s "
                f"({figures['stored']} stored, {figures['duplicates']} duplicates)",
            )
    one = results["one process, whole file"]["wall_s"]
    two = results["two processes, half the patients each"]["wall_s"]
    same = results["two processes, the same file each"]["wall_s"]
    line("speed-up of two processes (half each)", f"{one / two:.2f}x")
    line("the same file twice at once / once", f"{same / one:.2f}x the time")
    return results


if __name__ == "__main__":
    run(beds=3, days=7)
