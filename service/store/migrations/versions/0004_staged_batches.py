"""Batches written in chunks and made visible in one step.

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-02
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0004"
down_revision: str | None = "0003"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "allocation_batches",
        sa.Column("batch_id", sa.String(), nullable=False),
        sa.Column("plan_id", sa.String(), nullable=False),
        sa.Column("rows", sa.BigInteger(), nullable=False),
        sa.Column("state", sa.String(), nullable=False),
        sa.Column("created_at", sa.String(), nullable=False),
        sa.PrimaryKeyConstraint("batch_id", name="pk_allocation_batches"),
        sa.ForeignKeyConstraint(
            ["plan_id"], ["plans.plan_id"], name="fk_allocation_batches_plan_id_plans"
        ),
    )
    with op.batch_alter_table("allocations") as table:
        table.add_column(sa.Column("batch_id", sa.String(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("allocations") as table:
        table.drop_column("batch_id")
    op.drop_table("allocation_batches")
