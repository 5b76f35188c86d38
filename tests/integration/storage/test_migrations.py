"""Opening the database and Alembic migrations, on both engines."""

from __future__ import annotations

import sqlite3
import threading
from pathlib import Path

import pytest
import sqlalchemy as sa
from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from alembic.script import ScriptDirectory

from storage.db import alembic_config, open_database, set_wal_mode, upgrade
from storage.tables import metadata

EXPECTED_TABLES = {
    "patients",
    "readings",
    "quarantine",
    "source_cursors",
    "derivations",
    "derivation_inputs",
    "alerts",
    "alert_events",
    "outbox",
    "patient_links",
    "quarantine_payloads",
    "censored_results",
}


def _schema(url: str) -> tuple[set[str], str | None, dict[str, list[str]]]:
    engine = sa.create_engine(url)
    try:
        inspector = sa.inspect(engine)
        tables = set(inspector.get_table_names())
        indexes = {t: sorted(i["name"] or "" for i in inspector.get_indexes(t)) for t in tables}
        with engine.connect() as conn:
            revision = MigrationContext.configure(conn).get_current_revision()
        return tables, revision, indexes
    finally:
        engine.dispose()


def test_upgrade_from_empty_creates_every_table(db_url: str) -> None:
    assert _schema(db_url)[0] == set()
    upgrade(db_url)
    tables, revision, _ = _schema(db_url)
    assert tables == EXPECTED_TABLES | {"alembic_version"}
    # the newest migration in storage/migrations/versions (one head, no branches)
    heads = ScriptDirectory.from_config(alembic_config()).get_heads()
    assert len(heads) == 1
    assert revision == heads[0]


def test_second_upgrade_changes_nothing(db_url: str) -> None:
    upgrade(db_url)
    first = _schema(db_url)
    upgrade(db_url)
    assert _schema(db_url) == first


def test_migrated_schema_matches_the_tables_module(db_url: str) -> None:
    upgrade(db_url)
    engine = sa.create_engine(db_url)
    try:
        with engine.connect() as conn:
            context = MigrationContext.configure(conn, opts={"compare_type": True})
            differences = compare_metadata(context, metadata)
    finally:
        engine.dispose()
    assert differences == []


def test_open_database_defaults_to_gasgap_db_in_the_working_directory(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.chdir(tmp_path)
    db = open_database()
    try:
        assert db.dialect_name == "sqlite"
        assert (tmp_path / "gasgap.db").exists()
        with db.begin(read_only=True) as conn:
            assert conn.execute(sa.text("select count(*) from readings")).scalar_one() == 0
    finally:
        db.dispose()


def test_sqlite_connections_use_wal_foreign_keys_and_a_busy_timeout(sqlite_url: str) -> None:
    db = open_database(sqlite_url)
    try:
        with db.begin() as conn:
            pragma = {
                name: conn.exec_driver_sql(f"PRAGMA {name}").scalar()
                for name in ("journal_mode", "foreign_keys", "busy_timeout", "synchronous")
            }
    finally:
        db.dispose()
    # synchronous=1 is NORMAL (SQLite documentation, "PRAGMA synchronous").
    assert pragma == {
        "journal_mode": "wal",
        "foreign_keys": 1,
        "busy_timeout": 10000,
        "synchronous": 1,
    }


class _BusyCursor:
    """A DBAPI cursor whose journal-mode change is refused ``busy`` times, as SQLite
    refuses it (at once, no busy handler) while another process's last connection to
    the file closes."""

    def __init__(self, busy: int, error: str = "database is locked") -> None:
        self.busy = busy
        self.error = error
        self.tries = 0

    def execute(self, statement: str) -> None:
        assert statement == "PRAGMA journal_mode=WAL"
        self.tries += 1
        if self.tries <= self.busy:
            exc = sqlite3.OperationalError(self.error)
            exc.sqlite_errorcode = sqlite3.SQLITE_BUSY if "locked" in self.error else 1
            raise exc


class _Clock:
    def __init__(self) -> None:
        self.now = 0.0
        self.pauses: list[float] = []

    def sleep(self, seconds: float) -> None:
        self.pauses.append(seconds)
        self.now += seconds


def test_a_busy_answer_to_the_journal_mode_change_is_retried() -> None:
    cursor, clock = _BusyCursor(busy=3), _Clock()
    set_wal_mode(cursor, wait_s=10, sleep=clock.sleep, clock=lambda: clock.now)
    assert cursor.tries == 4 and len(clock.pauses) == 3


def test_a_journal_mode_change_busy_past_the_timeout_fails() -> None:
    cursor, clock = _BusyCursor(busy=10**6), _Clock()
    with pytest.raises(sqlite3.OperationalError, match="locked"):
        set_wal_mode(cursor, wait_s=10, sleep=clock.sleep, clock=lambda: clock.now)
    # Gave up once the busy timeout had passed, not before and not much after.
    assert 10 <= clock.now <= 10.2


def test_a_journal_mode_change_failing_otherwise_is_not_retried() -> None:
    cursor, clock = _BusyCursor(busy=1, error="disk I/O error"), _Clock()
    with pytest.raises(sqlite3.OperationalError, match="disk I/O"):
        set_wal_mode(cursor, wait_s=10, sleep=clock.sleep, clock=lambda: clock.now)
    assert cursor.tries == 1 and clock.pauses == []


def test_in_memory_sqlite_keeps_one_database_across_transactions() -> None:
    db = open_database("sqlite://")
    try:
        with db.begin() as conn:
            conn.execute(
                sa.text(
                    "insert into quarantine (source, received_at, reason, "
                    "reason_key, raw_text, payload_size, truncated) values "
                    "('replay', '2026-03-14 06:00:00', 'x', 'x', 'x', 1, 0)"
                )
            )
        with db.begin(read_only=True) as conn:
            assert conn.execute(sa.text("select count(*) from quarantine")).scalar_one() == 1
    finally:
        db.dispose()


def test_rollback_on_error_leaves_nothing_behind(db_url: str) -> None:
    db = open_database(db_url)
    try:
        with pytest.raises(RuntimeError), db.begin() as conn:
            conn.execute(
                sa.text(
                    "insert into source_cursors (source, updated_at) "
                    "values ('fhir-poll', CURRENT_TIMESTAMP)"
                )
            )
            raise RuntimeError("step failed")
        with db.begin(read_only=True) as conn:
            assert conn.execute(sa.text("select count(*) from source_cursors")).scalar_one() == 0
    finally:
        db.dispose()


def test_processes_starting_together_migrate_once(db_url: str) -> None:
    errors: list[BaseException] = []

    def start() -> None:
        try:
            upgrade(db_url)
        except BaseException as exc:  # reported to the main thread below
            errors.append(exc)

    threads = [threading.Thread(target=start, daemon=True) for _ in range(3)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert not any(t.is_alive() for t in threads), "a migration is stuck waiting"
    assert errors == []
    tables, revision, _ = _schema(db_url)
    heads = ScriptDirectory.from_config(alembic_config()).get_heads()
    assert tables == EXPECTED_TABLES | {"alembic_version"} and [revision] == heads


def test_upgrade_refuses_an_in_memory_url() -> None:
    with pytest.raises(ValueError, match="in memory"):
        upgrade("sqlite://")
