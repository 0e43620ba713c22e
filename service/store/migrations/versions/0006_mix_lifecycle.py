"""The life of a risky-mix version: who published it, when and by whom it was activated and retired.

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-02
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0006"
down_revision: str | None = "0005"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_COLUMNS = ("published_by", "activated_at", "activated_by", "retired_at", "retired_by")


def upgrade() -> None:
    # Added one by one: SQLite's ALTER TABLE takes one nullable column at a time without a rebuild.
    op.add_column("mixes", sa.Column("published_by", sa.String(), nullable=True))
    op.add_column("mixes", sa.Column("activated_at", sa.DateTime(timezone=True), nullable=True))
    op.add_column("mixes", sa.Column("activated_by", sa.String(), nullable=True))
    op.add_column("mixes", sa.Column("retired_at", sa.DateTime(timezone=True), nullable=True))
    op.add_column("mixes", sa.Column("retired_by", sa.String(), nullable=True))
    # A version in force before this revision was activated at an unrecorded time: its
    # publication time is the only one known (and the earliest it can have been).
    op.execute(
        "UPDATE mixes SET activated_at = created_at WHERE EXISTS (SELECT 1 FROM plans "
        "WHERE plans.plan_id = mixes.plan_id AND plans.active_version = mixes.version)"
    )


def downgrade() -> None:
    for name in reversed(_COLUMNS):
        with op.batch_alter_table("mixes") as batch:
            batch.drop_column(name)
