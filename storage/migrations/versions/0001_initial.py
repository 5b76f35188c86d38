"""Initial schema: patients, readings, quarantine, source cursors, derivations (with
their input links), alerts with their audit events, and the notification outbox.

Revision ID: 0001
Revises:
Create Date: 2026-12-02

Frozen copy of storage/tables.py as first released; column types are spelled out here
(UTC times are ``timestamptz`` on PostgreSQL and naive-UTC text on SQLite, converted by
``storage.tables.UTCDateTime`` at run time).
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import postgresql

revision: str = "0001"
down_revision: str | Sequence[str] | None = None
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

TIME = sa.DateTime(timezone=True)
ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")
JSON = sa.JSON().with_variant(postgresql.JSONB(), "postgresql")
OPEN_STATES = "state IN ('raised', 'acknowledged', 'escalated')"


def _location() -> list[sa.Column]:  # type: ignore[type-arg]
    return [
        sa.Column("location_unit", sa.String(), nullable=True),
        sa.Column("location_room", sa.String(), nullable=True),
        sa.Column("location_bed", sa.String(), nullable=True),
    ]


def _partial_unique(name: str, table: str, columns: list[str], where: str) -> None:
    op.create_index(
        name,
        table,
        columns,
        unique=True,
        sqlite_where=sa.text(where),
        postgresql_where=sa.text(where),
    )


def upgrade() -> None:
    op.create_table(
        "patients",
        sa.Column("patient_key", sa.String(), nullable=False),
        sa.Column("display_key", sa.String(), nullable=True),
        sa.Column("birth_date", sa.Date(), nullable=True),
        *_location(),
        sa.Column("updated_at", TIME, nullable=False),
        sa.PrimaryKeyConstraint("patient_key", name="pk_patients"),
    )

    op.create_table(
        "readings",
        sa.Column("id", ID, autoincrement=True, nullable=False),
        sa.Column("delivery_id", sa.String(), nullable=False),
        sa.Column("logical_id", sa.String(), nullable=False),
        sa.Column("patient_key", sa.String(), nullable=False),
        sa.Column("kind", sa.String(), nullable=False),
        sa.Column("value", sa.Float(), nullable=True),
        sa.Column("unit", sa.String(), nullable=False),
        sa.Column("original_value", sa.String(), nullable=False),
        sa.Column("original_unit", sa.String(), nullable=False),
        sa.Column("code", sa.String(), nullable=False),
        sa.Column("code_system", sa.String(), nullable=False),
        sa.Column("code_value", sa.String(), nullable=True),
        sa.Column("specimen", sa.String(), nullable=False),
        sa.Column("status", sa.String(), nullable=False),
        sa.Column("effective_at", TIME, nullable=False),
        sa.Column("received_at", TIME, nullable=False),
        sa.Column("source_system", sa.String(), nullable=False),
        sa.Column("panel_id", sa.String(), nullable=True),
        sa.Column("from_ventilator", sa.Boolean(), nullable=False),
        sa.Column("encounter_id", sa.String(), nullable=True),
        *_location(),
        sa.Column("birth_date", sa.Date(), nullable=True),
        sa.Column("is_current", sa.Boolean(), nullable=False),
        sa.Column("superseded_at", TIME, nullable=True),
        sa.PrimaryKeyConstraint("id", name="pk_readings"),
        sa.UniqueConstraint("delivery_id", name="uq_readings_delivery_id"),
    )
    op.create_index(
        "ix_readings_patient_key_kind_effective_at",
        "readings",
        ["patient_key", "kind", "effective_at"],
    )
    op.create_index("ix_readings_logical_id", "readings", ["logical_id"])
    _partial_unique("uq_readings_current_logical_id", "readings", ["logical_id"], "is_current")

    op.create_table(
        "quarantine",
        sa.Column("id", ID, autoincrement=True, nullable=False),
        sa.Column("source", sa.String(), nullable=False),
        sa.Column("received_at", TIME, nullable=False),
        sa.Column("reason", sa.Text(), nullable=False),
        sa.Column("reason_key", sa.String(), nullable=False),
        sa.Column("raw_text", sa.Text(), nullable=True),
        sa.Column("raw_bytes", sa.LargeBinary(), nullable=True),
        sa.Column("payload_size", sa.Integer(), nullable=False),
        sa.Column("truncated", sa.Boolean(), nullable=False),
        sa.PrimaryKeyConstraint("id", name="pk_quarantine"),
    )
    op.create_index("ix_quarantine_received_at", "quarantine", ["received_at"])
    op.create_index("ix_quarantine_reason_key", "quarantine", ["reason_key"])

    op.create_table(
        "source_cursors",
        sa.Column("source", sa.String(), nullable=False),
        sa.Column("watermark", sa.Text(), nullable=True),
        sa.Column("watermark_at", TIME, nullable=True),
        sa.Column("last_success_at", TIME, nullable=True),
        sa.Column("last_error", sa.Text(), nullable=True),
        sa.Column("last_error_at", TIME, nullable=True),
        sa.Column("updated_at", TIME, nullable=False),
        sa.PrimaryKeyConstraint("source", name="pk_source_cursors"),
    )

    op.create_table(
        "derivations",
        sa.Column("id", ID, autoincrement=True, nullable=False),
        sa.Column("patient_key", sa.String(), nullable=False),
        sa.Column("sample_id", sa.String(), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("is_current", sa.Boolean(), nullable=False),
        sa.Column("drawn_at", TIME, nullable=False),
        sa.Column("specimen", sa.String(), nullable=False),
        sa.Column("equation", sa.String(), nullable=False),
        sa.Column("pao2", sa.Float(), nullable=True),
        sa.Column("fio2", sa.Float(), nullable=True),
        sa.Column("fio2_source", sa.String(), nullable=False),
        sa.Column("paco2", sa.Float(), nullable=True),
        sa.Column("barometric_pressure", sa.Float(), nullable=True),
        sa.Column("water_vapour_pressure", sa.Float(), nullable=True),
        sa.Column("inspired_po2", sa.Float(), nullable=True),
        sa.Column("alveolar_po2", sa.Float(), nullable=True),
        sa.Column("aa_gradient", sa.Float(), nullable=True),
        sa.Column("aa_gradient_expected", sa.Float(), nullable=True),
        sa.Column("arterial_alveolar_ratio", sa.Float(), nullable=True),
        sa.Column("pf_ratio", sa.Float(), nullable=True),
        sa.Column("pf_ratio_adjusted", sa.Float(), nullable=True),
        sa.Column("berlin_band", sa.String(), nullable=True),
        sa.Column("sf_ratio", sa.Float(), nullable=True),
        sa.Column("oxygenation_index", sa.Float(), nullable=True),
        sa.Column("oxygen_saturation_index", sa.Float(), nullable=True),
        sa.Column("arterial_o2_content", sa.Float(), nullable=True),
        sa.Column("peep", sa.Float(), nullable=True),
        sa.Column("spo2", sa.Float(), nullable=True),
        sa.Column("age_years", sa.Float(), nullable=True),
        *_location(),
        sa.Column("estimated", sa.Boolean(), nullable=False),
        sa.Column("preliminary", sa.Boolean(), nullable=False),
        sa.Column("unreliable", sa.Boolean(), nullable=False),
        sa.Column("retracted", sa.Boolean(), nullable=False),
        sa.Column("flags", JSON, nullable=False),
        sa.Column("inputs", JSON, nullable=False),
        sa.Column("constants", JSON, nullable=False),
        sa.Column("fingerprint", sa.String(), nullable=False),
        sa.Column("created_at", TIME, nullable=False),
        sa.Column("reason", sa.Text(), nullable=False),
        sa.PrimaryKeyConstraint("id", name="pk_derivations"),
        sa.UniqueConstraint(
            "patient_key",
            "sample_id",
            "version",
            name="uq_derivations_patient_key_sample_id_version",
        ),
    )
    op.create_index(
        "ix_derivations_patient_key_drawn_at", "derivations", ["patient_key", "drawn_at"]
    )
    _partial_unique(
        "uq_derivations_current_sample", "derivations", ["patient_key", "sample_id"], "is_current"
    )

    op.create_table(
        "derivation_inputs",
        sa.Column("derivation_id", ID, nullable=False),
        sa.Column("reading_logical_id", sa.String(), nullable=False),
        sa.ForeignKeyConstraint(
            ["derivation_id"],
            ["derivations.id"],
            name="fk_derivation_inputs_derivation_id_derivations",
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("derivation_id", "reading_logical_id", name="pk_derivation_inputs"),
    )
    op.create_index(
        "ix_derivation_inputs_reading_logical_id", "derivation_inputs", ["reading_logical_id"]
    )

    op.create_table(
        "alerts",
        sa.Column("alert_id", sa.String(), nullable=False),
        sa.Column("patient_key", sa.String(), nullable=False),
        sa.Column("rule", sa.String(), nullable=False),
        sa.Column("priority", sa.String(), nullable=False),
        sa.Column("state", sa.String(), nullable=False),
        sa.Column("raised_at", TIME, nullable=False),
        sa.Column("updated_at", TIME, nullable=False),
        sa.Column("sample_id", sa.String(), nullable=False),
        sa.Column("summary", sa.Text(), nullable=False),
        *_location(),
        sa.Column("acknowledged_by", sa.String(), nullable=True),
        sa.Column("acknowledged_at", TIME, nullable=True),
        sa.Column("closed_at", TIME, nullable=True),
        sa.Column("preliminary", sa.Boolean(), nullable=False),
        sa.Column("estimated", sa.Boolean(), nullable=False),
        sa.PrimaryKeyConstraint("alert_id", name="pk_alerts"),
    )
    op.create_index("ix_alerts_patient_key_rule", "alerts", ["patient_key", "rule"])
    op.create_index("ix_alerts_updated_at", "alerts", ["updated_at"])
    _partial_unique("uq_alerts_open_patient_rule", "alerts", ["patient_key", "rule"], OPEN_STATES)

    op.create_table(
        "alert_events",
        sa.Column("id", ID, autoincrement=True, nullable=False),
        sa.Column("alert_id", sa.String(), nullable=False),
        sa.Column("patient_key", sa.String(), nullable=False),
        sa.Column("rule", sa.String(), nullable=False),
        sa.Column("event", sa.String(), nullable=False),
        sa.Column("at", TIME, nullable=False),
        sa.Column("priority", sa.String(), nullable=False),
        sa.Column("state", sa.String(), nullable=False),
        sa.Column("sample_id", sa.String(), nullable=True),
        sa.Column("acted_by", sa.String(), nullable=True),
        sa.Column("note", sa.Text(), nullable=False),
        sa.PrimaryKeyConstraint("id", name="pk_alert_events"),
    )
    op.create_index("ix_alert_events_alert_id", "alert_events", ["alert_id"])
    op.create_index("ix_alert_events_patient_key_at", "alert_events", ["patient_key", "at"])

    op.create_table(
        "outbox",
        sa.Column("id", ID, autoincrement=True, nullable=False),
        sa.Column("idempotency_key", sa.String(), nullable=False),
        sa.Column("channel", sa.String(), nullable=False),
        sa.Column("patient_key", sa.String(), nullable=False),
        sa.Column("alert_id", sa.String(), nullable=False),
        sa.Column("payload", JSON, nullable=False),
        sa.Column("created_at", TIME, nullable=False),
        sa.Column("status", sa.String(), nullable=False),
        sa.Column("attempts", sa.Integer(), nullable=False),
        sa.Column("next_attempt_at", TIME, nullable=False),
        sa.Column("last_attempt_at", TIME, nullable=True),
        sa.Column("last_error", sa.Text(), nullable=True),
        sa.Column("sent_at", TIME, nullable=True),
        sa.PrimaryKeyConstraint("id", name="pk_outbox"),
        sa.UniqueConstraint("idempotency_key", "channel", name="uq_outbox_idempotency_key_channel"),
    )
    op.create_index("ix_outbox_status_next_attempt_at", "outbox", ["status", "next_attempt_at"])
    op.create_index(
        "ix_outbox_patient_key_channel_status", "outbox", ["patient_key", "channel", "status"]
    )


def downgrade() -> None:
    for table in (
        "outbox",
        "alert_events",
        "alerts",
        "derivation_inputs",
        "derivations",
        "source_cursors",
        "quarantine",
        "readings",
        "patients",
    ):
        op.drop_table(table)
