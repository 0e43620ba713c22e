"""The hash chain: an intact chain verifies; each kind of tampering, done with raw SQL
straight in the database, makes verification fail at the right row."""

from __future__ import annotations

import hashlib
from typing import Any

import pytest
from sqlalchemy import text

from service.store import GENESIS_HASH, Database, insert_plan, verify_chain
from tests.store.conftest import (
    CREATED_AT,
    MIX_VERSION,
    AppendRows,
    allocation_body,
    logged_rows,
)

ROWS = 6


def tamper(database: Database, *statements: tuple[str, dict[str, Any]]) -> None:
    with database.engine.begin() as conn:
        for statement, params in statements:
            conn.execute(text(statement), params)


def reference_hash(prev: str, plan_id: str, seq: int, allocation_id: str, member_id: str,
                   mix_version: str, created_at: str, body: str) -> str:
    # The chain's definition, spelled out independently of service.store.chain.
    fields = [prev, plan_id, str(seq), allocation_id, member_id, mix_version, created_at, body]
    return hashlib.sha256("\x1f".join(fields).encode("utf-8")).hexdigest()


@pytest.fixture
def chain(database: Database, plan_id: str, append_rows: AppendRows) -> list[Any]:
    append_rows(plan_id, 2)
    append_rows(plan_id, ROWS - 2)
    return logged_rows(database, plan_id)


def test_intact_chain_verifies(database: Database, plan_id: str, chain: list[Any]) -> None:
    report = verify_chain(database, plan_id)
    assert report.ok and report.first_bad is None
    assert report.checked == ROWS
    assert report.head_hash == chain[-1].row_hash
    with database.reading() as s:  # a Session works as well as the Database
        assert verify_chain(s, plan_id) == report


def test_stored_links_follow_the_definition(plan_id: str, chain: list[Any]) -> None:
    assert [row.seq for row in chain] == list(range(1, ROWS + 1))
    prev = GENESIS_HASH
    for row in chain:
        assert row.prev_hash == prev
        assert row.row_hash == reference_hash(
            prev, plan_id, row.seq, row.allocation_id, row.member_id, row.mix_version,
            row.created_at, row.body,
        )
        prev = row.row_hash


def test_empty_chain_is_ok(database: Database, plan_id: str) -> None:
    report = verify_chain(database, plan_id)
    assert (report.ok, report.checked, report.head_hash, report.first_bad) == (
        True, 0, GENESIS_HASH, None,
    )


def test_chains_of_two_plans_are_independent(
    database: Database, plan_id: str, append_rows: AppendRows, new_plan_id: str
) -> None:
    other = new_plan_id + "-b"
    with database.writing() as s:
        insert_plan(s, plan_id=other, name="Other", currency="GBP", policy={})
    append_rows(plan_id, 3)
    append_rows(other, 2)
    append_rows(plan_id, 1)
    assert [r.seq for r in logged_rows(database, plan_id)] == [1, 2, 3, 4]
    assert [r.seq for r in logged_rows(database, other)] == [1, 2]
    assert verify_chain(database, plan_id).ok and verify_chain(database, other).ok


def test_edited_body(database: Database, plan_id: str, chain: list[Any]) -> None:
    tamper(database, ("UPDATE allocations SET body = :b WHERE allocation_id = :a",
                      {"b": chain[2].body.replace("0.6", "0.9"), "a": chain[2].allocation_id}))
    report = verify_chain(database, plan_id)
    assert not report.ok and report.first_bad is not None
    assert (report.first_bad.seq, report.first_bad.allocation_id) == (3, chain[2].allocation_id)
    assert "row_hash" in report.first_bad.reason
    assert report.checked == 3
    assert report.head_hash == chain[1].row_hash


def test_edited_member_id(database: Database, plan_id: str, chain: list[Any]) -> None:
    tamper(database, ("UPDATE allocations SET member_id = 'm-someone-else' "
                      "WHERE allocation_id = :a", {"a": chain[3].allocation_id}))
    bad = verify_chain(database, plan_id).first_bad
    assert bad is not None
    assert (bad.seq, bad.allocation_id) == (4, chain[3].allocation_id)
    assert "row_hash" in bad.reason


def test_deleted_middle_row(database: Database, plan_id: str, chain: list[Any]) -> None:
    tamper(database, ("DELETE FROM allocations WHERE allocation_id = :a",
                      {"a": chain[2].allocation_id}))
    report = verify_chain(database, plan_id)
    assert not report.ok and report.first_bad is not None
    # The gap shows at the row after the removed one.
    assert (report.first_bad.seq, report.first_bad.allocation_id) == (4, chain[3].allocation_id)
    assert "gap" in report.first_bad.reason and "expected 3" in report.first_bad.reason


def test_deleted_middle_row_with_renumbering(
    database: Database, plan_id: str, chain: list[Any]
) -> None:
    tamper(
        database,
        ("DELETE FROM allocations WHERE allocation_id = :a", {"a": chain[2].allocation_id}),
        ("UPDATE allocations SET seq = seq + 1000 WHERE plan_id = :p AND seq > 3",
         {"p": plan_id}),
        ("UPDATE allocations SET seq = seq - 1001 WHERE plan_id = :p AND seq > 1000",
         {"p": plan_id}),
    )
    bad = verify_chain(database, plan_id).first_bad
    assert bad is not None
    assert (bad.seq, bad.allocation_id) == (3, chain[3].allocation_id)
    assert "prev_hash" in bad.reason


def test_deleted_last_row(database: Database, plan_id: str, chain: list[Any]) -> None:
    tamper(database, ("DELETE FROM allocations WHERE allocation_id = :a",
                      {"a": chain[-1].allocation_id}))
    report = verify_chain(database, plan_id)
    assert not report.ok and report.first_bad is not None
    assert (report.first_bad.seq, report.first_bad.allocation_id) == (ROWS, None)
    assert "missing" in report.first_bad.reason
    assert report.checked == ROWS - 1


def test_forged_row_appended_with_its_own_valid_hash(
    database: Database, plan_id: str, chain: list[Any]
) -> None:
    forged_id = f"alloc-forged-{plan_id}"
    seq, body = ROWS + 1, allocation_body(plan_id, forged_id, "m0")
    row_hash = reference_hash(chain[-1].row_hash, plan_id, seq, forged_id, "m0", MIX_VERSION,
                              CREATED_AT, body)
    tamper(database, (
        "INSERT INTO allocations (plan_id, seq, allocation_id, member_id, mix_version, "
        "created_at, body, prev_hash, row_hash) VALUES (:p, :s, :a, 'm0', :v, :c, :b, :prev, :h)",
        {"p": plan_id, "s": seq, "a": forged_id, "v": MIX_VERSION, "c": CREATED_AT, "b": body,
         "prev": chain[-1].row_hash, "h": row_hash},
    ))
    bad = verify_chain(database, plan_id).first_bad
    assert bad is not None
    assert (bad.seq, bad.allocation_id) == (seq, forged_id)
    assert "chain head" in bad.reason


def test_forged_row_inserted_in_the_middle(
    database: Database, plan_id: str, chain: list[Any]
) -> None:
    # Make room at seq 3 (two steps, so the unique (plan_id, seq) index never collides),
    # then insert a row that links correctly to seq 2 and carries its own correct hash.
    forged_id = f"alloc-forged-{plan_id}"
    body = allocation_body(plan_id, forged_id, "m1")
    row_hash = reference_hash(chain[1].row_hash, plan_id, 3, forged_id, "m1", MIX_VERSION,
                              CREATED_AT, body)
    tamper(
        database,
        ("UPDATE allocations SET seq = seq + 1000 WHERE plan_id = :p AND seq >= 3",
         {"p": plan_id}),
        ("UPDATE allocations SET seq = seq - 999 WHERE plan_id = :p AND seq > 1000",
         {"p": plan_id}),
        ("INSERT INTO allocations (plan_id, seq, allocation_id, member_id, mix_version, "
         "created_at, body, prev_hash, row_hash) VALUES (:p, 3, :a, 'm1', :v, :c, :b, :prev, :h)",
         {"p": plan_id, "a": forged_id, "v": MIX_VERSION, "c": CREATED_AT, "b": body,
          "prev": chain[1].row_hash, "h": row_hash}),
    )
    report = verify_chain(database, plan_id)
    assert report.first_bad is not None
    # The forged link itself is consistent; its successor no longer links to its predecessor.
    assert (report.first_bad.seq, report.first_bad.allocation_id) == (4, chain[2].allocation_id)
    assert "prev_hash" in report.first_bad.reason


def test_reordered_rows(database: Database, plan_id: str, chain: list[Any]) -> None:
    a, b = chain[1].allocation_id, chain[4].allocation_id  # seq 2 and seq 5
    tamper(
        database,
        ("UPDATE allocations SET seq = -1 WHERE allocation_id = :a", {"a": a}),
        ("UPDATE allocations SET seq = 2 WHERE allocation_id = :b", {"b": b}),
        ("UPDATE allocations SET seq = 5 WHERE allocation_id = :a", {"a": a}),
    )
    bad = verify_chain(database, plan_id).first_bad
    assert bad is not None
    assert (bad.seq, bad.allocation_id) == (2, b)
    assert "prev_hash" in bad.reason


def test_edited_last_row_with_recomputed_hash(
    database: Database, plan_id: str, chain: list[Any]
) -> None:
    last = chain[-1]
    body = last.body.replace("0.6", "0.9")
    row_hash = reference_hash(last.prev_hash, plan_id, last.seq, last.allocation_id,
                              last.member_id, last.mix_version, last.created_at, body)
    tamper(database, ("UPDATE allocations SET body = :b, row_hash = :h WHERE allocation_id = :a",
                      {"b": body, "h": row_hash, "a": last.allocation_id}))
    bad = verify_chain(database, plan_id).first_bad
    assert bad is not None
    assert (bad.seq, bad.allocation_id) == (ROWS, last.allocation_id)
    assert "chain head" in bad.reason


def test_removed_chain_head(database: Database, plan_id: str, chain: list[Any]) -> None:
    tamper(database, ("DELETE FROM chain_heads WHERE plan_id = :p", {"p": plan_id}))
    bad = verify_chain(database, plan_id).first_bad
    assert bad is not None
    assert (bad.seq, bad.allocation_id) == (1, chain[0].allocation_id)
    assert "chain head" in bad.reason


def test_writer_hashes_links_exactly_as_link_hash() -> None:
    # The writer's per-row hashing is an unrolled copy of link_hash; both must give one text.
    from service.store.chain import link_hash
    from service.store.records import LogBatch
    from service.store.writer import _links

    batch = LogBatch("plan-a", "v1", "2026-12-01T00:00:00.000001Z", ["al_1", "al_2"], ["m-1", "m-2"], ['{"a":1}', '{"b":2}'])
    rows = list(_links(batch, 41, "f" * 64))
    first = link_hash("f" * 64, "plan-a", 42, "al_1", "m-1", "v1", "2026-12-01T00:00:00.000001Z", '{"a":1}')
    second = link_hash(first, "plan-a", 43, "al_2", "m-2", "v1", "2026-12-01T00:00:00.000001Z", '{"b":2}')
    assert [r[8] for r in rows] == [first, second] and rows[1][7] == first
