"""The tables, as SQLAlchemy Core metadata.

This module describes the schema the code expects; the Alembic revisions in
``storage/migrations/versions`` create it (a test compares the two). Times are stored
as timezone-aware UTC on both engines (``UTCDateTime``). Free text and identifiers are
unbounded strings: the sources decide their length, not us.

Guarantees kept by the database itself, so a second process cannot break them:

- a delivery is stored once (``readings.delivery_id`` unique);
- one current row per logical result (partial unique index);
- one current version per derived sample (partial unique index);
- one open alert per patient and rule (partial unique index on the open states);
- one outbox row per notification and channel (unique idempotency key + channel).

Partial indexes are standard on PostgreSQL and SQLite (3.8+), so they are portable here.
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

import sqlalchemy as sa
from sqlalchemy.dialects.postgresql import JSONB
from sqlalchemy.engine import Dialect

metadata = sa.MetaData(
    naming_convention={
        "ix": "ix_%(table_name)s_%(column_0_N_name)s",
        "uq": "uq_%(table_name)s_%(column_0_N_name)s",
        "ck": "ck_%(table_name)s_%(constraint_name)s",
        "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
        "pk": "pk_%(table_name)s",
    }
)


class UTCDateTime(sa.types.TypeDecorator[datetime]):
    """A timezone-aware UTC datetime on every engine.

    PostgreSQL keeps ``timestamptz``; SQLite has no time zones, so the value is stored
    as naive UTC text and made aware again on the way out. Naive datetimes are refused:
    a time without a zone is a bug upstream, and guessing would shift a blood gas by
    hours.
    """

    impl = sa.DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        if not isinstance(value, datetime):
            raise TypeError(f"time value must be a datetime, not {value!r}")
        if value.tzinfo is None or value.utcoffset() is None:
            raise ValueError(f"time value must be timezone-aware, not {value!r}")
        value = value.astimezone(UTC)
        if dialect.name == "sqlite":
            return value.replace(tzinfo=None)
        return value

    def process_result_value(self, value: Any, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            return value.replace(tzinfo=UTC)  # type: ignore[no-any-return]
        return value.astimezone(UTC)  # type: ignore[no-any-return]


#: Surrogate keys: BIGINT on PostgreSQL, INTEGER (the rowid alias) on SQLite.
Id = sa.BigInteger().with_variant(sa.Integer(), "sqlite")
#: JSON documents: JSONB on PostgreSQL, JSON text on SQLite.
Json = sa.JSON().with_variant(JSONB(), "postgresql")

OPEN_ALERT_STATES = ("raised", "acknowledged", "escalated")


def _location_columns() -> list[sa.Column[Any]]:
    return [
        sa.Column("location_unit", sa.String, nullable=True),
        sa.Column("location_room", sa.String, nullable=True),
        sa.Column("location_bed", sa.String, nullable=True),
    ]


patients = sa.Table(
    "patients",
    metadata,
    sa.Column("patient_key", sa.String, primary_key=True),
    sa.Column("display_key", sa.String, nullable=True),
    sa.Column("birth_date", sa.Date, nullable=True),
    *_location_columns(),
    sa.Column("updated_at", UTCDateTime, nullable=False),
    #: Bumped by every change of the patient's timeline (readings judged, a flag
    #: acknowledged or escalated): a process holding a cached timeline of the patient
    #: knows from it whether another process changed it since.
    sa.Column("revision", sa.Integer, nullable=False, server_default="0"),
)

readings = sa.Table(
    "readings",
    metadata,
    sa.Column("id", Id, primary_key=True, autoincrement=True),
    sa.Column("delivery_id", sa.String, nullable=False, unique=True),
    sa.Column("logical_id", sa.String, nullable=False),
    sa.Column("patient_key", sa.String, nullable=False),
    sa.Column("kind", sa.String, nullable=False),
    sa.Column("value", sa.Float, nullable=True),
    sa.Column("unit", sa.String, nullable=False),
    sa.Column("original_value", sa.String, nullable=False),
    sa.Column("original_unit", sa.String, nullable=False),
    sa.Column("code", sa.String, nullable=False),
    sa.Column("code_system", sa.String, nullable=False),
    sa.Column("code_value", sa.String, nullable=True),
    sa.Column("specimen", sa.String, nullable=False),
    sa.Column("status", sa.String, nullable=False),
    sa.Column("effective_at", UTCDateTime, nullable=False),
    sa.Column("received_at", UTCDateTime, nullable=False),
    sa.Column("known_at", UTCDateTime, nullable=True),
    sa.Column("source_system", sa.String, nullable=False),
    sa.Column("panel_id", sa.String, nullable=True),
    sa.Column("from_ventilator", sa.Boolean, nullable=False),
    sa.Column("encounter_id", sa.String, nullable=True),
    *_location_columns(),
    sa.Column("birth_date", sa.Date, nullable=True),
    sa.Column("is_current", sa.Boolean, nullable=False),
    sa.Column("superseded_at", UTCDateTime, nullable=True),
    #: False while a historical load has stored the reading but not yet stepped the
    #: patient's timeline with it (a crash in between leaves work to resume).
    sa.Column("processed", sa.Boolean, nullable=False, server_default=sa.true()),
    sa.Index(None, "patient_key", "kind", "effective_at"),
    sa.Index(
        "ix_readings_unprocessed",
        "patient_key",
        sqlite_where=sa.text("NOT processed"),
        postgresql_where=sa.text("NOT processed"),
    ),
    sa.Index(None, "logical_id"),
    sa.Index(
        "uq_readings_current_logical_id",
        "logical_id",
        unique=True,
        sqlite_where=sa.text("is_current"),
        postgresql_where=sa.text("is_current"),
    ),
)

quarantine = sa.Table(
    "quarantine",
    metadata,
    sa.Column("id", Id, primary_key=True, autoincrement=True),
    sa.Column("source", sa.String, nullable=False),
    sa.Column("received_at", UTCDateTime, nullable=False),
    sa.Column("reason", sa.Text, nullable=False),
    sa.Column("reason_key", sa.String, nullable=False),
    sa.Column("raw_text", sa.Text, nullable=True),
    sa.Column("raw_bytes", sa.LargeBinary, nullable=True),
    sa.Column("payload_size", sa.Integer, nullable=False),
    sa.Column("truncated", sa.Boolean, nullable=False),
    # 0002_quarantine: the raw payload kept once in quarantine_payloads (by digest);
    # alike rejections of one payload counted on one row; re-processing recorded.
    sa.Column("payload_digest", sa.String, nullable=True),
    sa.Column("occurrences", sa.Integer, nullable=False, server_default="1"),
    sa.Column("resolved_at", UTCDateTime, nullable=True),
    sa.Column("resolution", sa.Text, nullable=True),
    sa.Index(None, "received_at"),
    sa.Index(None, "reason_key"),
    sa.Index(None, "payload_digest"),
)

#: A refused payload, kept once however many rejections point at it (0002_quarantine).
quarantine_payloads = sa.Table(
    "quarantine_payloads",
    metadata,
    sa.Column("digest", sa.String, primary_key=True),
    sa.Column("raw_text", sa.Text, nullable=True),
    sa.Column("raw_bytes", sa.LargeBinary, nullable=True),
    sa.Column("payload_size", sa.Integer, nullable=False),
    sa.Column("truncated", sa.Boolean, nullable=False),
    sa.Column("first_received_at", UTCDateTime, nullable=False),
)

source_cursors = sa.Table(
    "source_cursors",
    metadata,
    sa.Column("source", sa.String, primary_key=True),
    sa.Column("watermark", sa.Text, nullable=True),
    sa.Column("watermark_at", UTCDateTime, nullable=True),
    sa.Column("last_success_at", UTCDateTime, nullable=True),
    sa.Column("last_error", sa.Text, nullable=True),
    sa.Column("last_error_at", UTCDateTime, nullable=True),
    sa.Column("updated_at", UTCDateTime, nullable=False),
)

derivations = sa.Table(
    "derivations",
    metadata,
    sa.Column("id", Id, primary_key=True, autoincrement=True),
    sa.Column("patient_key", sa.String, nullable=False),
    sa.Column("sample_id", sa.String, nullable=False),
    sa.Column("version", sa.Integer, nullable=False),
    sa.Column("is_current", sa.Boolean, nullable=False),
    sa.Column("drawn_at", UTCDateTime, nullable=False),
    sa.Column("specimen", sa.String, nullable=False),
    sa.Column("equation", sa.String, nullable=False),
    sa.Column("pao2", sa.Float, nullable=True),
    sa.Column("fio2", sa.Float, nullable=True),
    sa.Column("fio2_source", sa.String, nullable=False),
    sa.Column("paco2", sa.Float, nullable=True),
    sa.Column("barometric_pressure", sa.Float, nullable=True),
    sa.Column("water_vapour_pressure", sa.Float, nullable=True),
    sa.Column("inspired_po2", sa.Float, nullable=True),
    sa.Column("alveolar_po2", sa.Float, nullable=True),
    sa.Column("aa_gradient", sa.Float, nullable=True),
    sa.Column("aa_gradient_expected", sa.Float, nullable=True),
    sa.Column("arterial_alveolar_ratio", sa.Float, nullable=True),
    sa.Column("pf_ratio", sa.Float, nullable=True),
    sa.Column("pf_ratio_adjusted", sa.Float, nullable=True),
    sa.Column("berlin_band", sa.String, nullable=True),
    sa.Column("sf_ratio", sa.Float, nullable=True),
    sa.Column("oxygenation_index", sa.Float, nullable=True),
    sa.Column("oxygen_saturation_index", sa.Float, nullable=True),
    sa.Column("arterial_o2_content", sa.Float, nullable=True),
    sa.Column("peep", sa.Float, nullable=True),
    sa.Column("spo2", sa.Float, nullable=True),
    sa.Column("age_years", sa.Float, nullable=True),
    *_location_columns(),
    sa.Column("estimated", sa.Boolean, nullable=False),
    sa.Column("preliminary", sa.Boolean, nullable=False),
    sa.Column("unreliable", sa.Boolean, nullable=False),
    sa.Column("retracted", sa.Boolean, nullable=False),
    sa.Column("flags", Json, nullable=False),
    sa.Column("inputs", Json, nullable=False),
    sa.Column("constants", Json, nullable=False),
    sa.Column("fingerprint", sa.String, nullable=False),
    sa.Column("created_at", UTCDateTime, nullable=False),
    sa.Column("reason", sa.Text, nullable=False),
    sa.UniqueConstraint("patient_key", "sample_id", "version"),
    sa.Index(None, "patient_key", "drawn_at"),
    sa.Index(
        "uq_derivations_current_sample",
        "patient_key",
        "sample_id",
        unique=True,
        sqlite_where=sa.text("is_current"),
        postgresql_where=sa.text("is_current"),
    ),
)

derivation_inputs = sa.Table(
    "derivation_inputs",
    metadata,
    sa.Column(
        "derivation_id",
        Id,
        sa.ForeignKey("derivations.id", ondelete="CASCADE"),
        primary_key=True,
    ),
    sa.Column("reading_logical_id", sa.String, primary_key=True),
    sa.Index(None, "reading_logical_id"),
)

_OPEN_STATES_SQL = sa.text("state IN ('raised', 'acknowledged', 'escalated')")

alerts = sa.Table(
    "alerts",
    metadata,
    sa.Column("alert_id", sa.String, primary_key=True),
    sa.Column("patient_key", sa.String, nullable=False),
    sa.Column("rule", sa.String, nullable=False),
    sa.Column("priority", sa.String, nullable=False),
    sa.Column("state", sa.String, nullable=False),
    sa.Column("raised_at", UTCDateTime, nullable=False),
    sa.Column("updated_at", UTCDateTime, nullable=False),
    sa.Column("sample_id", sa.String, nullable=False),
    sa.Column("summary", sa.Text, nullable=False),
    *_location_columns(),
    sa.Column("acknowledged_by", sa.String, nullable=True),
    sa.Column("acknowledged_at", UTCDateTime, nullable=True),
    sa.Column("closed_at", UTCDateTime, nullable=True),
    sa.Column("preliminary", sa.Boolean, nullable=False),
    sa.Column("estimated", sa.Boolean, nullable=False),
    sa.Column("historical", sa.Boolean, nullable=False, server_default=sa.false()),
    sa.Column("seen_at", UTCDateTime, nullable=True),
    sa.Column("resolved_drawn_at", UTCDateTime, nullable=True),
    sa.Index(None, "patient_key", "rule"),
    sa.Index(None, "updated_at"),
    sa.Index(
        "uq_alerts_open_patient_rule",
        "patient_key",
        "rule",
        unique=True,
        sqlite_where=_OPEN_STATES_SQL,
        postgresql_where=_OPEN_STATES_SQL,
    ),
)

alert_events = sa.Table(
    "alert_events",
    metadata,
    sa.Column("id", Id, primary_key=True, autoincrement=True),
    sa.Column("alert_id", sa.String, nullable=False),
    sa.Column("patient_key", sa.String, nullable=False),
    sa.Column("rule", sa.String, nullable=False),
    sa.Column("event", sa.String, nullable=False),
    sa.Column("at", UTCDateTime, nullable=False),
    sa.Column("priority", sa.String, nullable=False),
    sa.Column("state", sa.String, nullable=False),
    sa.Column("sample_id", sa.String, nullable=True),
    sa.Column("acted_by", sa.String, nullable=True),
    sa.Column("note", sa.Text, nullable=False),
    sa.Index(None, "alert_id"),
    sa.Index(None, "patient_key", "at"),
)

outbox = sa.Table(
    "outbox",
    metadata,
    sa.Column("id", Id, primary_key=True, autoincrement=True),
    sa.Column("idempotency_key", sa.String, nullable=False),
    sa.Column("channel", sa.String, nullable=False),
    sa.Column("patient_key", sa.String, nullable=False),
    sa.Column("alert_id", sa.String, nullable=False),
    sa.Column("payload", Json, nullable=False),
    sa.Column("created_at", UTCDateTime, nullable=False),
    sa.Column("status", sa.String, nullable=False),
    sa.Column("attempts", sa.Integer, nullable=False),
    sa.Column("next_attempt_at", UTCDateTime, nullable=False),
    sa.Column("last_attempt_at", UTCDateTime, nullable=True),
    sa.Column("last_error", sa.Text, nullable=True),
    sa.Column("sent_at", UTCDateTime, nullable=True),
    sa.UniqueConstraint("idempotency_key", "channel"),
    sa.Index(None, "status", "next_attempt_at"),
    sa.Index(None, "patient_key", "channel", "status"),
)

#: The patient register's links (``monitor.engine.identity``): each row is one
#: ``PatientLink`` (keys that name one person), stored once by its fingerprint. The
#: register is rebuilt by learning them all; the result does not depend on row order.
patient_links = sa.Table(
    "patient_links",
    metadata,
    sa.Column("id", Id, primary_key=True, autoincrement=True),
    sa.Column("fingerprint", sa.String, nullable=False, unique=True),
    sa.Column("link_keys", Json, nullable=False),
    sa.Column("source", sa.String, nullable=False),
    sa.Column("learnt_at", UTCDateTime, nullable=False),
)

#: Results sent as beyond a limit (">500 mmHg", "<70 %"): kept and shown in the patient's
#: series, never a reading (no derivation or rule uses them). One row per result
#: (source and logical id): a later delivery of the same result replaces it, and a
#: result later sent as an exact number is shown as that reading instead.
censored_results = sa.Table(
    "censored_results",
    metadata,
    sa.Column("id", Id, primary_key=True, autoincrement=True),
    sa.Column("patient_key", sa.String, nullable=False),
    sa.Column("kind", sa.String, nullable=False),
    sa.Column("comparator", sa.String, nullable=False),
    sa.Column("limit_value", sa.Float, nullable=True),
    sa.Column("original_value", sa.String, nullable=False),
    sa.Column("original_unit", sa.String, nullable=False),
    sa.Column("code", sa.String, nullable=False),
    sa.Column("effective_at", UTCDateTime, nullable=False),
    sa.Column("source_system", sa.String, nullable=False),
    sa.Column("logical_id", sa.String, nullable=False),
    sa.Column("received_at", UTCDateTime, nullable=False),
    # when this version became known (the source's time, never after receipt)
    sa.Column("known_at", UTCDateTime, nullable=False),
    sa.UniqueConstraint("source_system", "logical_id"),
    sa.Index(None, "patient_key", "effective_at"),
)
