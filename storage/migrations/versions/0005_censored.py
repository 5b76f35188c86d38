"""Results sent as beyond a limit (">500", "<70"), kept for the patient's series.

Revision ID: 0005_censored
Revises: 0004_quarantine
Create Date: 2026-12-02

Additive: a new table; nothing written before is changed.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0005_censored"
down_revision: str | Sequence[str] | None = "0004_quarantine"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

TIME = sa.DateTime(timezone=True)
ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")


def upgrade() -> None:
    op.create_table(
        "censored_results",
        sa.Column("id", ID, autoincrement=True, nullable=False),
        sa.Column("patient_key", sa.String(), nullable=False),
        sa.Column("kind", sa.String(), nullable=False),
        sa.Column("comparator", sa.String(), nullable=False),
        sa.Column("limit_value", sa.Float(), nullable=True),
        sa.Column("original_value", sa.String(), nullable=False),
        sa.Column("original_unit", sa.String(), nullable=False),
        sa.Column("code", sa.String(), nullable=False),
        sa.Column("effective_at", TIME, nullable=False),
        sa.Column("source_system", sa.String(), nullable=False),
        sa.Column("logical_id", sa.String(), nullable=False),
        sa.Column("received_at", TIME, nullable=False),
        sa.Column("known_at", TIME, nullable=False),
        sa.PrimaryKeyConstraint("id", name="pk_censored_results"),
        sa.UniqueConstraint(
            "source_system", "logical_id", name="uq_censored_results_source_system_logical_id"
        ),
    )
    op.create_index(
        "ix_censored_results_patient_key_effective_at",
        "censored_results",
        ["patient_key", "effective_at"],
    )


def downgrade() -> None:
    op.drop_index("ix_censored_results_patient_key_effective_at", table_name="censored_results")
    op.drop_table("censored_results")
