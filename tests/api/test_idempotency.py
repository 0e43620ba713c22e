"""Idempotency-Key on allocations (draft-ietf-httpapi-idempotency-key-header), both databases."""

from __future__ import annotations

import asyncio
import hashlib
import json
import time

import httpx
import pytest
from sqlalchemy import text

from service.api import create_app
from service.api.auth import key_id_of
from service.demo import DEMO_MIX
from service.settings import Settings
from service.store import Database, KeyReservation

from .conftest import OPERATOR_KEY, World

pytestmark = pytest.mark.anyio

BODY = {"member_id": "m-idem", "mix_version": DEMO_MIX["version"], "amount": "2500.00", "preference": {"risk_aversion": 3}}


async def logged(world: World, plan_id: str, keys: dict[str, dict[str, str]]) -> int:
    v = await world.client.get(f"/v1/plans/{plan_id}/audit/verify", headers=keys["committee"])
    assert v.json()["ok"] is True
    return int(v.json()["checked"])


async def setup(world: World, plan_id: str) -> dict[str, dict[str, str]]:
    keys = await world.plan(plan_id)
    await world.publish(plan_id, keys)
    return keys


async def test_retry_replays_the_first_answer_and_logs_nothing(world: World, new_plan_id: str) -> None:
    keys = await setup(world, new_plan_id)
    url = f"/v1/plans/{new_plan_id}/allocations"
    headers = keys["portal"] | {"Idempotency-Key": '"retry-1"'}
    first = await world.client.post(url, json=BODY, headers=headers)
    again = await world.client.post(url, json=BODY, headers=headers)
    assert first.status_code == again.status_code == 201
    assert again.json() == first.json() and again.headers["Mixline-Replay"] == "true"
    assert await logged(world, new_plan_id, keys) == 1
    other = await world.client.post(url, json=BODY | {"amount": "2600.00"}, headers=headers)
    assert other.status_code == 422 and other.headers["content-type"].startswith("application/problem+json")
    assert other.json()["errors"][0]["field"] == "Idempotency-Key"
    assert await logged(world, new_plan_id, keys) == 1


async def test_keys_are_scoped_to_the_calling_key(world: World, new_plan_id: str) -> None:
    keys = await setup(world, new_plan_id)
    r = await world.client.post(f"/v1/plans/{new_plan_id}/keys", json={"role": "portal"}, headers=world.operator)
    second = {"Authorization": f"Bearer {r.json()['secret']}", "Idempotency-Key": '"shared"'}
    url = f"/v1/plans/{new_plan_id}/allocations"
    a = await world.client.post(url, json=BODY, headers=keys["portal"] | {"Idempotency-Key": '"shared"'})
    b = await world.client.post(url, json=BODY, headers=second)
    assert a.status_code == b.status_code == 201 and a.json()["allocation_id"] != b.json()["allocation_id"]
    assert await logged(world, new_plan_id, keys) == 2


async def test_failed_request_gives_its_key_up(world: World, new_plan_id: str) -> None:
    keys = await setup(world, new_plan_id)
    url = f"/v1/plans/{new_plan_id}/allocations"
    headers = keys["portal"] | {"Idempotency-Key": '"fix-and-retry"'}
    bad = await world.client.post(url, json=BODY | {"mix_version": "not-published"}, headers=headers)
    assert bad.status_code == 409  # not the version in force
    good = await world.client.post(url, json=BODY, headers=headers)
    assert good.status_code == 201 and await logged(world, new_plan_id, keys) == 1


@pytest.mark.parametrize("value", ['""', '"' + "x" * 256 + '"', '"tab\there"', "a b"])
async def test_malformed_key_is_400(world: World, new_plan_id: str, value: str) -> None:
    keys = await setup(world, new_plan_id)
    r = await world.client.post(f"/v1/plans/{new_plan_id}/allocations", json=BODY, headers=keys["portal"] | {"Idempotency-Key": value})
    assert r.status_code == 400 and r.headers["content-type"].startswith("application/problem+json")
    assert await logged(world, new_plan_id, keys) == 0


async def test_expired_key_is_a_new_request(world: World, new_plan_id: str) -> None:
    keys = await setup(world, new_plan_id)
    url = f"/v1/plans/{new_plan_id}/allocations"
    headers = keys["portal"] | {"Idempotency-Key": '"old"'}
    first = await world.client.post(url, json=BODY, headers=headers)
    with world.database.writing() as s:  # the retention period passes
        s.execute(text("UPDATE idempotency_keys SET expires_at = created_at - 1 WHERE idempotency_key = 'old'"))
    later = await world.client.post(url, json=BODY, headers=headers)
    assert later.status_code == 201 and later.json()["allocation_id"] != first.json()["allocation_id"]
    assert await logged(world, new_plan_id, keys) == 2


async def test_fifty_simultaneous_requests_log_one_row(world: World, new_plan_id: str) -> None:
    keys = await setup(world, new_plan_id)
    url = f"/v1/plans/{new_plan_id}/allocations"
    headers = keys["portal"] | {"Idempotency-Key": '"storm"'}
    answers = await asyncio.gather(*(world.client.post(url, json=BODY, headers=headers) for _ in range(50)))
    statuses = sorted(r.status_code for r in answers)
    assert set(statuses) <= {201, 409}, statuses
    created = [r.json() for r in answers if r.status_code == 201]
    assert created and all(c == created[0] for c in created)  # replays are the first answer
    for r in answers:
        if r.status_code == 409:
            assert r.headers["Retry-After"] == "1" and r.headers["content-type"].startswith("application/problem+json")
    assert await logged(world, new_plan_id, keys) == 1
    # Once the first answer is stored, every retry replays it.
    replay = await world.client.post(url, json=BODY, headers=headers)
    assert replay.status_code == 201 and replay.json() == created[0]


async def test_batch_retry_replays(world: World, new_plan_id: str) -> None:
    keys = await setup(world, new_plan_id)
    body = {"mix_version": DEMO_MIX["version"], "members": [{"member_id": f"m{i}", "amount": "100", "preference": {"risk_score": 1}} for i in range(3)]}
    keys_with = keys["portal"] | {"Idempotency-Key": '"nightly-2026-12-01"'}
    # risk_score needs a table and this plan has none: the first try fails, holding no key.
    bad = await world.client.post(f"/v1/plans/{new_plan_id}/allocations/batch", json=body, headers=keys_with)
    assert bad.status_code == 422
    body["members"] = [m | {"preference": {"risk_aversion": 2}} for m in body["members"]]
    first = await world.client.post(f"/v1/plans/{new_plan_id}/allocations/batch", json=body, headers=keys_with)
    again = await world.client.post(f"/v1/plans/{new_plan_id}/allocations/batch", json=body, headers=keys_with)
    assert first.status_code == again.status_code == 201 and again.json() == first.json()
    assert await logged(world, new_plan_id, keys) == 3


def _crashed_reservation(world: World, plan_id: str, portal: dict[str, str], key: str, raw: bytes, *, reserved_at: int) -> None:
    """What a process killed between reserving a key and answering leaves behind: the
    reservation, taken through the writer as a request takes it, and nothing else."""
    secret = portal["Authorization"].split()[1]
    op = KeyReservation(plan_id, key_id_of(secret), key, hashlib.sha256(raw).hexdigest(), reserved_at,
                        world.settings.idempotency_lease_seconds)
    assert world.database.writer.submit_key_operation(op).result(5) is None


async def test_keyed_retry_after_a_crash_is_answered(world: World, new_plan_id: str) -> None:
    keys = await setup(world, new_plan_id)
    url = f"/v1/plans/{new_plan_id}/allocations"
    raw = json.dumps(BODY).encode()
    lease = world.settings.idempotency_lease_seconds
    _crashed_reservation(world, new_plan_id, keys["portal"], "after-crash", raw, reserved_at=int(time.time()) - lease - 1)
    headers = keys["portal"] | {"Idempotency-Key": '"after-crash"', "Content-Type": "application/json"}
    retry = await world.client.post(url, content=raw, headers=headers)
    assert retry.status_code == 201, retry.text  # the dead process's lease ran out: answered as new
    again = await world.client.post(url, content=raw, headers=headers)
    assert again.status_code == 201 and again.headers["Mixline-Replay"] == "true" and again.json() == retry.json()
    assert await logged(world, new_plan_id, keys) == 1


async def test_a_fresh_crash_holds_the_key_for_its_lease_only(database: Database, new_plan_id: str) -> None:
    settings = Settings(database_url=database.url, bootstrap_operator_key=OPERATOR_KEY, access_log="off",
                        idempotency_lease_seconds=1)
    app = create_app(settings, database, migrate=False)
    async with app.router.lifespan_context(app):
        async with httpx.AsyncClient(transport=httpx.ASGITransport(app=app), base_url="http://mixline.test") as client:
            world = World(client, database, settings)
            keys = await setup(world, new_plan_id)
            raw = json.dumps(BODY).encode()
            _crashed_reservation(world, new_plan_id, keys["portal"], "just-crashed", raw, reserved_at=int(time.time()))
            url = f"/v1/plans/{new_plan_id}/allocations"
            headers = keys["portal"] | {"Idempotency-Key": '"just-crashed"', "Content-Type": "application/json"}
            held = await world.client.post(url, content=raw, headers=headers)
            assert held.status_code == 409 and held.headers["Retry-After"] == "1"
            started = time.monotonic()
            while (r := await world.client.post(url, content=raw, headers=headers)).status_code == 409:
                assert time.monotonic() - started < 3.0, "the lease of 1 s held the key for longer"
                await asyncio.sleep(0.1)
            assert r.status_code == 201, r.text
            assert await logged(world, new_plan_id, keys) == 1


async def test_a_keyed_batch_larger_than_one_chunk_replays(world: World, new_plan_id: str) -> None:
    from service.allocation.batch_worker import STREAM_CHUNK as CHUNK

    keys = await setup(world, new_plan_id)
    n = CHUNK + 11  # staged in two chunks, its answer stored as it becomes visible
    body = {"mix_version": DEMO_MIX["version"],
            "members": [{"member_id": f"m{i}", "amount": "100.00", "preference": {"risk_aversion": 3}} for i in range(n)]}
    url = f"/v1/plans/{new_plan_id}/allocations/batch"
    headers = keys["portal"] | {"Idempotency-Key": '"big-nightly"'}
    first = await world.client.post(url, json=body, headers=headers)
    assert first.status_code == 201, first.text[:300]
    again = await world.client.post(url, json=body, headers=headers)
    assert again.status_code == 201 and again.headers["Mixline-Replay"] == "true" and again.json() == first.json()
    assert await logged(world, new_plan_id, keys) == n
