"""Patient timelines: when each reading became known, a revision per patient (so a
cached timeline knows when another process changed it), historical flags, the time
a flag could first be seen, and the draw time of the sample that resolved it.

Revision ID: 0002_timeline
Revises: 0001
Create Date: 2026-12-02
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0002_timeline"
down_revision: str | Sequence[str] | None = "0001"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

TIME = sa.DateTime(timezone=True)


def upgrade() -> None:
    with op.batch_alter_table("readings") as batch:
        batch.add_column(sa.Column("known_at", TIME, nullable=True))
        batch.add_column(
            sa.Column("processed", sa.Boolean(), nullable=False, server_default=sa.true())
        )
    op.create_index(
        "ix_readings_unprocessed",
        "readings",
        ["patient_key"],
        sqlite_where=sa.text("NOT processed"),
        postgresql_where=sa.text("NOT processed"),
    )
    with op.batch_alter_table("patients") as batch:
        batch.add_column(sa.Column("revision", sa.Integer(), nullable=False, server_default="0"))
    with op.batch_alter_table("alerts") as batch:
        batch.add_column(
            sa.Column("historical", sa.Boolean(), nullable=False, server_default=sa.false())
        )
        batch.add_column(sa.Column("seen_at", TIME, nullable=True))
        batch.add_column(sa.Column("resolved_drawn_at", TIME, nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("alerts") as batch:
        batch.drop_column("resolved_drawn_at")
        batch.drop_column("seen_at")
        batch.drop_column("historical")
    with op.batch_alter_table("patients") as batch:
        batch.drop_column("revision")
    op.drop_index("ix_readings_unprocessed", table_name="readings")
    with op.batch_alter_table("readings") as batch:
        batch.drop_column("processed")
        batch.drop_column("known_at")
