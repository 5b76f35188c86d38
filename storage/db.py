"""Opening the database: engine, connection settings, migrations.

SQLite (the default, ``sqlite:///gasgap.db`` in the working directory) serves one
hospital on one host; PostgreSQL (``postgresql+psycopg://...``) serves several gasgap
processes. Every storage function takes a ``Connection`` inside a transaction the
caller owns, so one pipeline step (reading stored, derivation saved, alert changed,
notification queued) commits or rolls back as a whole::

    db = open_database("sqlite:///gasgap.db")
    with db.begin() as conn:
        store_readings(conn, readings)

SQLite settings, set on every new connection: write-ahead log (readers never wait for
the writer), foreign keys on, a busy timeout (a second writer waits instead of failing
at once), ``synchronous=NORMAL`` (safe with WAL: a power cut can lose the last
commits, never corrupt the file). Write transactions start with ``BEGIN IMMEDIATE`` so
two processes do not both read, then both try to upgrade to a write lock and deadlock.
Within one process, writers take turns at the file in the order they came
(``storage.turns``), so none waits behind a stream of later transactions; the switch to
WAL on a new connection is retried while SQLite answers busy without waiting
(``set_wal_mode``).

``sqlite://`` (no path) is an in-memory database for replay: one connection shared by
everything (``StaticPool``), gone when the process ends.

Every engine built here translates a database that cannot be used now (unreachable,
locked, timed out, gone) into ``storage.errors.StorageUnavailable``, naming the database
with any password masked, whether it failed on connecting or inside a transaction.
"""

from __future__ import annotations

import sqlite3
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import sqlalchemy as sa
from alembic import command
from alembic.config import Config
from sqlalchemy.engine import Connection, Engine
from sqlalchemy.pool import StaticPool

from storage.errors import StorageRefused, pool_exhausted, translate
from storage.locks import advisory_lock
from storage.turns import WriteTurns, turns_for

DEFAULT_URL = "sqlite:///gasgap.db"
#: How long a SQLite writer waits for another writer before giving up (milliseconds).
SQLITE_BUSY_TIMEOUT_MS = 10_000
MIGRATIONS_DIR = Path(__file__).resolve().parent / "migrations"

# Execution option read by the SQLite "begin" hook: a read-only transaction uses a
# plain (deferred) BEGIN so readers never queue behind the writer.
_READ_ONLY = "gasgap_read_only"


@dataclass(frozen=True)
class Database:
    """An opened database: the engine plus the way to start a transaction."""

    engine: Engine
    url: str
    #: First come, first served turns at a SQLite file's write lock (storage/turns.py);
    #: None for PostgreSQL and an in-memory database.
    write_turns: WriteTurns | None = None

    @property
    def dialect_name(self) -> str:
        """``"sqlite"`` or ``"postgresql"``."""
        return self.engine.dialect.name

    @contextmanager
    def begin(self, *, read_only: bool = False) -> Iterator[Connection]:
        """A connection in a transaction: committed on success, rolled back on error.

        ``read_only=True`` is a promise the caller makes (the board, reports); on SQLite
        it avoids taking the write lock.
        """
        if read_only or self.write_turns is None:
            with self._transaction(read_only) as conn:
                yield conn
            return
        with self.write_turns.turn(SQLITE_BUSY_TIMEOUT_MS / 1000), self._transaction(False) as conn:
            yield conn

    @contextmanager
    def _transaction(self, read_only: bool) -> Iterator[Connection]:
        try:
            connection = self.engine.connect()
        except sa.exc.TimeoutError as exc:
            raise pool_exhausted(self.engine.url, exc) from exc
        with connection as conn:
            if read_only:
                conn = conn.execution_options(**{_READ_ONLY: True})
            with conn.begin():
                yield conn

    def dispose(self) -> None:
        """Close every pooled connection."""
        self.engine.dispose()


def is_memory_sqlite(url: str | sa.URL) -> bool:
    parsed = sa.make_url(url)
    return parsed.get_backend_name() == "sqlite" and parsed.database in (None, "", ":memory:")


def create_engine(url: str) -> Engine:
    """An engine with gasgap's connection settings for the URL's dialect, whose
    errors of a database that cannot be used now are ``StorageUnavailable``."""
    parsed = sa.make_url(url)
    if parsed.get_backend_name() == "sqlite":
        engine = _sqlite_engine(parsed)
    else:
        engine = sa.create_engine(parsed, pool_pre_ping=True)
    sa.event.listen(engine, "handle_error", translate, retval=True)
    return engine


def _sqlite_engine(url: sa.URL) -> Engine:
    # The busy wait holds from the connection's first statement (the journal-mode
    # change below needs a lock too, and several processes may open a new file at once).
    kwargs: dict[str, Any] = {"connect_args": {"timeout": SQLITE_BUSY_TIMEOUT_MS / 1000}}
    memory = is_memory_sqlite(url)
    if memory:
        kwargs = {"poolclass": StaticPool, "connect_args": {"check_same_thread": False}}
    engine = sa.create_engine(url, **kwargs)

    @sa.event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection: Any, _record: Any) -> None:
        # Take transaction control away from the sqlite3 module (its legacy mode
        # starts transactions late and skips them for DDL); the "begin" hook below
        # emits BEGIN itself.
        dbapi_connection.isolation_level = None
        cursor = dbapi_connection.cursor()
        try:
            cursor.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_TIMEOUT_MS:d}")
            if not memory:
                set_wal_mode(cursor)
                cursor.execute("PRAGMA synchronous=NORMAL")
            cursor.execute("PRAGMA foreign_keys=ON")
        finally:
            cursor.close()

    @sa.event.listens_for(engine, "begin")
    def _on_begin(conn: Connection) -> None:
        read_only = conn.get_execution_options().get(_READ_ONLY, False)
        conn.exec_driver_sql("BEGIN" if read_only else "BEGIN IMMEDIATE")

    return engine


def set_wal_mode(
    cursor: Any,
    *,
    wait_s: float = SQLITE_BUSY_TIMEOUT_MS / 1000,
    sleep: Callable[[float], None] = time.sleep,
    clock: Callable[[], float] = time.monotonic,
) -> None:
    """``PRAGMA journal_mode=WAL`` on a new connection, retried while SQLite says busy.

    SQLite answers this pragma "database is locked" at once, without calling the busy
    handler, while another process's last connection to the file is closing (it holds
    the file exclusively while it checkpoints and removes the write-ahead log; see
    "Sometimes Queries Return SQLITE_BUSY In WAL Mode" in SQLite's WAL documentation).
    Seen here about once in a few thousand opens of one file by three processes, and in
    CI as a migration test failing "could not connect (database is locked)". The wait is the
    busy timeout every other statement has (lock waiting, not clinical time).
    """
    deadline = clock() + wait_s
    pause = 0.005
    while True:
        try:
            cursor.execute("PRAGMA journal_mode=WAL")
            return
        except sqlite3.OperationalError as exc:
            if not _is_busy(exc) or clock() >= deadline:
                raise
        sleep(pause)
        pause = min(pause * 2, 0.1)


def _is_busy(exc: sqlite3.OperationalError) -> bool:
    return (exc.sqlite_errorcode & 0xFF) in (sqlite3.SQLITE_BUSY, sqlite3.SQLITE_LOCKED)


def alembic_config(url: str | None = None) -> Config:
    """Alembic configuration built in code, pointing at this package's migrations.

    Located relative to this module, so it works from an installed package as well as
    from a checkout.
    """
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    if url is not None:
        # ConfigParser treats % as interpolation; URLs may carry %-escapes.
        config.set_main_option("sqlalchemy.url", url.replace("%", "%%"))
    return config


def upgrade_engine(engine: Engine) -> None:
    """Run the migrations to head over one of ``engine``'s connections."""
    config = alembic_config()
    with engine.connect() as conn, conn.begin():
        # Several processes starting at once against one PostgreSQL: one migrates, the
        # others wait here and then find the schema at head. (SQLite: BEGIN IMMEDIATE.)
        advisory_lock(conn, "schema-migration")
        config.attributes["connection"] = conn
        command.upgrade(config, "head")


def upgrade(url: str) -> None:
    """Bring the database at ``url`` to the newest schema (a no-op if it is there).

    An in-memory ``sqlite://`` URL is refused: the migrated database would vanish with
    this call's engine. ``open_database("sqlite://")`` migrates its own engine instead.
    """
    if is_memory_sqlite(url):
        raise StorageRefused(
            f"database url for upgrade must name a file or server, not {url!r} (in memory)"
        )
    engine = create_engine(url)
    try:
        upgrade_engine(engine)
    finally:
        engine.dispose()


def open_database(url: str | None = None, *, create: bool = True) -> Database:
    """Open the database at ``url`` (default ``sqlite:///gasgap.db``).

    With ``create=True`` the schema is migrated to head first, creating the file and
    tables on first use.
    """
    url = url or DEFAULT_URL
    engine = create_engine(url)
    if create:
        try:
            upgrade_engine(engine)
        except BaseException:
            engine.dispose()
            raise
    return Database(engine=engine, url=url, write_turns=write_turns_for(engine))


def write_turns_for(engine: Engine) -> WriteTurns | None:
    """The write turns of the SQLite file ``engine`` opens; None for PostgreSQL and an
    in-memory database (nothing to take turns at across engines)."""
    path = engine.url.database
    if engine.dialect.name != "sqlite" or is_memory_sqlite(engine.url) or not path:
        return None
    return turns_for(str(Path(path).resolve()))


def insert_for(conn: Connection, table: sa.Table) -> Any:
    """The dialect's INSERT (both have ``on_conflict_do_nothing`` / ``_do_update``)."""
    if conn.dialect.name == "postgresql":
        from sqlalchemy.dialects.postgresql import insert as pg_insert

        return pg_insert(table)
    if conn.dialect.name == "sqlite":
        from sqlalchemy.dialects.sqlite import insert as sqlite_insert

        return sqlite_insert(table)
    raise ValueError(f"database dialect must be sqlite or postgresql, not {conn.dialect.name!r}")


def chunks(items: list[Any], size: int = 500) -> Iterator[list[Any]]:
    """``items`` in slices short enough for one statement's parameter limit."""
    for start in range(0, len(items), size):
        yield items[start : start + size]


def _statement_sizes(count: int, most: int) -> Iterator[tuple[int, int]]:
    """(start, rows) of each statement for ``count`` rows: 256 rows to a statement (fewer
    when ``most`` says so), the rest in powers of two, so a table's inserts use a few
    statement texts (each kept, as SQLite keeps each prepared) whatever the counts."""
    size = 256
    while size > max(1, most):
        size //= 2
    start = 0
    while start < count:
        while size > count - start:
            size //= 2
        yield start, size
        start += size


#: Per (dialect class, table, statement shape): each column's bind processor, the SQL
#: text by rows per statement, and the most parameters one statement may carry. Keyed
#: by the class, not the engine's dialect object, so no engine is kept alive by it
#: (every SQLite engine here is made alike by ``create_engine``).
_DRIVER_INSERTS: dict[tuple[Any, ...], tuple[list[Any], dict[int, str], int]] = {}


def sqlite_insert_rows(
    conn: Connection,
    table: sa.Table,
    rows: list[dict[str, Any]],
    returning: tuple[str, ...],
    *,
    on_conflict_do_nothing: str | None = None,
) -> list[tuple[Any, ...]]:
    """Insert ``rows`` (every column but the surrogate ``id``, by name) into ``table`` on
    SQLite as driver SQL, up to 256 rows to a statement in the order given (so the
    ids are those SQLAlchemy's insert would give), each parameter made by its column's
    own bind processor (so the stored text is the same), with SQLAlchemy's errors and
    events kept (``exec_driver_sql``). Returns the ``returning`` columns of the rows
    inserted, as the driver gives them (in no promised order: return a key with the
    id). ``on_conflict_do_nothing``: the unique column whose conflicts are skipped.
    Spares SQLAlchemy's per-row work, which cost about as much as SQLite's own."""
    dialect = conn.dialect
    columns = [c for c in table.c if c.name != "id"]
    memo = (type(dialect), table.name, tuple(returning), on_conflict_do_nothing)
    held = _DRIVER_INSERTS.get(memo)
    if held is None:
        processors = [c.type.dialect_impl(dialect).bind_processor(dialect) for c in columns]
        # the parameters one statement may carry: this SQLite library's own limit
        driver = conn.connection.driver_connection
        limit = driver.getlimit(sqlite3.SQLITE_LIMIT_VARIABLE_NUMBER) if driver else 999
        held = _DRIVER_INSERTS[memo] = (processors, {}, limit)
    processors, texts, limit = held
    names = [c.name for c in columns]
    conflict = (
        f" ON CONFLICT ({on_conflict_do_nothing}) DO NOTHING" if on_conflict_do_nothing else ""
    )
    found: list[tuple[Any, ...]] = []
    for start, size in _statement_sizes(len(rows), limit // len(names)):
        part = rows[start : start + size]
        text = texts.get(size)
        if text is None:
            one = "(" + ", ".join("?" * len(names)) + ")"
            text = texts[len(part)] = (
                f"INSERT INTO {table.name} ({', '.join(names)}) VALUES "
                + ", ".join([one] * len(part))
                + f"{conflict} RETURNING {', '.join(returning)}"
            )
        params: list[Any] = []
        for row in part:
            for name, process in zip(names, processors, strict=True):
                value = row[name]
                params.append(value if process is None else process(value))
        found.extend(tuple(r) for r in conn.exec_driver_sql(text, tuple(params)))
    return found
