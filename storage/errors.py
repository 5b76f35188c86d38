"""Storage's exceptions, and the translation of the driver's into them.

Every engine ``storage.db.create_engine`` builds translates, in one place (the engine's
``handle_error`` hook, :func:`translate`), what a later attempt may not meet (the
database cannot be reached, is locked, timed out, went away) into
``StorageUnavailable``, chained to the driver's error. The message names the database
(its URL, any password masked) and what failed, never the statement's parameters::

    MonitorError
     +-- StorageError                      storage refused or failed
          +-- StorageUnavailable           the database cannot be used now: worth a retry
                                           (also monitor.engine.errors.Unavailable)
          +-- StorageRefused (ValueError)  a request that cannot work as asked
          +-- DuplicateOpenAlert (ValueError, storage.alerts)

A pool with no free connection within its timeout (``sqlalchemy.exc.TimeoutError``,
raised before any driver is asked, so the hook never sees it) is translated by
``Database.begin`` with :func:`pool_exhausted`. Other driver errors (an integrity
violation, a bad statement) are programming errors and keep SQLAlchemy's type.
"""

from __future__ import annotations

import sqlalchemy as sa
from sqlalchemy.engine import ExceptionContext

from monitor.engine.errors import MonitorError, Unavailable

#: SQLAlchemy's wrappers of the DBAPI errors that mean "not now", not "never".
_UNAVAILABLE = (sa.exc.OperationalError, sa.exc.InterfaceError)
_MAX_DETAIL = 200


class StorageError(MonitorError):
    """Root of storage's exceptions."""


class StorageRefused(StorageError, ValueError):
    """A request storage cannot carry out as asked (e.g. migrating an in-memory
    database, which would vanish with the call); the message says why."""


class StorageUnavailable(StorageError, Unavailable):
    """The database cannot be used now (cannot be reached, locked, timed out, gone, no
    free connection in the pool): worth a retry. ``database`` is its URL with any
    password masked."""

    def __init__(self, database: str, failed: str, detail: str) -> None:
        self.database = database
        self.failed = failed
        self.detail = detail
        message = f"database {database} unavailable: {failed}"
        super().__init__(f"{message} ({detail})" if detail else message)


def masked_url(url: str | sa.URL) -> str:
    """``url`` as text with any password replaced by ``***``."""
    try:
        return sa.make_url(url).render_as_string(hide_password=True)
    except sa.exc.ArgumentError:
        return "(an unreadable URL)"


def translate(context: ExceptionContext) -> StorageUnavailable | None:
    """The engine hook: a ``StorageUnavailable`` for an error that means the database
    cannot be used now, else None (the driver's error goes on as it is).

    Pre-ping failures are left alone: the pool handles them by reconnecting.
    """
    if context.is_pre_ping:
        return None
    wrapped = context.sqlalchemy_exception
    if not (context.is_disconnect or isinstance(wrapped, _UNAVAILABLE)):
        return None
    url = context.engine.url if context.engine is not None else None
    if context.connection is None:
        failed = "could not connect"
    else:
        verb = (context.statement or "").split(maxsplit=1)[:1]
        failed = f"{verb[0].upper()} failed" if verb else "the transaction failed"
    return StorageUnavailable(
        masked_url(url) if url is not None else "(unnamed)",
        failed,
        _detail(context.original_exception, url.password if url is not None else None),
    )


def _detail(exc: BaseException, password: str | None) -> str:
    """The driver's first line, short, with the password masked should it appear."""
    lines = str(exc).strip().splitlines()
    text = lines[0].strip() if lines else type(exc).__name__
    if password:
        text = text.replace(password, "***")
    return text[:_MAX_DETAIL]


def pool_exhausted(url: str | sa.URL, error: sa.exc.TimeoutError) -> StorageUnavailable:
    """``StorageUnavailable`` for a pool that had no free connection in time."""
    return StorageUnavailable(
        masked_url(url), "no free connection in the pool", _detail(error, None)
    )
