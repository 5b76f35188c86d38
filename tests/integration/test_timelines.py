"""Every path writes the same database: the live pipeline one unit at a time, the
historical load in bulk, with worker processes, and on a Dask cluster.

Feeds: the invented Hollowmere demo (fixtures/demo) and a small generated ICU
(fixtures.generate, invented beds). The live path is fed each unit the moment its
results became known (its own pace, in record order), the historical path the whole
files at once; the tables must be identical row by row, surrogate ids aside.
"""

from __future__ import annotations

import random
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa

from fixtures.generate import write_icu
from monitor.bootstrap import pipeline_settings, source_context
from monitor.config import load_config
from monitor.engine.model import Kind
from monitor.history import LoadOptions, load_files
from monitor.ingest import file_units, merged_units
from monitor.pipeline import Inbound, Pipeline
from storage import alerts as alerts_store
from storage.db import open_database
from tests.unit.engine.readings_factory import BIRTH_DATE, hours, lab, minutes, pao2, reading

ROOT = Path(__file__).resolve().parents[2]
DEMO = sorted((ROOT / "fixtures" / "demo").glob("feed-*"))
EXAMPLE = ROOT / "fixtures" / "site-example.toml"

#: Columns that name a row or count work, not what the row says.
_SKIP = {"id", "derivation_id", "revision", "processed", "claimed_at", "claimed_by"}


def dump(url: str) -> dict[str, list[tuple[Any, ...]]]:
    """Every table as sorted rows of its content columns (derivation inputs keyed by
    the derivation's patient, sample and version instead of its row id)."""
    engine = sa.create_engine(url)
    meta = sa.MetaData()
    meta.reflect(engine)
    out: dict[str, list[tuple[Any, ...]]] = {}
    with engine.connect() as conn:
        versions = {
            row.id: (row.patient_key, row.sample_id, row.version)
            for row in conn.execute(
                sa.text("select id, patient_key, sample_id, version from derivations")
            )
        }
        for name, table in sorted(meta.tables.items()):
            if name in ("alembic_version", "patient_links"):
                # the register's log of when it learnt each name differs by path; what
                # it decided (the patient key on every row) is compared everywhere
                continue
            cols = [c for c in table.columns if c.name not in _SKIP]
            rows = []
            for row in conn.execute(sa.select(*cols)):
                values = tuple(str(v) for v in row)
                if name == "derivation_inputs":
                    full = (
                        conn.execute(
                            sa.select(table.c.derivation_id).where(
                                table.c.reading_logical_id == row.reading_logical_id
                            )
                        )
                        .scalars()
                        .all()
                    )
                    values = values + tuple(sorted(str(versions[i]) for i in full))
                rows.append(values)
            out[name] = sorted(rows)
    engine.dispose()
    return out


def _live(paths: list[Path], url: str) -> None:
    config = load_config(EXAMPLE)
    db = open_database(url)
    try:
        pipeline = Pipeline(db, pipeline_settings(config))
        context = source_context(config)
        fixed = datetime(2026, 6, 1, tzinfo=UTC)
        # What became known at one instant arrives together (one HL7 message, one FHIR
        # poll page), the moment it became known.
        batch, at = Inbound(), None
        for unit in merged_units(paths, context, lambda: fixed):
            known = max((r.known for r in unit.inbound.readings), default=None)
            when = known or unit.record_time or fixed
            if at is not None and when != at:
                pipeline.accept(batch, now=at)
                batch = Inbound()
            batch.extend(unit.inbound)
            at = when
        if at is not None:
            pipeline.accept(batch, now=at)
    finally:
        db.dispose()


def _historical(paths: list[Path], url: str, **options: Any) -> None:
    config = load_config(EXAMPLE)
    db = open_database(url)
    try:
        load_files(
            paths,
            Pipeline(db, pipeline_settings(config)),
            source_context(config),
            LoadOptions(seen_at=None, **options),
            received_at=lambda: datetime(2026, 6, 1, tzinfo=UTC),
        )
    finally:
        db.dispose()


@pytest.fixture(scope="module")
def icu_feed(tmp_path_factory: pytest.TempPathFactory) -> list[Path]:
    out = tmp_path_factory.mktemp("icu")
    write_icu(out, beds=4, days=3, seed=11)
    return sorted(out.iterdir())


@pytest.mark.parametrize("feed", ["demo", "icu"])
def test_live_historical_and_workers_write_the_same_tables(
    feed: str, icu_feed: list[Path], tmp_path: Path
) -> None:
    paths = DEMO if feed == "demo" else icu_feed
    urls = {name: f"sqlite:///{tmp_path / name}.db" for name in ("live", "bulk", "two")}
    _live(paths, urls["live"])
    _historical(paths, urls["bulk"], workers=1)
    _historical(paths, urls["two"], workers=2)
    live, bulk, two = (dump(urls[n]) for n in ("live", "bulk", "two"))
    assert live["alerts"], "the feed raises flags"
    for table in bulk:
        assert bulk[table] == two[table], f"{table}: 2 workers differ from 1"
        assert live[table] == bulk[table], f"{table}: live per unit differs from bulk"


def test_a_dask_cluster_writes_what_one_process_writes(tmp_path: Path) -> None:
    pytest.importorskip("distributed", reason="the dask extra is not installed")
    one, cluster = f"sqlite:///{tmp_path}/one.db", f"sqlite:///{tmp_path}/dask.db"
    _historical(DEMO, one, workers=1)
    _historical(DEMO, cluster, workers=2, dask="local")
    assert dump(one) == dump(cluster)


def test_a_named_dask_scheduler_is_the_one_that_computes(tmp_path: Path) -> None:
    # `--dask ADDRESS` once ignored the address and made a cluster of its own; here a
    # scheduler started by the test must see the patients' tasks.
    distributed = pytest.importorskip("distributed", reason="the dask extra is not installed")
    cluster = distributed.LocalCluster(
        n_workers=1, threads_per_worker=1, processes=True, dashboard_address=None
    )
    client = distributed.Client(cluster)
    try:
        with distributed.get_task_stream(client) as stream:
            _historical(DEMO, f"sqlite:///{tmp_path}/named.db", dask=cluster.scheduler_address)
        keys = [str(task["key"]) for task in stream.data]
    finally:
        client.close()
        cluster.close()
    assert any("_compute_group" in key for key in keys), keys[:5]


def test_an_unreachable_dask_scheduler_is_said_not_replaced(tmp_path: Path) -> None:
    pytest.importorskip("distributed", reason="the dask extra is not installed")
    from monitor.history import DaskUnavailable
    from tests.fhir_server import free_port

    address = f"127.0.0.1:{free_port()}"  # nothing listens there
    with pytest.raises(DaskUnavailable, match=f"--dask {address}: cannot reach"):
        _historical(DEMO, f"sqlite:///{tmp_path}/nowhere.db", dask=address)


def test_file_and_line_order_change_nothing(tmp_path: Path) -> None:
    # One NDJSON file in a shuffled line order, files given in reverse: the same rows.
    ehr = next(p for p in DEMO if p.suffix == ".ndjson")
    lines = ehr.read_text().splitlines()
    random.Random(5).shuffle(lines)
    shuffled = tmp_path / "feed-ehr.ndjson"
    shuffled.write_text("\n".join(lines) + "\n")
    others = [p for p in DEMO if p != ehr]
    a, b = f"sqlite:///{tmp_path}/a.db", f"sqlite:///{tmp_path}/b.db"
    _historical(DEMO, a)
    _historical([shuffled, *reversed(others)], b)
    assert dump(a) == dump(b)


# --- clinical time against absurd times --------------------------------------------------------


def _gas(at: datetime, po2: float, fio2: float, panel: str, known: datetime) -> list[Any]:
    return [
        pao2(po2, at, panel_id=panel, birth_date=BIRTH_DATE, received_at=known),
        lab(Kind.PACO2, 40.0, at, panel_id=panel, received_at=known),
        reading(Kind.FIO2, fio2, at, panel_id=panel, logical_id=f"fio2-{panel}", received_at=known),
    ]


def test_a_result_dated_in_the_future_is_refused_and_does_not_mute_its_patient(
    sqlite_url: str,
) -> None:
    now = datetime(2026, 3, 14, 9, 0, tzinfo=UTC)
    db = open_database(sqlite_url)
    try:
        pipeline = Pipeline(db)
        typo = _gas(now + timedelta(days=730), 95.0, 0.40, "TYPO", known=now)
        report = pipeline.accept(Inbound(typo), now=now)
        assert report.quarantined == 3 and report.stored == 0
        assert all("future" in k for k in report.quarantine_reasons)
        # the real gases after it: P/F 79 (PaO2 63 on FiO2 0.80) is Berlin's severe band
        # (<= 100, JAMA 2012), so it must raise a high flag
        pipeline.accept(
            Inbound(_gas(now + hours(1), 63.0, 0.80, "REAL", known=now + hours(1) + minutes(10))),
            now=now + hours(1) + minutes(10),
        )
        with db.begin() as conn:
            flags = {(a.rule, a.priority.value) for a in alerts_store.open_alerts(conn)}
        assert ("oxygenation-band", "high") in flags
    finally:
        db.dispose()


def test_a_backlog_flush_through_the_pipeline_flags_like_its_own_pace(tmp_path: Path) -> None:
    # Four gases drawn over six hours, delivered after an interface outage in one
    # second, against the same four at their own pace: the same flags.
    t = datetime(2026, 3, 14, 6, 0, tzinfo=UTC)
    values = [(0, 110.0), (2, 70.0), (4, 120.0), (6, 65.0)]  # FiO2 0.40: P/F 275,175,300,162
    gases = [
        _gas(t + hours(h), po2, 0.40, f"G{h}", known=t + hours(h) + minutes(10))
        for h, po2 in values
    ]
    paced_url, flush_url = f"sqlite:///{tmp_path}/p.db", f"sqlite:///{tmp_path}/f.db"
    paced = Pipeline(open_database(paced_url))
    for g in gases:
        paced.accept(Inbound(g), now=g[0].received_at)
    flushed = Pipeline(open_database(flush_url))
    outage_over = t + hours(8)
    for g in gases:  # one after the other within a second, long after they were known
        flushed.accept(Inbound(g), now=outage_over)

    def flags(p: Pipeline) -> list[tuple[str, str, str, str]]:
        with p.db.begin() as conn:
            return sorted(
                (e.rule, e.event, e.priority.value, str(e.at))
                for e in alerts_store.alert_events(conn)
            )

    assert flags(paced) and flags(paced) == flags(flushed)
    paced.db.dispose()
    flushed.db.dispose()


def test_file_units_of_one_file_are_known_in_its_messages_times() -> None:
    # HL7: known = OBX-19 when given, else MSH-7 (HL7 v2.5 chapter 7, from memory)
    config = load_config(EXAMPLE)
    lab_feed = next(p for p in DEMO if p.name == "feed-lab.hl7")
    units = list(file_units(lab_feed, source_context(config)))
    with_readings = [u for u in units if u.inbound.readings]
    assert with_readings
    for unit in with_readings[:20]:
        assert all(r.known_at is not None for r in unit.inbound.readings)
