"""Plans, API keys, risky-mix versions, the allocation log and its chain heads.

Revision ID: 0001
Revises:
Create Date: 2026-12-01
"""

from collections.abc import Sequence
from datetime import datetime

import sqlalchemy as sa
from alembic import op

revision: str = "0001"
down_revision: str | None = None
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

# Written out rather than imported from schema.py: a revision must keep creating
# exactly this schema even after the models move on.
_AUTO_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")


def _utc_timestamp(name: str) -> sa.Column[datetime]:
    return sa.Column(name, sa.DateTime(timezone=True), nullable=False)


def upgrade() -> None:
    op.create_table(
        "plans",
        sa.Column("plan_id", sa.String(), nullable=False),
        sa.Column("name", sa.String(), nullable=False),
        sa.Column("currency", sa.CHAR(3), nullable=False),
        sa.Column("policy", sa.Text(), nullable=False),
        sa.Column("active_version", sa.String(), nullable=True),
        _utc_timestamp("created_at"),
        sa.PrimaryKeyConstraint("plan_id", name="pk_plans"),
    )
    op.create_table(
        "api_keys",
        sa.Column("key_id", sa.String(), nullable=False),
        sa.Column("plan_id", sa.String(), nullable=True),
        sa.Column("role", sa.String(), nullable=False),
        sa.Column("secret_hash", sa.CHAR(64), nullable=False),
        _utc_timestamp("created_at"),
        sa.PrimaryKeyConstraint("key_id", name="pk_api_keys"),
        sa.ForeignKeyConstraint(
            ["plan_id"], ["plans.plan_id"], name="fk_api_keys_plan_id_plans"
        ),
    )
    op.create_table(
        "mixes",
        sa.Column("plan_id", sa.String(), nullable=False),
        sa.Column("version", sa.String(), nullable=False),
        sa.Column("content_hash", sa.CHAR(64), nullable=False),
        sa.Column("inputs", sa.Text(), nullable=False),
        sa.Column("solved", sa.Text(), nullable=False),
        _utc_timestamp("created_at"),
        sa.PrimaryKeyConstraint("plan_id", "version", name="pk_mixes"),
        sa.ForeignKeyConstraint(["plan_id"], ["plans.plan_id"], name="fk_mixes_plan_id_plans"),
    )
    op.create_table(
        "allocations",
        sa.Column("id", _AUTO_ID, autoincrement=True, nullable=False),
        sa.Column("plan_id", sa.String(), nullable=False),
        sa.Column("seq", sa.BigInteger(), nullable=False),
        sa.Column("allocation_id", sa.String(), nullable=False),
        sa.Column("member_id", sa.String(), nullable=False),
        sa.Column("mix_version", sa.String(), nullable=False),
        sa.Column("created_at", sa.String(), nullable=False),
        sa.Column("body", sa.Text(), nullable=False),
        sa.Column("prev_hash", sa.CHAR(64), nullable=False),
        sa.Column("row_hash", sa.CHAR(64), nullable=False),
        sa.PrimaryKeyConstraint("id", name="pk_allocations"),
        sa.ForeignKeyConstraint(
            ["plan_id"], ["plans.plan_id"], name="fk_allocations_plan_id_plans"
        ),
        sa.UniqueConstraint("allocation_id", name="uq_allocations_allocation_id"),
    )
    op.create_index("ix_allocations_plan_id_seq", "allocations", ["plan_id", "seq"], unique=True)
    op.create_index(
        "ix_allocations_plan_id_member_id_seq", "allocations", ["plan_id", "member_id", "seq"]
    )
    op.create_table(
        "chain_heads",
        sa.Column("plan_id", sa.String(), nullable=False),
        sa.Column("last_seq", sa.BigInteger(), nullable=False),
        sa.Column("last_hash", sa.CHAR(64), nullable=False),
        sa.PrimaryKeyConstraint("plan_id", name="pk_chain_heads"),
        sa.ForeignKeyConstraint(
            ["plan_id"], ["plans.plan_id"], name="fk_chain_heads_plan_id_plans"
        ),
    )


def downgrade() -> None:
    op.drop_table("chain_heads")
    op.drop_index("ix_allocations_plan_id_member_id_seq", table_name="allocations")
    op.drop_index("ix_allocations_plan_id_seq", table_name="allocations")
    op.drop_table("allocations")
    op.drop_table("mixes")
    op.drop_table("api_keys")
    op.drop_table("plans")
