"""Idempotency-Key reservations (draft-ietf-httpapi-idempotency-key-header).

A request that carries a key first reserves (plan, API key, Idempotency-Key) with the
fingerprint of its body. The reservation is an insert that does nothing on conflict, so of
many simultaneous requests exactly one owns the key; the others find it in flight or, once
the owner's answer is committed, done. The owner's answer is written into the reservation by
the chain writer in the same transaction as the log rows (see IdempotencyCompletion), so an
answer is replayable exactly when it was logged. Expired reservations are replaced.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta

from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from service.store.records import IdempotencyCompletion
from service.store.repository import _insert
from service.store.schema import IdempotencyKey, utc_now

IN_FLIGHT = "in_flight"
DONE = "done"


@dataclass(frozen=True)
class IdempotencyRecord:
    fingerprint: str
    state: str
    status_code: int | None
    response: str | None
    expires_at: datetime


def reserve(
    s: Session,
    *,
    plan_id: str,
    key_id: str,
    idempotency_key: str,
    fingerprint: str,
    retention: timedelta,
) -> IdempotencyRecord | None:
    """None when this request now owns the key; otherwise the standing reservation."""
    now = utc_now()
    where = (
        (IdempotencyKey.plan_id == plan_id)
        & (IdempotencyKey.key_id == key_id)
        & (IdempotencyKey.idempotency_key == idempotency_key)
    )
    s.execute(delete(IdempotencyKey).where(where & (IdempotencyKey.expires_at <= now)))
    stmt = (
        _insert(s, IdempotencyKey)
        .values(
            plan_id=plan_id,
            key_id=key_id,
            idempotency_key=idempotency_key,
            fingerprint=fingerprint,
            state=IN_FLIGHT,
            status_code=None,
            response=None,
            created_at=now,
            expires_at=now + retention,
        )
        .on_conflict_do_nothing()
        .execution_options(preserve_rowcount=True)
    )
    if s.execute(stmt).rowcount == 1:  # type: ignore[attr-defined]
        return None
    row = s.execute(select(IdempotencyKey).where(where)).scalar_one()
    return IdempotencyRecord(row.fingerprint, row.state, row.status_code, row.response, row.expires_at)


def release(s: Session, *, plan_id: str, key_id: str, idempotency_key: str) -> None:
    """Give up an in-flight reservation whose request failed before anything was logged."""
    s.execute(
        delete(IdempotencyKey).where(
            (IdempotencyKey.plan_id == plan_id)
            & (IdempotencyKey.key_id == key_id)
            & (IdempotencyKey.idempotency_key == idempotency_key)
            & (IdempotencyKey.state == IN_FLIGHT)
        )
    )


def purge_expired(s: Session) -> int:
    result = s.execute(delete(IdempotencyKey).where(IdempotencyKey.expires_at <= utc_now()))
    return int(result.rowcount)  # type: ignore[attr-defined]


COMPLETE_SQL = (
    "UPDATE idempotency_keys SET state = 'done', status_code = {p}, response = {p} "
    "WHERE plan_id = {p} AND key_id = {p} AND idempotency_key = {p} AND state = 'in_flight'"
)


def completion_parameters(c: IdempotencyCompletion) -> tuple[int, str, str, str, str]:
    return (c.status_code, c.response, c.plan_id, c.key_id, c.idempotency_key)
