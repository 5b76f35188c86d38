"""Ingest: a file through the whole pipeline (parse, store, pair, derive, rules) on
SQLite, against the floor measured in the same run over the same file.

The floor is the simplest path that still reads and keeps the file: for FHIR NDJSON,
``orjson`` per line and a batched SQLAlchemy Core insert of the raw resources into a
plain table; for HL7 v2, the messages split, parsed with python-hl7 and each OBX
inserted raw the same way. Both rates are given in the pipeline's readings per second
(the same readings, over each path's time), so their ratio is the ratio of times.
Goal: the pipeline at least half the floor's rate.
"""

from __future__ import annotations

import argparse
import tempfile
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from bench.common import emit, feed, heading, line, rate, run_worker, stopwatch

MODULE = "bench.ingest"
BATCH = 500


def pipeline_ingest(path: Path, db_url: str) -> dict[str, Any]:
    """The whole path, as ``gasgap ingest`` runs it (batches of 200 readings)."""
    from monitor.config import default_config
    from monitor.ingest import SourceContext, ingest_files
    from monitor.pipeline import Pipeline
    from storage.db import open_database

    config = default_config()
    context = SourceContext(site_tz=config.zone(), patient_id_system=config.site.patient_id_system)
    db = open_database(db_url)
    pipeline = Pipeline(db, config.to_pipeline_settings())
    try:
        with stopwatch() as watch:
            report = ingest_files([path], pipeline, context, now=lambda: datetime.now(UTC))
    finally:
        db.dispose()
    readings = report.stored + report.duplicates
    return {
        "seconds": round(watch.seconds, 3),
        "readings": readings,
        "stored": report.stored,
        "duplicates": report.duplicates,
        "quarantined": report.quarantined,
        "derivations": report.derivations,
        "notifications": report.notifications,
        "readings_per_s": round(rate(readings, watch.seconds), 1),
    }


def _raw_table(db_url: str) -> tuple[Any, Any]:
    import sqlalchemy as sa

    from storage.db import create_engine

    metadata = sa.MetaData()
    table = sa.Table(
        "raw_items",
        metadata,
        sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("kind", sa.String, nullable=False),
        sa.Column("item_key", sa.String, nullable=True),
        sa.Column("body", sa.Text, nullable=False),
    )
    engine = create_engine(db_url)  # the same SQLite settings as gasgap's own database
    metadata.create_all(engine)
    return engine, table


def floor_fhir(path: Path, db_url: str) -> dict[str, Any]:
    """orjson per line, raw rows inserted in batches: the least a FHIR loader can do."""
    import orjson
    import sqlalchemy as sa

    engine, table = _raw_table(db_url)
    rows: list[dict[str, Any]] = []
    count = 0
    insert = sa.insert(table)
    with stopwatch() as watch, engine.begin() as conn:
        with open(path, "rb") as fh:
            for raw in fh:
                if not raw.strip():
                    continue
                item = orjson.loads(raw)
                rows.append(
                    {
                        "kind": item.get("resourceType", ""),
                        "item_key": item.get("id"),
                        "body": raw.decode("utf-8"),
                    }
                )
                count += 1
                if len(rows) >= BATCH:
                    conn.execute(insert, rows)
                    rows = []
        if rows:
            conn.execute(insert, rows)
    engine.dispose()
    return {"seconds": round(watch.seconds, 3), "items": count}


def floor_hl7(path: Path, db_url: str) -> dict[str, Any]:
    """Messages split, parsed with python-hl7, each OBX inserted raw in batches."""
    import hl7
    import sqlalchemy as sa

    from adapters.hl7v2.files import iter_hl7_file

    engine, table = _raw_table(db_url)
    rows: list[dict[str, Any]] = []
    count = 0
    insert = sa.insert(table)
    with stopwatch() as watch, engine.begin() as conn:
        for raw in iter_hl7_file(path, on_oversized=lambda at, head: None):
            message = hl7.parse(raw.decode("utf-8", errors="replace"))
            control = str(message.segment("MSH")[10])
            for segment in message:
                if str(segment[0]) == "OBX":
                    rows.append({"kind": "OBX", "item_key": control, "body": str(segment)})
                    count += 1
            if len(rows) >= BATCH:
                conn.execute(insert, rows)
                rows = []
        if rows:
            conn.execute(insert, rows)
    engine.dispose()
    return {"seconds": round(watch.seconds, 3), "items": count}


def run(*, beds: int, days: float) -> dict[str, Any]:
    """Both formats: floor then pipeline, each in its own process and database."""
    directory = feed(beds, days)
    heading(f"ingest: {beds}-bed ICU, {days:g} days (fixtures.generate icu), SQLite file")
    results: dict[str, Any] = {}
    for kind, name in (("fhir", "feed-ehr.ndjson"), ("hl7", "feed-lab.hl7")):
        path = directory / name
        with tempfile.TemporaryDirectory(prefix="gasgap-bench-") as tmp:
            floor = run_worker(
                MODULE,
                [
                    "--mode",
                    f"floor-{kind}",
                    "--path",
                    str(path),
                    "--db-url",
                    f"sqlite:///{tmp}/floor.db",
                ],
            )
            full = run_worker(
                MODULE,
                [
                    "--mode",
                    "pipeline",
                    "--path",
                    str(path),
                    "--db-url",
                    f"sqlite:///{tmp}/gasgap.db",
                ],
            )
        readings = full["readings"]
        floor_rate = rate(readings, floor["seconds"])
        ratio = full["readings_per_s"] / floor_rate
        size = path.stat().st_size / 1e6
        line(f"{kind}: file", f"{name}, {size:.1f} MB, {readings} readings")
        line(
            f"{kind}: floor ({floor['items']} raw rows)",
            f"{floor['seconds']:.2f} s = {floor_rate:,.0f} readings/s",
        )
        line(
            f"{kind}: pipeline",
            f"{full['seconds']:.2f} s = {full['readings_per_s']:,.0f} "
            f"readings/s ({full['derivations']} derivations, {full['notifications']} "
            "notifications)",
        )
        line(
            f"{kind}: pipeline / floor",
            f"{ratio:.3f} (goal >= 0.5: "
            f"{'met' if ratio >= 0.5 else f'missed, {0.5 / ratio:.0f}x short'})",
        )
        line(
            f"{kind}: peak memory pipeline / floor",
            f"{full['peak_rss_mib']:.0f} / {floor['peak_rss_mib']:.0f} MiB",
        )
        results[kind] = {"floor": floor, "pipeline": full, "ratio": round(ratio, 4)}
    return results


def _worker(argv: list[str]) -> None:
    parser = argparse.ArgumentParser(prog=f"python -m {MODULE} --worker")
    parser.add_argument("--mode", choices=["pipeline", "floor-fhir", "floor-hl7"], required=True)
    parser.add_argument("--path", type=Path, required=True)
    parser.add_argument("--db-url", required=True)
    args = parser.parse_args(argv)
    if args.mode == "pipeline":
        emit(pipeline_ingest(args.path, args.db_url))
    elif args.mode == "floor-fhir":
        emit(floor_fhir(args.path, args.db_url))
    else:
        emit(floor_hl7(args.path, args.db_url))


if __name__ == "__main__":
    import sys

    if sys.argv[1:2] == ["--worker"]:
        _worker(sys.argv[2:])
    else:
        run(beds=3, days=7)
