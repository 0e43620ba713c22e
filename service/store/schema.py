"""The tables mixline keeps, as SQLAlchemy 2 declarative models.

The Alembic revisions under ``migrations/versions`` are the source of truth for
the deployed schema; these models mirror them for queries, and a test checks
that the two agree. JSON documents are stored as TEXT written by orjson with
sorted keys, so SQLite and PostgreSQL hold byte-identical text.
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

import orjson
from sqlalchemy import (
    CHAR,
    BigInteger,
    DateTime,
    Dialect,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    String,
    Text,
    TypeDecorator,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

NAMING_CONVENTION: dict[str, str] = {
    "ix": "ix_%(table_name)s_%(column_0_N_name)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_N_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}

# SQLite only auto-assigns ids for an INTEGER PRIMARY KEY (the rowid alias);
# a BIGINT primary key there would stay NULL on insert.
AUTO_ID = BigInteger().with_variant(Integer(), "sqlite")


def utc_now() -> datetime:
    return datetime.now(UTC)


def json_text(document: dict[str, Any]) -> str:
    """The one serialisation of a JSON document that both dialects store."""
    return orjson.dumps(document, option=orjson.OPT_SORT_KEYS).decode()


class UtcDateTime(TypeDecorator[datetime]):
    """A timezone-aware UTC timestamp on both dialects.

    SQLite has no timestamp type and hands back naive values; this re-attaches UTC
    so callers never compare naive with aware datetimes.
    """

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError(f"naive datetime {value!r}: store timezone-aware UTC times only")
        return value.astimezone(UTC)

    def process_result_value(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            return value.replace(tzinfo=UTC)
        return value.astimezone(UTC)


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING_CONVENTION)


class Plan(Base):
    __tablename__ = "plans"

    plan_id: Mapped[str] = mapped_column(String(), primary_key=True)
    name: Mapped[str] = mapped_column(String())
    currency: Mapped[str] = mapped_column(CHAR(3))
    policy: Mapped[str] = mapped_column(Text)
    active_version: Mapped[str | None] = mapped_column(String(), nullable=True)
    created_at: Mapped[datetime] = mapped_column(UtcDateTime, default=utc_now)


class ApiKey(Base):
    __tablename__ = "api_keys"
    __table_args__ = (Index("ix_api_keys_plan_id", "plan_id"),)

    key_id: Mapped[str] = mapped_column(String(), primary_key=True)
    plan_id: Mapped[str | None] = mapped_column(
        String(), ForeignKey("plans.plan_id"), nullable=True
    )
    role: Mapped[str] = mapped_column(String())
    secret_hash: Mapped[str] = mapped_column(CHAR(64))
    created_at: Mapped[datetime] = mapped_column(UtcDateTime, default=utc_now)
    expires_at: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)
    revoked_at: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)


class Mix(Base):
    """A published risky-mix version; its content is immutable once written, only the lifecycle
    columns are filled in later (each once)."""

    __tablename__ = "mixes"

    plan_id: Mapped[str] = mapped_column(
        String(), ForeignKey("plans.plan_id"), primary_key=True
    )
    version: Mapped[str] = mapped_column(String(), primary_key=True)
    content_hash: Mapped[str] = mapped_column(CHAR(64))
    inputs: Mapped[str] = mapped_column(Text)
    solved: Mapped[str] = mapped_column(Text)
    created_at: Mapped[datetime] = mapped_column(UtcDateTime, default=utc_now)
    # The lifecycle (published -> active -> retired); the plan's active_version says which is in
    # force. Key ids, not names: who did it is whoever held that key.
    published_by: Mapped[str | None] = mapped_column(String(), nullable=True)
    activated_at: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)
    activated_by: Mapped[str | None] = mapped_column(String(), nullable=True)
    retired_at: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)
    retired_by: Mapped[str | None] = mapped_column(String(), nullable=True)


class Allocation(Base):
    """One logged recommendation, a link in its plan's hash chain."""

    __tablename__ = "allocations"
    __table_args__ = (
        Index("ix_allocations_plan_id_seq", "plan_id", "seq", unique=True),
        Index("ix_allocations_plan_id_member_id_seq", "plan_id", "member_id", "seq"),
    )

    id: Mapped[int] = mapped_column(AUTO_ID, primary_key=True, autoincrement=True)
    plan_id: Mapped[str] = mapped_column(String(), ForeignKey("plans.plan_id"))
    seq: Mapped[int] = mapped_column(BigInteger)
    allocation_id: Mapped[str] = mapped_column(String(), unique=True)
    member_id: Mapped[str] = mapped_column(String())
    mix_version: Mapped[str] = mapped_column(String())
    # Kept as the exact text that was hashed, not as a timestamp type.
    created_at: Mapped[str] = mapped_column(String())
    body: Mapped[str] = mapped_column(Text)
    prev_hash: Mapped[str] = mapped_column(CHAR(64))
    row_hash: Mapped[str] = mapped_column(CHAR(64))
    # Set for the rows of a batch written in chunks: they count once their batch is visible.
    batch_id: Mapped[str | None] = mapped_column(String(), nullable=True)


class AllocationBatch(Base):
    """A batch whose rows were committed in chunks; `state` staged -> visible (or abandoned)."""

    __tablename__ = "allocation_batches"

    batch_id: Mapped[str] = mapped_column(String(), primary_key=True)
    plan_id: Mapped[str] = mapped_column(String(), ForeignKey("plans.plan_id"))
    rows: Mapped[int] = mapped_column(BigInteger)
    state: Mapped[str] = mapped_column(String())
    created_at: Mapped[str] = mapped_column(String())


class ChainHead(Base):
    """Per plan: the last link written. The writer locks this row while appending."""

    __tablename__ = "chain_heads"

    plan_id: Mapped[str] = mapped_column(
        String(), ForeignKey("plans.plan_id"), primary_key=True
    )
    last_seq: Mapped[int] = mapped_column(BigInteger)
    last_hash: Mapped[str] = mapped_column(CHAR(64))


class IdempotencyKey(Base):
    """A reservation of an Idempotency-Key by one API key in one plan, then the answer it replays."""

    __tablename__ = "idempotency_keys"
    __table_args__ = (Index("ix_idempotency_keys_expires_at", "expires_at"),)

    plan_id: Mapped[str] = mapped_column(
        String(), ForeignKey("plans.plan_id"), primary_key=True
    )
    key_id: Mapped[str] = mapped_column(String(), primary_key=True)
    idempotency_key: Mapped[str] = mapped_column(String(), primary_key=True)
    fingerprint: Mapped[str] = mapped_column(CHAR(64))
    state: Mapped[str] = mapped_column(String())  # "in_flight" | "done"
    status_code: Mapped[int | None] = mapped_column(Integer, nullable=True)
    response: Mapped[str | None] = mapped_column(Text, nullable=True)
    created_at: Mapped[int] = mapped_column(BigInteger)  # unix seconds
    expires_at: Mapped[int] = mapped_column(BigInteger)


class StoredFrontier(Base):
    """A mix's exact frontier (corner portfolios), written once per content hash."""

    __tablename__ = "frontiers"

    content_hash: Mapped[str] = mapped_column(CHAR(64), primary_key=True)
    document: Mapped[str] = mapped_column(Text)
    created_at: Mapped[datetime] = mapped_column(UtcDateTime, default=utc_now)
