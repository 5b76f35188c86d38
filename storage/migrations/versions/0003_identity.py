"""Patient register: the links that name one person (storage/register.py).

Revision ID: 0003_identity
Revises: 0002_timeline
Create Date: 2026-12-02
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import postgresql

revision: str = "0003_identity"
down_revision: str | Sequence[str] | None = "0002_timeline"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

TIME = sa.DateTime(timezone=True)
ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")
JSON = sa.JSON().with_variant(postgresql.JSONB(), "postgresql")


def upgrade() -> None:
    op.create_table(
        "patient_links",
        sa.Column("id", ID, autoincrement=True, nullable=False),
        sa.Column("fingerprint", sa.String(), nullable=False),
        sa.Column("link_keys", JSON, nullable=False),
        sa.Column("source", sa.String(), nullable=False),
        sa.Column("learnt_at", TIME, nullable=False),
        sa.PrimaryKeyConstraint("id", name="pk_patient_links"),
        sa.UniqueConstraint("fingerprint", name="uq_patient_links_fingerprint"),
    )


def downgrade() -> None:
    op.drop_table("patient_links")
