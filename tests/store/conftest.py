"""Fixtures for the store's own tests: a plan that exists, and a way to log rows to it."""

from __future__ import annotations

import secrets
from collections.abc import Callable
from typing import Any

import orjson
import pytest
from sqlalchemy import text

from service.store import Database, LogBatch, insert_plan

CREATED_AT = "2026-12-01T21:42:52.123456Z"
MIX_VERSION = "2026-q4"

AppendRows = Callable[..., list[str]]


def allocation_body(plan_id: str, allocation_id: str, member_id: str) -> str:
    """A canonical JSON body shaped like an allocation (invented values)."""
    return orjson.dumps(
        {
            "allocation_id": allocation_id,
            "member_id": member_id,
            "mix_version": MIX_VERSION,
            "plan_id": plan_id,
            "risky_fraction": 0.6,
            "amounts": {"risky": "6000.00", "safe": "4000.00"},
        },
        option=orjson.OPT_SORT_KEYS,
    ).decode()


def logged_rows(database: Database, plan_id: str) -> list[Any]:
    """The plan's log rows as stored, in seq order, read with plain SQL."""
    with database.reading() as s:
        return list(
            s.execute(
                text(
                    "SELECT seq, allocation_id, member_id, mix_version, created_at, body, "
                    "prev_hash, row_hash FROM allocations WHERE plan_id = :p ORDER BY seq"
                ),
                {"p": plan_id},
            )
        )


@pytest.fixture
def plan_id(database: Database, new_plan_id: str) -> str:
    with database.writing() as s:
        insert_plan(
            s,
            plan_id=new_plan_id,
            name="Harbour Lane Staff Savings",
            currency="EUR",
            policy={"max_risky_fraction": 1.0, "min_risky_fraction": 0.0},
        )
    return new_plan_id


@pytest.fixture
def append_rows(database: Database) -> AppendRows:
    """append_rows(plan_id, n, member_ids=None) logs n rows in one batch; returns their ids."""

    def append(plan_id: str, n: int, member_ids: list[str] | None = None) -> list[str]:
        allocation_ids = [f"alloc-{secrets.token_hex(8)}" for _ in range(n)]
        members = member_ids if member_ids is not None else [f"m{i % 3}" for i in range(n)]
        database.writer.append(
            LogBatch(
                plan_id=plan_id,
                mix_version=MIX_VERSION,
                created_at=CREATED_AT,
                allocation_ids=allocation_ids,
                member_ids=members,
                bodies=[allocation_body(plan_id, a, m) for a, m in zip(allocation_ids, members, strict=False)],
            )
        )
        return allocation_ids

    return append
