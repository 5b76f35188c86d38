"""Tables, queries and migrations. The only package that writes SQL.

SQLAlchemy 2 Core over SQLite (default, WAL) or PostgreSQL (psycopg 3) by URL; Alembic
migrations in ``storage/migrations``. Every query function takes a ``Connection`` in a
transaction the caller owns (``Database.begin()``), so one pipeline step commits or
rolls back whole. Rows are mapped to ``monitor.engine.model`` types explicitly
(``storage.serialize``); times are timezone-aware UTC on both engines.

Modules, one idea each:

- ``db``: ``open_database``, ``Database``, ``upgrade`` (migrations to head);
- ``errors``: ``StorageError``, ``StorageUnavailable`` (a database that cannot be used
  now, translated from the driver's error by every engine ``db`` builds);
- ``tables``: the schema as Core metadata;
- ``readings``: raw readings (idempotent by delivery, corrections supersede) and patients;
- ``quarantine``: input refused by an adapter, with its reason;
- ``derivations``: derived indices, versioned, with links to the readings they used;
- ``alerts``: flags and their audit events;
- ``outbox``: notifications to deliver, claimed with ``FOR UPDATE SKIP LOCKED``;
- ``cursors``: where each source poller got to;
- ``locks``: advisory locks between processes sharing a PostgreSQL;
- ``serialize``: rows to engine types and back.
"""
