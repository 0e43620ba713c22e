"""Round trips through the repository functions, on SQLite and PostgreSQL."""

from __future__ import annotations

import hashlib
from datetime import UTC, datetime, timedelta

import orjson
import pytest
from sqlalchemy import text
from sqlalchemy.exc import DBAPIError

import service.store as store
from service.store import (
    Conflict,
    Database,
    get_allocation,
    get_key,
    get_mix,
    get_plan,
    insert_key,
    insert_mix,
    insert_plan,
    list_allocations,
    list_keys,
    list_lifecycle,
    lock_lifecycle,
    record_activation,
    record_retirement,
    revoke_key,
    secret_hash,
    secret_matches,
    upsert_key,
)
from tests.store.conftest import AppendRows

POLICY = {"max_risky_fraction": 1.5, "min_risky_fraction": 0.1, "borrowing_rate": 0.045}
INPUTS = {"risk_free_rate": 0.02, "assets": [{"code": "GLEQ", "expected_return": 0.07}]}
SOLVED = {"tangency": {"weights": {"GLEQ": 1.0}, "sharpe_ratio": 0.31}}


def test_public_names_are_exactly_the_interface() -> None:
    assert sorted(store.__all__) == sorted(
        [
            "GENESIS_HASH", "HeadSigner", "SignedHead", "check_against_head", "current_head", "load_public_key", "BadRow", "ChainReport", "ChainWriter", "Conflict", "Database", "Finished", "LogStream", "IdempotencyCompletion", "IdempotencyLeaseLost", "IdempotencyRecord", "KeyRelease", "KeyReservation", "get_frontier", "insert_frontier",
            "KeyRecord", "LogBatch", "MixRecord", "PlanRecord", "get_allocation", "get_key",
            "get_mix", "get_plan", "insert_key", "insert_mix", "insert_plan",
            "latest_allocations", "list_allocations", "list_keys", "revoke_key", "secret_hash", "secret_matches",
            "MixLifecycle", "list_lifecycle", "lock_lifecycle", "record_activation",
            "record_retirement",
            "upsert_key", "verify_chain", "json_text",
        ]
    )
    assert all(hasattr(store, name) for name in store.__all__)


def test_plan_round_trip(database: Database, new_plan_id: str) -> None:
    before = datetime.now(UTC)
    with database.writing() as s:
        insert_plan(s, plan_id=new_plan_id, name="Harbour Lane", currency="EUR", policy=POLICY)
    with database.reading() as s:
        plan = get_plan(s, new_plan_id)
        assert get_plan(s, new_plan_id + "-other") is None
    assert plan is not None
    assert (plan.plan_id, plan.name, plan.currency) == (new_plan_id, "Harbour Lane", "EUR")
    assert plan.policy == POLICY
    assert plan.active_version is None
    assert plan.created_at.tzinfo is not None
    # Database clock and ours are one machine; a second of slack covers rounding.
    assert before - timedelta(seconds=1) <= plan.created_at <= datetime.now(UTC)


def test_json_is_stored_as_identical_sorted_text(database: Database, new_plan_id: str) -> None:
    policy = {"z": 1, "a": {"y": 2, "b": 3}}
    with database.writing() as s:
        insert_plan(s, plan_id=new_plan_id, name="P", currency="EUR", policy=policy)
    with database.reading() as s:
        stored = s.execute(
            text("SELECT policy FROM plans WHERE plan_id = :p"), {"p": new_plan_id}
        ).scalar_one()
    assert stored == '{"a":{"b":3,"y":2},"z":1}'
    assert orjson.loads(stored) == policy


def test_duplicate_plan_is_a_conflict_and_keeps_the_transaction_usable(
    database: Database, new_plan_id: str
) -> None:
    with database.writing() as s:
        insert_plan(s, plan_id=new_plan_id, name="First", currency="EUR", policy={})
    with database.writing() as s:
        with pytest.raises(Conflict, match=new_plan_id):
            insert_plan(s, plan_id=new_plan_id, name="Second", currency="USD", policy={})
        # On PostgreSQL a raised unique violation would have aborted this transaction.
        insert_key(s, key_id=f"k-{new_plan_id}", plan_id=new_plan_id, role="portal",
                   secret_hash=secret_hash("s"))
    with database.reading() as s:
        plan = get_plan(s, new_plan_id)
        assert plan is not None and plan.name == "First"
        assert get_key(s, f"k-{new_plan_id}") is not None


def test_writing_rolls_back_on_error(database: Database, new_plan_id: str) -> None:
    with pytest.raises(RuntimeError, match="abandon"):
        with database.writing() as s:
            insert_plan(s, plan_id=new_plan_id, name="P", currency="EUR", policy={})
            raise RuntimeError("abandon")
    with database.reading() as s:
        assert get_plan(s, new_plan_id) is None


def test_reading_refuses_writes(database: Database, new_plan_id: str) -> None:
    with database.reading() as s, pytest.raises(DBAPIError, match="read"):
        insert_plan(s, plan_id=new_plan_id, name="P", currency="EUR", policy={})
    with database.reading() as s:
        assert get_plan(s, new_plan_id) is None


def test_keys_list_expire_and_revoke(database: Database, plan_id: str) -> None:
    expires = datetime(2031, 5, 17, 9, 30, tzinfo=UTC)
    with database.writing() as s:
        first = insert_key(s, key_id=f"a-{plan_id}", plan_id=plan_id, role="portal", secret_hash=secret_hash("1"))
        insert_key(s, key_id=f"b-{plan_id}", plan_id=plan_id, role="committee", secret_hash=secret_hash("2"),
                   expires_at=expires)
    assert first.expires_at is None and first.revoked_at is None
    with database.reading() as s:
        listed = list_keys(s, plan_id)
        assert list_keys(s, plan_id + "-other") == []
    assert [k.key_id for k in listed] == [f"a-{plan_id}", f"b-{plan_id}"]
    assert listed[1].expires_at == expires and listed[1].revoked_at is None
    assert listed[1].unusable_at(expires - timedelta(seconds=1)) is None
    assert listed[1].unusable_at(expires) == "expired"
    when = datetime(2030, 1, 2, 3, 4, 5, tzinfo=UTC)
    with database.writing() as s:
        revoked = revoke_key(s, plan_id, f"a-{plan_id}", now=when)
        assert revoke_key(s, plan_id, "no-such-key", now=when) is None
        assert revoke_key(s, plan_id + "-other", f"a-{plan_id}", now=when) is None  # another plan's
    assert revoked is not None and revoked.revoked_at == when and revoked.unusable_at(when) == "revoked"
    with database.writing() as s:  # revoking again keeps the first time
        again = revoke_key(s, plan_id, f"a-{plan_id}", now=when + timedelta(days=1))
    assert again is not None and again.revoked_at == when
    with database.reading() as s:
        key = get_key(s, f"a-{plan_id}")
    assert key is not None and key.revoked_at == when


def test_key_round_trip_conflict_and_upsert(database: Database, plan_id: str) -> None:
    key_id = f"key-{plan_id}"
    with database.writing() as s:
        insert_key(s, key_id=key_id, plan_id=plan_id, role="committee",
                   secret_hash=secret_hash("first"))
    with database.writing() as s, pytest.raises(Conflict):
        insert_key(s, key_id=key_id, plan_id=plan_id, role="portal",
                   secret_hash=secret_hash("second"))
    with database.reading() as s:
        key = get_key(s, key_id)
        assert get_key(s, key_id + "-other") is None
    assert key is not None
    assert (key.key_id, key.plan_id, key.role) == (key_id, plan_id, "committee")
    assert secret_matches("first", key.secret_hash)
    assert key.created_at.tzinfo is not None

    operator_id = f"op-{plan_id}"
    with database.writing() as s:
        upsert_key(s, key_id=operator_id, plan_id=None, role="operator",
                   secret_hash=secret_hash("boot-1"))
    with database.writing() as s:
        upsert_key(s, key_id=operator_id, plan_id=None, role="operator",
                   secret_hash=secret_hash("boot-2"))
    with database.reading() as s:
        operator = get_key(s, operator_id)
    assert operator is not None and operator.plan_id is None and operator.role == "operator"
    assert secret_matches("boot-2", operator.secret_hash)
    assert not secret_matches("boot-1", operator.secret_hash)


def test_secret_hash_is_sha256_hex() -> None:
    # Reference: hashlib itself.
    assert secret_hash("a-secret") == hashlib.sha256(b"a-secret").hexdigest()
    assert secret_matches("a-secret", secret_hash("a-secret"))
    assert not secret_matches("b-secret", secret_hash("a-secret"))


def test_mix_round_trip_conflict_and_activation(database: Database, plan_id: str) -> None:
    with database.writing() as s:
        insert_mix(s, plan_id=plan_id, version="2026-q4", content_hash="c" * 64,
                   inputs=INPUTS, solved=SOLVED)
    with database.writing() as s, pytest.raises(Conflict, match="2026-q4"):
        insert_mix(s, plan_id=plan_id, version="2026-q4", content_hash="d" * 64,
                   inputs={}, solved={})
    with database.reading() as s:
        mix = get_mix(s, plan_id, "2026-q4")
        assert get_mix(s, plan_id, "2027-q1") is None
    assert mix is not None
    assert (mix.plan_id, mix.version, mix.content_hash) == (plan_id, "2026-q4", "c" * 64)
    assert (mix.inputs, mix.solved) == (INPUTS, SOLVED)
    assert mix.created_at.tzinfo is not None

    with database.writing() as s:
        insert_mix(s, plan_id=plan_id, version="2027-q1", content_hash="e" * 64,
                   inputs=INPUTS, solved=SOLVED, published_by="key-a")
    at = datetime(2026, 12, 2, 3, 0, tzinfo=UTC)
    with database.writing() as s:
        assert lock_lifecycle(s, plan_id, "2026-q4")[0] is None
        record_activation(s, plan_id, "2026-q4", retires=None, key_id="key-b", at=at)
    with database.writing() as s:
        active, q1 = lock_lifecycle(s, plan_id, "2027-q1")
        assert active == "2026-q4" and q1 is not None and q1.published_by == "key-a"
        record_activation(s, plan_id, "2027-q1", retires="2026-q4", key_id="key-c", at=at + timedelta(hours=1))
    with database.reading() as s:
        plan = get_plan(s, plan_id)
        q4, q1 = list_lifecycle(s, plan_id)
    assert plan is not None and plan.active_version == "2027-q1"
    assert (q4.version, q4.activated_by, q4.activated_at, q4.retired_by) == ("2026-q4", "key-b", at, "key-c")
    assert (q1.activated_by, q1.retired_at) == ("key-c", None)
    with database.writing() as s:
        record_retirement(s, plan_id, "2026-q4", key_id="key-d", at=at + timedelta(hours=2))
    with database.reading() as s:
        assert list_lifecycle(s, plan_id)[0].retired_by == "key-c"  # retired once, never again
    with database.writing() as s:
        assert lock_lifecycle(s, plan_id, "2028-q1")[1] is None
        with pytest.raises(LookupError):
            lock_lifecycle(s, "plan-missing", "2026-q4")


def test_allocation_reads(database: Database, plan_id: str, append_rows: AppendRows) -> None:
    ids = append_rows(plan_id, 7, member_ids=["m-ana", "m-bo"] * 3 + ["m-ana"])
    with database.reading() as s:
        first = get_allocation(s, plan_id, ids[0])
        assert first is not None and orjson.loads(first)["allocation_id"] == ids[0]
        assert get_allocation(s, plan_id, "alloc-missing") is None
        assert get_allocation(s, "plan-other", ids[0]) is None  # never across plans
        ana = [orjson.loads(b)["allocation_id"] for b in list_allocations(s, plan_id, "m-ana")]
        assert ana == [ids[6], ids[4], ids[2], ids[0]]  # newest first
        latest_two = list_allocations(s, plan_id, "m-ana", limit=2)
        assert [orjson.loads(b)["allocation_id"] for b in latest_two] == [ids[6], ids[4]]
        assert list_allocations(s, plan_id, "m-nobody") == []
