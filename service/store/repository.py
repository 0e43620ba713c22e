"""The SQL for plans, API keys, risky-mix versions and reading the allocation log.

Each function takes a Session from ``Database.reading()`` / ``Database.writing()`` and
leaves the transaction to it. Inserts use ON CONFLICT DO NOTHING and raise Conflict
when nothing was inserted, so a duplicate never aborts the caller's transaction (on
PostgreSQL a unique violation would poison it). Appending to the log is the
ChainWriter's job alone; nothing here writes allocations.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

import orjson
from sqlalchemy import exists, func, or_, select, update
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.orm import Session

from service.store.errors import Conflict
from service.store.records import (
    VISIBLE,
    KeyRecord,
    MixLifecycle,
    MixRecord,
    PlanRecord,
)
from service.store.schema import (
    Allocation,
    AllocationBatch,
    ApiKey,
    Mix,
    Plan,
    StoredFrontier,
    json_text,
    utc_now,
)


def _insert(session: Session, table: Any) -> postgresql.Insert | sqlite.Insert:
    name = session.get_bind().dialect.name
    if name == "postgresql":
        return postgresql.insert(table)
    if name == "sqlite":
        return sqlite.insert(table)
    raise NotImplementedError(f"dialect {name!r} is not supported")


def _insert_new(session: Session, table: Any, what: str, values: dict[str, Any]) -> None:
    stmt = (
        _insert(session, table)
        .values(**values)
        .on_conflict_do_nothing()
        .execution_options(preserve_rowcount=True)  # psycopg reports -1 otherwise
    )
    if session.execute(stmt).rowcount == 0:  # type: ignore[attr-defined]
        raise Conflict(f"{what} already exists")


def insert_plan(
    s: Session, *, plan_id: str, name: str, currency: str, policy: dict[str, Any]
) -> None:
    _insert_new(
        s,
        Plan,
        f"plan {plan_id!r}",
        dict(
            plan_id=plan_id,
            name=name,
            currency=currency,
            policy=json_text(policy),
            active_version=None,
            created_at=utc_now(),
        ),
    )


def get_plan(s: Session, plan_id: str) -> PlanRecord | None:
    row = s.execute(select(Plan.__table__).where(Plan.plan_id == plan_id)).one_or_none()
    if row is None:
        return None
    return PlanRecord(
        plan_id=row.plan_id,
        name=row.name,
        currency=row.currency,
        policy=orjson.loads(row.policy),
        active_version=row.active_version,
        created_at=row.created_at,
    )


def insert_key(
    s: Session,
    *,
    key_id: str,
    plan_id: str | None,
    role: str,
    secret_hash: str,
    expires_at: datetime | None = None,
    created_at: datetime | None = None,
) -> KeyRecord:
    record = KeyRecord(
        key_id=key_id,
        plan_id=plan_id,
        role=role,
        secret_hash=secret_hash,
        created_at=created_at or utc_now(),
        expires_at=expires_at,
    )
    _insert_new(
        s,
        ApiKey,
        f"key {key_id!r}",
        dict(
            key_id=key_id,
            plan_id=plan_id,
            role=role,
            secret_hash=secret_hash,
            created_at=record.created_at,
            expires_at=expires_at,
            revoked_at=None,
        ),
    )
    return record


def upsert_key(
    s: Session, *, key_id: str, plan_id: str | None, role: str, secret_hash: str
) -> None:
    """Insert the key or overwrite its plan, role and secret (created_at is kept)."""
    stmt = _insert(s, ApiKey).values(
        key_id=key_id, plan_id=plan_id, role=role, secret_hash=secret_hash, created_at=utc_now()
    )
    stmt = stmt.on_conflict_do_update(
        index_elements=[ApiKey.key_id],
        set_={
            "plan_id": stmt.excluded.plan_id,
            "role": stmt.excluded.role,
            "secret_hash": stmt.excluded.secret_hash,
        },
    )
    s.execute(stmt)


def _key_record(row: Any) -> KeyRecord:
    return KeyRecord(
        key_id=row.key_id,
        plan_id=row.plan_id,
        role=row.role,
        secret_hash=row.secret_hash,
        created_at=row.created_at,
        expires_at=row.expires_at,
        revoked_at=row.revoked_at,
    )


def get_key(s: Session, key_id: str) -> KeyRecord | None:
    row = s.execute(select(ApiKey.__table__).where(ApiKey.key_id == key_id)).one_or_none()
    return None if row is None else _key_record(row)


def list_keys(s: Session, plan_id: str) -> list[KeyRecord]:
    """The plan's keys, oldest first (revoked and expired ones included)."""
    rows = s.execute(
        select(ApiKey.__table__)
        .where(ApiKey.plan_id == plan_id)
        .order_by(ApiKey.created_at, ApiKey.key_id)
    )
    return [_key_record(row) for row in rows]


def revoke_key(s: Session, plan_id: str, key_id: str, *, now: datetime) -> KeyRecord | None:
    """Revoke one of the plan's keys at ``now`` (a key revoked before keeps its first time).

    None if the plan has no such key.
    """
    s.execute(
        update(ApiKey)
        .where(ApiKey.plan_id == plan_id, ApiKey.key_id == key_id, ApiKey.revoked_at.is_(None))
        .values(revoked_at=now)
    )
    row = s.execute(
        select(ApiKey.__table__).where(ApiKey.plan_id == plan_id, ApiKey.key_id == key_id)
    ).one_or_none()
    return None if row is None else _key_record(row)


def _text(value: dict[str, Any] | str) -> str:
    """A document to store: as given when it is its ``json_text`` already (made before the write
    transaction, so a large one is not serialised while the write lock is held)."""
    return value if isinstance(value, str) else json_text(value)


def insert_mix(
    s: Session,
    *,
    plan_id: str,
    version: str,
    content_hash: str,
    inputs: dict[str, Any] | str,
    solved: dict[str, Any] | str,
    published_by: str | None = None,
) -> None:
    """``inputs`` and ``solved`` may come as their JSON text already (``json_text``'s): a large
    mix's text is then made before the write transaction, not while it holds the write lock."""
    _insert_new(
        s,
        Mix,
        f"mix version {version!r} of plan {plan_id!r}",
        dict(
            plan_id=plan_id,
            version=version,
            content_hash=content_hash,
            inputs=_text(inputs),
            solved=_text(solved),
            created_at=utc_now(),
            published_by=published_by,
        ),
    )


def get_mix(s: Session, plan_id: str, version: str) -> MixRecord | None:
    row = s.execute(
        select(Mix.__table__).where(Mix.plan_id == plan_id, Mix.version == version)
    ).one_or_none()
    if row is None:
        return None
    return MixRecord(
        plan_id=row.plan_id,
        version=row.version,
        content_hash=row.content_hash,
        inputs=orjson.loads(row.inputs),
        solved=orjson.loads(row.solved),
        created_at=row.created_at,
    )


_LIFECYCLE_COLUMNS = (
    Mix.version, Mix.content_hash, Mix.created_at, Mix.published_by,
    Mix.activated_at, Mix.activated_by, Mix.retired_at, Mix.retired_by,
)


def _lifecycle(row: Any) -> MixLifecycle:
    return MixLifecycle(
        version=row.version,
        content_hash=row.content_hash,
        published_at=row.created_at,
        published_by=row.published_by,
        activated_at=row.activated_at,
        activated_by=row.activated_by,
        retired_at=row.retired_at,
        retired_by=row.retired_by,
    )


def list_lifecycle(s: Session, plan_id: str) -> list[MixLifecycle]:
    """Every version of the plan, in the order they were published."""
    rows = s.execute(
        select(*_LIFECYCLE_COLUMNS).where(Mix.plan_id == plan_id).order_by(Mix.created_at, Mix.version)
    ).all()
    return [_lifecycle(row) for row in rows]


def lock_lifecycle(s: Session, plan_id: str, version: str) -> tuple[str | None, MixLifecycle | None]:
    """(the plan's active version, ``version``'s lifecycle or None), with the plan's row locked
    until the transaction ends, so two activations (on any replicas) follow one another.

    Raises LookupError when the plan does not exist. On SQLite the write transaction already
    holds the database's write lock (BEGIN IMMEDIATE).
    """
    query = select(Plan.active_version).where(Plan.plan_id == plan_id)
    if s.get_bind().dialect.name == "postgresql":
        query = query.with_for_update()
    active = s.execute(query).one_or_none()
    if active is None:
        raise LookupError(f"plan {plan_id!r} does not exist")
    row = s.execute(
        select(*_LIFECYCLE_COLUMNS).where(Mix.plan_id == plan_id, Mix.version == version)
    ).one_or_none()
    return active.active_version, None if row is None else _lifecycle(row)


def record_activation(
    s: Session, plan_id: str, version: str, *, retires: str | None, key_id: str, at: datetime
) -> None:
    """Make ``version`` the plan's active version and retire ``retires`` (its predecessor)."""
    if retires is not None:
        s.execute(
            update(Mix)
            .where(Mix.plan_id == plan_id, Mix.version == retires, Mix.retired_at.is_(None))
            .values(retired_at=at, retired_by=key_id)
        )
    s.execute(
        update(Mix)
        .where(Mix.plan_id == plan_id, Mix.version == version)
        .values(activated_at=at, activated_by=key_id)
    )
    s.execute(update(Plan).where(Plan.plan_id == plan_id).values(active_version=version))


def record_retirement(s: Session, plan_id: str, version: str, *, key_id: str, at: datetime) -> None:
    s.execute(
        update(Mix)
        .where(Mix.plan_id == plan_id, Mix.version == version, Mix.retired_at.is_(None))
        .values(retired_at=at, retired_by=key_id)
    )


def _visible() -> Any:
    """A logged row counts unless it belongs to a batch not (or never) made visible."""
    return or_(
        Allocation.batch_id.is_(None),
        exists().where(
            AllocationBatch.batch_id == Allocation.batch_id, AllocationBatch.state == VISIBLE
        ),
    )


def get_allocation(s: Session, plan_id: str, allocation_id: str) -> str | None:
    return s.execute(
        select(Allocation.body).where(
            Allocation.allocation_id == allocation_id, Allocation.plan_id == plan_id, _visible()
        )
    ).scalar_one_or_none()


def list_allocations(s: Session, plan_id: str, member_id: str, *, limit: int = 100) -> list[str]:
    """The member's logged allocation bodies, newest first."""
    return list(
        s.execute(
            select(Allocation.body)
            .where(Allocation.plan_id == plan_id, Allocation.member_id == member_id, _visible())
            .order_by(Allocation.seq.desc())
            .limit(limit)
        ).scalars()
    )


def latest_allocations(s: Session, plan_id: str, mix_version: str) -> list[str]:
    """The bodies of the plan's members' latest logged allocations, for the members whose latest
    one was made with ``mix_version`` (one query; the (plan, member, seq) index serves the max)."""
    latest = (
        select(Allocation.member_id, func.max(Allocation.seq).label("seq"))
        .where(Allocation.plan_id == plan_id, _visible())
        .group_by(Allocation.member_id)
        .subquery()
    )
    return list(
        s.execute(
            select(Allocation.body)
            .join(latest, (Allocation.member_id == latest.c.member_id) & (Allocation.seq == latest.c.seq))
            .where(Allocation.plan_id == plan_id, Allocation.mix_version == mix_version)
            .order_by(Allocation.seq)
        ).scalars()
    )


def insert_frontier(s: Session, *, content_hash: str, document: dict[str, Any] | str) -> bool:
    """Store a frontier once per content hash; False if one was there already (same content,
    so the same frontier). ``document`` may come as its ``json_text`` already."""
    stmt = (
        _insert(s, StoredFrontier)
        .values(content_hash=content_hash, document=_text(document), created_at=utc_now())
        .on_conflict_do_nothing()
        .execution_options(preserve_rowcount=True)
    )
    return bool(s.execute(stmt).rowcount == 1)  # type: ignore[attr-defined]


def get_frontier(s: Session, content_hash: str) -> dict[str, Any] | None:
    text = s.execute(
        select(StoredFrontier.document).where(StoredFrontier.content_hash == content_hash)
    ).scalar_one_or_none()
    return None if text is None else orjson.loads(text)
