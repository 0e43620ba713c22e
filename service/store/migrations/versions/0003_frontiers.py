"""Efficient frontiers, stored once per mix content hash after publication.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-01
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0003"
down_revision: str | None = "0002"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "frontiers",
        sa.Column("content_hash", sa.CHAR(64), nullable=False),
        sa.Column("document", sa.Text(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("content_hash", name="pk_frontiers"),
    )


def downgrade() -> None:
    op.drop_table("frontiers")
