"""Quarantine kept once per payload: raw text in quarantine_payloads (by SHA-256 digest),
rejection rows pointing at it and counting alike rejections, and a record of
re-processing.

Revision ID: 0004_quarantine
Revises: 0003_identity
Create Date: 2026-12-02

Additive: rows written before this revision keep their raw text in their own columns
and are read as before.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0004_quarantine"
down_revision: str | Sequence[str] | None = "0003_identity"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

TIME = sa.DateTime(timezone=True)


def upgrade() -> None:
    op.create_table(
        "quarantine_payloads",
        sa.Column("digest", sa.String(), nullable=False),
        sa.Column("raw_text", sa.Text(), nullable=True),
        sa.Column("raw_bytes", sa.LargeBinary(), nullable=True),
        sa.Column("payload_size", sa.Integer(), nullable=False),
        sa.Column("truncated", sa.Boolean(), nullable=False),
        sa.Column("first_received_at", TIME, nullable=False),
        sa.PrimaryKeyConstraint("digest", name="pk_quarantine_payloads"),
    )
    with op.batch_alter_table("quarantine") as batch:
        batch.add_column(sa.Column("payload_digest", sa.String(), nullable=True))
        batch.add_column(sa.Column("occurrences", sa.Integer(), nullable=False, server_default="1"))
        batch.add_column(sa.Column("resolved_at", TIME, nullable=True))
        batch.add_column(sa.Column("resolution", sa.Text(), nullable=True))
    op.create_index("ix_quarantine_payload_digest", "quarantine", ["payload_digest"])


def downgrade() -> None:
    op.drop_index("ix_quarantine_payload_digest", table_name="quarantine")
    with op.batch_alter_table("quarantine") as batch:
        batch.drop_column("resolution")
        batch.drop_column("resolved_at")
        batch.drop_column("occurrences")
        batch.drop_column("payload_digest")
    op.drop_table("quarantine_payloads")
