"""Idempotency-Key reservations (draft-ietf-httpapi-idempotency-key-header), run by the writer.

A request that carries a key first reserves (plan, API key, Idempotency-Key) with the
fingerprint of its body. Reserving is a job for the chain writer, like appending: on SQLite a
second writer would fight the log writer for the database lock (and wait in SQLite's busy
handler for tens of milliseconds), and in the writer's transaction the reservation is one more
statement of a group commit. The insert does nothing on conflict, so of many simultaneous
requests exactly one owns the key; the others find it in flight or, once the owner's answer is
committed with its log rows (IdempotencyCompletion), done.

A reservation is a lease: an in-flight row expires ``lease_seconds`` after it was taken
(the answer, once stored, is kept for the retention period instead). A process killed between
reserving and answering therefore holds the key no longer than the lease, and the client's
retry with the same key is then answered as a new request. Expired rows are replaced.

The owner is named by the time it reserved (``reserved_at``, unix seconds): a key is only taken
over once its lease (at least a second) ran out, so two owners never share that time. Storing
an answer, or giving a key up, matches it; an answer whose lease was taken over meanwhile is
refused (IdempotencyLeaseLost) and its transaction rolled back, so nothing is logged twice.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from service.store.records import IdempotencyCompletion

IN_FLIGHT = "in_flight"
DONE = "done"


class IdempotencyLeaseLost(Exception):
    """The request outlived its reservation's lease and another request holds the key now."""


@dataclass(frozen=True)
class IdempotencyRecord:
    fingerprint: str
    state: str
    status_code: int | None
    response: str | None
    expires_at: int  # unix seconds


@dataclass(frozen=True)
class KeyReservation:
    plan_id: str
    key_id: str
    idempotency_key: str
    fingerprint: str
    now: int  # unix seconds
    lease_seconds: int


@dataclass(frozen=True)
class KeyRelease:
    """Give up an in-flight reservation whose request failed before anything was logged."""

    plan_id: str
    key_id: str
    idempotency_key: str
    reserved_at: int  # the owner's reservation time (unix seconds)


KeyOperation = KeyReservation | KeyRelease

_WHERE = "plan_id = {p} AND key_id = {p} AND idempotency_key = {p}"
_DROP_EXPIRED = "DELETE FROM idempotency_keys WHERE " + _WHERE + " AND expires_at <= {p}"
_INSERT = (
    "INSERT INTO idempotency_keys (plan_id, key_id, idempotency_key, fingerprint, state, "
    "status_code, response, created_at, expires_at) VALUES ({p}, {p}, {p}, {p}, 'in_flight', "
    "NULL, NULL, {p}, {p}) ON CONFLICT DO NOTHING"
)
_STANDING = (
    "SELECT fingerprint, state, status_code, response, expires_at FROM idempotency_keys WHERE "
    + _WHERE
)
_OWNED = " AND state = 'in_flight' AND created_at = {p}"
_RELEASE = "DELETE FROM idempotency_keys WHERE " + _WHERE + _OWNED
_PURGE = "DELETE FROM idempotency_keys WHERE expires_at <= {p}"

COMPLETE_SQL = (
    "UPDATE idempotency_keys SET state = 'done', status_code = {p}, response = {p}, "
    "expires_at = {p} WHERE " + _WHERE + _OWNED
)


def completion_parameters(c: IdempotencyCompletion) -> tuple[int, str, int, str, str, str, int]:
    return (c.status_code, c.response, c.expires_at, c.plan_id, c.key_id, c.idempotency_key, c.reserved_at)


def complete(cursor: Any, completions: Sequence[tuple[Any, ...]], placeholder: str) -> None:
    """Store answers into their reservations; IdempotencyLeaseLost if one is no longer owned
    (the caller's transaction must then roll back: its rows must not be logged)."""
    statement = COMPLETE_SQL.format(p=placeholder)
    for parameters in completions:
        cursor.execute(statement, parameters)
        if cursor.rowcount != 1:
            raise IdempotencyLeaseLost(
                f"Idempotency-Key {parameters[5]!r}: the reservation's lease ran out and another "
                "request took the key"
            )


def run(cursor: Any, op: KeyOperation, placeholder: str) -> IdempotencyRecord | None:
    """Execute one operation on a DBAPI cursor inside the writer's transaction.

    For a reservation: None when the caller now owns the key, else the standing reservation.
    """
    key = (op.plan_id, op.key_id, op.idempotency_key)
    if isinstance(op, KeyRelease):
        cursor.execute(_RELEASE.format(p=placeholder), (*key, op.reserved_at))
        return None
    cursor.execute(_DROP_EXPIRED.format(p=placeholder), (*key, op.now))
    cursor.execute(
        _INSERT.format(p=placeholder),
        (*key, op.fingerprint, op.now, op.now + op.lease_seconds),
    )
    if cursor.rowcount == 1:
        return None
    cursor.execute(_STANDING.format(p=placeholder), key)
    fingerprint, state, status_code, response, expires_at = cursor.fetchone()
    return IdempotencyRecord(fingerprint, state, status_code, response, expires_at)


def purge(cursor: Any, now: int, placeholder: str) -> int:
    cursor.execute(_PURGE.format(p=placeholder), (now,))
    return int(cursor.rowcount)
