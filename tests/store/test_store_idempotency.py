"""Idempotency-Key reservations are leases: one that ran out is taken over, and the answer of a
request whose lease was taken over is refused with its rows rolled back (both databases)."""

from __future__ import annotations

import pytest

from service.store import (
    Database,
    IdempotencyCompletion,
    IdempotencyLeaseLost,
    KeyRelease,
    KeyReservation,
    LogBatch,
)
from tests.store.conftest import CREATED_AT, MIX_VERSION, allocation_body, logged_rows

T0 = 1_800_000_000  # unix seconds; any fixed time serves


def reserve(database: Database, plan_id: str, now: int, *, fingerprint: str = "f" * 64, lease: int = 30) -> object:
    op = KeyReservation(plan_id, "key-1", "retry-7", fingerprint, now, lease)
    return database.writer.submit_key_operation(op).result(5)


def answer(plan_id: str, allocation_id: str, reserved_at: int) -> LogBatch:
    done = IdempotencyCompletion(plan_id, "key-1", "retry-7", 201, '{"n":1}', reserved_at=reserved_at, expires_at=T0 + 86_400)
    return LogBatch(plan_id, MIX_VERSION, CREATED_AT, [allocation_id], ["m-1"], [allocation_body(plan_id, allocation_id, "m-1")], done)


def test_a_lease_that_ran_out_is_taken_over(database: Database, plan_id: str) -> None:
    assert reserve(database, plan_id, T0) is None  # owned
    standing = reserve(database, plan_id, T0 + 29)  # within the 30 s lease: in flight
    assert standing is not None and standing.state == "in_flight" and standing.expires_at == T0 + 30  # type: ignore[attr-defined]
    assert reserve(database, plan_id, T0 + 30) is None  # the lease ran out: a new owner


def test_an_answer_after_its_lease_was_taken_over_is_refused_and_not_logged(database: Database, plan_id: str) -> None:
    assert reserve(database, plan_id, T0) is None  # the first request (it will be slow)
    assert reserve(database, plan_id, T0 + 31) is None  # its lease ran out; a retry owns the key
    with pytest.raises(IdempotencyLeaseLost, match="retry-7"):
        database.writer.append(answer(plan_id, f"al-late-{plan_id}", T0))
    assert logged_rows(database, plan_id) == []  # rolled back with its rows
    database.writer.append(answer(plan_id, f"al-owner-{plan_id}", T0 + 31))
    assert [row.allocation_id for row in logged_rows(database, plan_id)] == [f"al-owner-{plan_id}"]
    done = reserve(database, plan_id, T0 + 40)
    assert done is not None and done.state == "done" and done.response == '{"n":1}'  # type: ignore[attr-defined]
    assert done.expires_at == T0 + 86_400  # type: ignore[attr-defined]  # the retention, no longer the lease


def test_a_release_gives_up_only_its_own_reservation(database: Database, plan_id: str) -> None:
    assert reserve(database, plan_id, T0) is None
    assert reserve(database, plan_id, T0 + 31) is None  # taken over
    database.writer.submit_key_operation(KeyRelease(plan_id, "key-1", "retry-7", T0)).result(5)  # the old owner fails
    standing = reserve(database, plan_id, T0 + 32)
    assert standing is not None and standing.state == "in_flight"  # type: ignore[attr-defined]  # the new owner's stands
    database.writer.submit_key_operation(KeyRelease(plan_id, "key-1", "retry-7", T0 + 31)).result(5)
    assert reserve(database, plan_id, T0 + 33) is None  # given up by its owner: free
