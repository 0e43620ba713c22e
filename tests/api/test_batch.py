"""POST .../allocations/batch on both databases: order, all-or-nothing, limits, the chain after it."""

from __future__ import annotations

from decimal import Decimal
from typing import Any

import httpx
import pytest
from numpy.testing import assert_allclose

from service.api import create_app
from service.demo import DEMO_MIX
from service.settings import Settings

from .conftest import OPERATOR_KEY, World

pytestmark = pytest.mark.anyio


def member(i: int, **extra: Any) -> dict[str, Any]:
    prefs = [{"risk_aversion": 3}, {"target_volatility": 0.06}, {"max_loss": 0.1, "confidence": 0.95}, {"risk_score": 2}]
    return {"member_id": f"m-{i:05d}", "amount": f"{1000 + 37 * i}.{i % 100:02d}", "preference": prefs[i % 4]} | extra


async def setup(world: World, plan_id: str, **policy: Any) -> dict[str, dict[str, str]]:
    keys = await world.plan(plan_id, risk_score_table={"1": 8.0, "2": 4.0}, **policy)
    await world.publish(plan_id, keys)
    return keys


async def checked(world: World, plan_id: str, keys: dict[str, dict[str, str]]) -> int:
    v = (await world.client.get(f"/v1/plans/{plan_id}/audit/verify", headers=keys["committee"])).json()
    assert v["ok"] is True, v
    return int(v["checked"])


async def test_batch_is_logged_like_singles_and_in_order(world: World, new_plan_id: str) -> None:
    keys = await setup(world, new_plan_id)
    members = [member(i) for i in range(40)]
    r = await world.client.post(f"/v1/plans/{new_plan_id}/allocations/batch",
                                json={"mix_version": DEMO_MIX["version"], "members": members}, headers=keys["portal"])
    assert r.status_code == 201, r.text
    out = r.json()
    assert out["count"] == 40 and [x["member_id"] for x in out["results"]] == [m["member_id"] for m in members]
    assert len(out["disclosures"]) >= 4
    assert await checked(world, new_plan_id, keys) == 40
    for m, res in zip(members, out["results"], strict=True):
        assert Decimal(res["amounts"]["risky"]) + Decimal(res["amounts"]["safe"]) == Decimal(m["amount"])
        # The same member asked alone gets the same split (the single route is the reference).
        single = await world.client.post(f"/v1/plans/{new_plan_id}/allocations",
                                         json=m | {"mix_version": DEMO_MIX["version"]}, headers=keys["portal"])
        s = single.json()
        assert_allclose(res["risky_fraction"], s["risky_fraction"], rtol=1e-12)
        assert res["amounts"] == s["amounts"] and res["limited_by"] == s["limited_by"]
        stored = (await world.client.get(f"/v1/plans/{new_plan_id}/allocations/{res['allocation_id']}", headers=keys["portal"])).json()
        assert stored["by_asset"] == s["by_asset"] and stored["member_id"] == m["member_id"]
        assert sum(Decimal(v) for v in stored["by_asset"].values()) == Decimal(stored["amounts"]["risky"])
    assert await checked(world, new_plan_id, keys) == 80  # the chain still verifies after both kinds


async def test_one_bad_member_fails_the_call_and_logs_nothing(world: World, new_plan_id: str) -> None:
    keys = await setup(world, new_plan_id)
    url = f"/v1/plans/{new_plan_id}/allocations/batch"
    cases = [
        (member(7, preference={"risk_aversion": -2}), "members[7].preference.risk_aversion"),
        (member(7, amount="12.345"), "members[7].amount"),
        (member(7, amount=True), "members[7].amount"),
        (member(7, preference={"risk_score": 9}), "members[7].preference.risk_score"),
        (member(7, preference={"max_loss": 0.1, "confidence": 1.2}), "members[7].preference.confidence"),
        (member(7, member_id="has space"), "members[7].member_id"),
        (member(7, extra_field=1), "members[7].extra_field"),
        (member(7, preference={"risk_aversion": 1, "target_volatility": 0.1}), "members[7].preference"),
        (member(7, contribution="10"), "members[7].contribution"),
    ]
    for bad, field in cases:
        members = [member(i) for i in range(20)]
        members[7] = bad
        r = await world.client.post(url, json={"mix_version": DEMO_MIX["version"], "members": members}, headers=keys["portal"])
        assert r.status_code == 422, (field, r.text)
        assert r.headers["content-type"].startswith("application/problem+json")
        assert field in [e["field"] for e in r.json()["errors"]], (field, r.json())
    assert await checked(world, new_plan_id, keys) == 0
    for body, status in (({"mix_version": DEMO_MIX["version"], "members": []}, 422), ({"mix_version": "nope", "members": [member(1)]}, 409),
                         ({"members": [member(1)]}, 422), ({"mix_version": DEMO_MIX["version"], "members": [member(1)], "x": 1}, 422)):
        r = await world.client.post(url, json=body, headers=keys["portal"])
        assert r.status_code == status, r.text
    raw = await world.client.post(url, content=b'{"mix_version": "2026-q4", "members": [NaN]}', headers=keys["portal"] | {"content-type": "application/json"})
    assert raw.status_code == 422
    assert await checked(world, new_plan_id, keys) == 0


async def test_every_bad_member_is_listed_and_nothing_logged(world: World, new_plan_id: str) -> None:
    keys = await setup(world, new_plan_id)
    url = f"/v1/plans/{new_plan_id}/allocations/batch"
    members = [member(i) for i in range(30)]
    members[3] = member(3, amount="-5")
    members[11] = member(11, preference={"target_volatility": 9})
    members[12] = member(12, preference={"risk_score": 2.5}, amount=False)
    members[29] = member(29, member_id=members[4]["member_id"])  # a member twice
    r = await world.client.post(url, json={"mix_version": DEMO_MIX["version"], "members": members}, headers=keys["portal"])
    assert r.status_code == 422, r.text
    problem = r.json()
    fields = [e["field"] for e in problem["errors"]]
    assert fields == ["members[3].amount", "members[11].preference.target_volatility",
                      "members[12].amount", "members[12].preference.risk_score", "members[29].member_id"]
    assert problem["error_count"] == 5
    duplicate = problem["errors"][-1]["reason"]
    assert "members[4]" in duplicate and members[4]["member_id"] in duplicate  # both positions named
    assert await checked(world, new_plan_id, keys) == 0
    # A systematic mistake in a large file: the first 1,000 are listed, the count says the rest.
    many = [member(i, amount="1.001") for i in range(1500)]
    r = await world.client.post(url, json={"mix_version": DEMO_MIX["version"], "members": many}, headers=keys["portal"])
    problem = r.json()
    assert r.status_code == 422 and len(problem["errors"]) == 1000 and problem["error_count"] == 1500
    assert "500 more not listed" in problem["detail"]
    assert await checked(world, new_plan_id, keys) == 0


async def test_routing_and_leverage_in_a_batch(world: World, new_plan_id: str) -> None:
    keys = await setup(world, new_plan_id, max_risky_fraction=1.5, borrowing_rate=0.035)
    members = [
        {"member_id": "r-1", "preference": {"risk_aversion": 1}, "holdings": {"risky": "1000.00", "safe": "9000.00"}, "contribution": "300.00"},
        {"member_id": "r-2", "amount": "500", "preference": {"risk_aversion": 0.5}},
        {"member_id": "r-3", "preference": {"target_volatility": 0.01}, "holdings": {"risky": "5000", "safe": "0"}, "contribution": "100"},
    ]
    r = await world.client.post(f"/v1/plans/{new_plan_id}/allocations/batch",
                                json={"mix_version": DEMO_MIX["version"], "members": members}, headers=keys["portal"])
    assert r.status_code == 201, r.text
    res = r.json()["results"]
    # Under-weight in risky by more than the contribution: all of it to risky (and the reverse).
    assert res[0]["contribution_split"] == {"risky": "300.00", "safe": "0.00"}
    assert res[2]["contribution_split"] == {"risky": "0.00", "safe": "100.00"}
    assert "contribution_split" not in res[1]
    assert res[1]["risky_fraction"] > 1 and Decimal(res[1]["amounts"]["safe"]) < 0
    assert await checked(world, new_plan_id, keys) == 3


async def test_batch_limit_is_413(world: World, new_plan_id: str) -> None:
    settings = Settings(database_url=world.database.url, bootstrap_operator_key=OPERATOR_KEY, batch_limit=5)
    app = create_app(settings, world.database, migrate=False)
    keys = await setup(world, new_plan_id)
    async with app.router.lifespan_context(app):
        async with httpx.AsyncClient(transport=httpx.ASGITransport(app=app), base_url="http://t") as c:
            r = await c.post(f"/v1/plans/{new_plan_id}/allocations/batch",
                             json={"mix_version": DEMO_MIX["version"], "members": [member(i) for i in range(6)]}, headers=keys["portal"])
            assert r.status_code == 413 and r.headers["content-type"].startswith("application/problem+json")
    assert await checked(world, new_plan_id, keys) == 0


async def test_a_batch_larger_than_one_chunk_is_staged_then_visible(world: World, new_plan_id: str) -> None:
    from service.allocation.batch_worker import STREAM_CHUNK as CHUNK

    keys = await setup(world, new_plan_id)
    n = CHUNK + 808  # two chunks for the log writer
    members = [member(i) for i in range(n)]
    r = await world.client.post(f"/v1/plans/{new_plan_id}/allocations/batch",
                                json={"mix_version": DEMO_MIX["version"], "members": members}, headers=keys["portal"])
    assert r.status_code == 201, r.text[:300]
    results = r.json()["results"]
    assert len(results) == n and [x["member_id"] for x in results[-3:]] == [m["member_id"] for m in members[-3:]]
    for res in (results[0], results[CHUNK], results[-1]):
        back = await world.client.get(f"/v1/plans/{new_plan_id}/allocations/{res['allocation_id']}", headers=keys["portal"])
        assert back.status_code == 200 and back.json()["amounts"] == res["amounts"]
    assert await checked(world, new_plan_id, keys) == n
