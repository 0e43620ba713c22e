"""API keys that expire or are revoked: expires_at and revoked_at on api_keys.

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0005"
down_revision: str | None = "0004"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    # Nullable: a key issued before this revision never expires and is not revoked.
    op.add_column("api_keys", sa.Column("expires_at", sa.DateTime(timezone=True), nullable=True))
    op.add_column("api_keys", sa.Column("revoked_at", sa.DateTime(timezone=True), nullable=True))
    op.create_index("ix_api_keys_plan_id", "api_keys", ["plan_id"])


def downgrade() -> None:
    # Batch mode: SQLite drops columns by rebuilding the table.
    with op.batch_alter_table("api_keys") as batch:
        batch.drop_index("ix_api_keys_plan_id")
        batch.drop_column("revoked_at")
        batch.drop_column("expires_at")
