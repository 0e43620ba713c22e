"""The HTTP contract end to end: every path, every role, every error class (SQLite and PostgreSQL)."""

from __future__ import annotations

import asyncio
import copy
from decimal import Decimal
from typing import Any

import pytest
from numpy.testing import assert_allclose

from service.demo import DEMO_MIX

from .conftest import World

pytestmark = pytest.mark.anyio

PROBLEM = "application/problem+json"


def assert_problem(r: Any, status: int, field: str | None = None) -> dict[str, Any]:
    assert r.status_code == status, r.text
    assert r.headers["content-type"].startswith(PROBLEM)
    body = r.json()
    assert {"type", "title", "status", "detail"} <= body.keys() and body["status"] == status
    if field is not None:
        assert any(e["field"] == field for e in body["errors"]), body
    return body  # type: ignore[no-any-return]


async def test_publish_activate_allocate_and_audit(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    mix = await world.publish(new_plan_id, keys)
    t = mix["tangency"]
    assert set(t["weights"]) == {a["code"] for a in DEMO_MIX["assets"]}
    assert_allclose(sum(t["weights"].values()), 1.0, atol=1e-12)  # full investment (identity)
    assert mix["kkt_residual"] <= 1e-10
    # Bounds hold at the tangency (the demo caps FRONTIER_EQ at 0.15 and TIMBERLAND at 0.20).
    assert t["weights"]["FRONTIER_EQ"] <= 0.15 + 1e-12 and min(t["weights"].values()) >= -1e-12

    r = await world.client.post(
        f"/v1/plans/{new_plan_id}/allocations",
        json={"member_id": "m-1", "mix_version": DEMO_MIX["version"], "amount": "133333.33", "preference": {"risk_aversion": 4}},
        headers=keys["portal"],
    )
    assert r.status_code == 201, r.text
    a = r.json()
    # Closed form y* = (mu_T - rf) / (A sigma_T^2), within the default policy band [0, 1].
    y = (t["expected_return"] - DEMO_MIX["risk_free_rate"]) / (4 * t["volatility"] ** 2)
    assert_allclose(a["unconstrained_risky_fraction"], y, rtol=1e-12)
    assert a["risky_fraction"] == min(y, 1.0)
    assert Decimal(a["amounts"]["risky"]) + Decimal(a["amounts"]["safe"]) == Decimal("133333.33")
    assert sum(Decimal(v) for v in a["by_asset"].values()) == Decimal(a["amounts"]["risky"])
    assert len(a["disclosures"]) >= 4 and a["created_at"].endswith("Z")

    got = await world.client.get(f"/v1/plans/{new_plan_id}/allocations/{a['allocation_id']}", headers=keys["portal"])
    assert got.status_code == 200 and got.json() == a
    listed = await world.client.get(f"/v1/plans/{new_plan_id}/allocations", params={"member_id": "m-1"}, headers=keys["portal"])
    assert listed.status_code == 200 and listed.json()["allocations"] == [a]

    for who in ("committee", "operator"):
        v = await world.client.get(f"/v1/plans/{new_plan_id}/audit/verify", headers=keys[who])
        assert v.status_code == 200 and v.json()["ok"] is True and v.json()["checked"] == 1


async def test_mix_reads_current_and_frontier(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    r = await world.client.get(f"/v1/plans/{new_plan_id}/mixes/current", headers=keys["portal"])
    assert_problem(r, 404)
    mix = await world.publish(new_plan_id, keys)
    for who in ("portal", "committee", "operator"):
        cur = await world.client.get(f"/v1/plans/{new_plan_id}/mixes/current", headers=keys[who])
        assert cur.status_code == 200 and cur.json()["content_hash"] == mix["content_hash"]
    one = await world.client.get(f"/v1/plans/{new_plan_id}/mixes/{DEMO_MIX['version']}", headers=keys["portal"])
    assert one.status_code == 200 and one.json()["tangency"] == mix["tangency"]
    fr = await world.client.get(f"/v1/plans/{new_plan_id}/mixes/{DEMO_MIX['version']}/frontier", params={"points": 9}, headers=keys["portal"])
    assert fr.status_code == 200, fr.text
    f = fr.json()
    # Nine evenly spaced points, with the corners and the tangency among them (a spaced point that
    # falls on one of those is given once, under that kind).
    kinds = [p["kind"] for p in f["points"]]
    assert kinds.count("spaced") <= 9 < len(kinds) and kinds.count("tangency") == 1
    rets = [p["expected_return"] for p in f["points"]]
    assert rets == sorted(rets)
    # The capital allocation line is tangent to the frontier: no frontier point lies above it.
    line = f["allocation_line"]
    assert line["intercept"] == DEMO_MIX["risk_free_rate"]
    for p in f["points"]:
        assert p["expected_return"] <= line["intercept"] + line["slope"] * p["volatility"] + 1e-9
        assert_allclose(sum(p["weights"].values()), 1.0, atol=1e-9)
    assert_allclose(f["tangency"]["sharpe_ratio"], line["slope"], rtol=1e-12)
    bad = await world.client.get(f"/v1/plans/{new_plan_id}/mixes/{DEMO_MIX['version']}/frontier", params={"points": 1}, headers=keys["portal"])
    assert_problem(bad, 422)
    huge = await world.client.get(f"/v1/plans/{new_plan_id}/mixes/{DEMO_MIX['version']}/frontier", params={"points": 100000}, headers=keys["portal"])
    assert_problem(huge, 422, "points")


async def test_publish_is_idempotent_and_immutable(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    first = await world.publish(new_plan_id, keys, activate=False)
    body = copy.deepcopy(DEMO_MIX) | {"cross_check": False}
    again = await world.client.post(f"/v1/plans/{new_plan_id}/mixes", json=body, headers=keys["committee"])
    assert again.status_code == 200 and again.json() == first
    other = copy.deepcopy(body)
    other["risk_free_rate"] = 0.02
    clash = await world.client.post(f"/v1/plans/{new_plan_id}/mixes", json=other, headers=keys["committee"])
    assert_problem(clash, 409)
    still = await world.client.get(f"/v1/plans/{new_plan_id}/mixes/{DEMO_MIX['version']}", headers=keys["committee"])
    assert still.json()["content_hash"] == first["content_hash"]


async def test_cross_checks_reported(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    body = copy.deepcopy(DEMO_MIX) | {"cross_check": True, "version": "with-checks"}
    r = await world.client.post(f"/v1/plans/{new_plan_id}/mixes", json=body, headers=keys["committee"])
    assert r.status_code == 201, r.text
    checks = r.json()["cross_checks"]
    assert {c["method"] for c in checks} == {"direct_search", "risk_grid", "return_grid"}
    for c in checks:
        # A numerical route can only tie or trail the exact maximum Sharpe ratio.
        assert c["sharpe_ratio"] <= r.json()["tangency"]["sharpe_ratio"] + 1e-7
        assert c["max_weight_gap"] < 0.05


async def test_roles_and_plan_scoping(world: World, new_plan_id: str) -> None:
    a = await world.plan(new_plan_id)
    b_id = new_plan_id + "-b"
    b = await world.plan(b_id)
    await world.publish(b_id, b)
    alloc = {"member_id": "m", "mix_version": DEMO_MIX["version"], "amount": "100", "preference": {"risk_aversion": 3}}
    c = world.client
    # Another plan's key: 404, never 403, for every kind of call.
    for who in ("committee", "portal"):
        for r in (
            await c.get(f"/v1/plans/{b_id}/mixes/current", headers=a[who]),
            await c.post(f"/v1/plans/{b_id}/allocations", json=alloc, headers=a[who]),
            await c.post(f"/v1/plans/{b_id}/mixes", json=DEMO_MIX, headers=a[who]),
            await c.get(f"/v1/plans/{b_id}/audit/verify", headers=a[who]),
            await c.post(f"/v1/plans/{b_id}/keys", json={"role": "portal"}, headers=a[who]),
            await c.get(f"/v1/plans/{b_id}", headers=a[who]),
        ):
            assert_problem(r, 404)
    # Right plan, wrong role: 403.
    assert_problem(await c.post(f"/v1/plans/{b_id}/mixes", json=DEMO_MIX, headers=b["portal"]), 403)
    assert_problem(await c.post(f"/v1/plans/{b_id}/mixes/{DEMO_MIX['version']}/activate", headers=b["portal"]), 403)
    assert_problem(await c.post(f"/v1/plans/{b_id}/allocations", json=alloc, headers=b["committee"]), 403)
    assert_problem(await c.get(f"/v1/plans/{b_id}/audit/verify", headers=b["portal"]), 403)
    assert_problem(await c.post(f"/v1/plans/{b_id}/keys", json={"role": "portal"}, headers=b["committee"]), 403)
    assert_problem(await c.post("/v1/plans", json={"plan_id": "x", "name": "x", "currency": "USD"}, headers=b["committee"]), 403)
    # No key, a malformed header, a wrong key: 401.
    assert_problem(await c.get(f"/v1/plans/{b_id}/mixes/current"), 401)
    assert_problem(await c.get(f"/v1/plans/{b_id}/mixes/current", headers={"Authorization": "Basic abc"}), 401)
    wrong = b["portal"]["Authorization"][:-4] + "AAAA"
    assert_problem(await c.get(f"/v1/plans/{b_id}/mixes/current", headers={"Authorization": wrong}), 401)
    assert_problem(await c.get(f"/v1/plans/{b_id}/mixes/current", headers={"Authorization": "Bearer nope"}), 401)
    # An unknown plan looks exactly like another plan's.
    assert_problem(await c.get("/v1/plans/never-made/mixes/current", headers=world.operator), 404)


async def test_plan_creation_rules(world: World, new_plan_id: str) -> None:
    c = world.client
    ok = await c.post("/v1/plans", json={"plan_id": new_plan_id, "name": "P", "currency": "EUR"}, headers=world.operator)
    assert ok.status_code == 201 and ok.json()["policy"]["max_risky_fraction"] == 1.0
    assert_problem(await c.post("/v1/plans", json={"plan_id": new_plan_id, "name": "P", "currency": "EUR"}, headers=world.operator), 409)
    lever = {"plan_id": new_plan_id + "-l", "name": "L", "currency": "USD", "policy": {"max_risky_fraction": 1.5}}
    assert_problem(await c.post("/v1/plans", json=lever, headers=world.operator), 422, "policy.borrowing_rate")
    lever["policy"]["borrowing_rate"] = 0.06  # type: ignore[index]
    assert (await c.post("/v1/plans", json=lever, headers=world.operator)).status_code == 201


async def test_borrowing_rate_below_risk_free_is_refused_at_publish(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id, max_risky_fraction=1.5, borrowing_rate=0.02)  # demo rf is 0.031
    r = await world.client.post(f"/v1/plans/{new_plan_id}/mixes", json=DEMO_MIX | {"cross_check": False}, headers=keys["committee"])
    assert_problem(r, 422, "risk_free_rate")


async def test_leverage_gives_negative_safe_amount(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id, max_risky_fraction=2.0, borrowing_rate=0.035)
    await world.publish(new_plan_id, keys)
    r = await world.client.post(
        f"/v1/plans/{new_plan_id}/allocations",
        json={"member_id": "lev", "mix_version": DEMO_MIX["version"], "amount": "1000.00", "preference": {"risk_aversion": 0.5}},
        headers=keys["portal"],
    )
    a = r.json()
    assert r.status_code == 201 and a["risky_fraction"] > 1.0
    assert Decimal(a["amounts"]["safe"]) < 0
    assert Decimal(a["amounts"]["risky"]) + Decimal(a["amounts"]["safe"]) == Decimal("1000.00")
    assert any("borrow" in d for d in a["disclosures"])


async def test_contribution_routing(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    await world.publish(new_plan_id, keys)
    r = await world.client.post(
        f"/v1/plans/{new_plan_id}/allocations",
        json={"member_id": "r", "mix_version": DEMO_MIX["version"], "preference": {"target_volatility": 0.05},
              "holdings": {"risky": "9000.00", "safe": "1000.00"}, "contribution": "500.00"},
        headers=keys["portal"],
    )
    assert r.status_code == 201, r.text
    a = r.json()
    assert a["amount"] == "10500.00"
    split = a["contribution_split"]
    assert Decimal(split["risky"]) + Decimal(split["safe"]) == Decimal("500.00")
    # Over-weight in risky and a gap larger than the contribution: all of it goes to safe.
    assert split == {"risky": "0.00", "safe": "500.00"}
    mismatch = await world.client.post(
        f"/v1/plans/{new_plan_id}/allocations",
        json={"member_id": "r", "mix_version": DEMO_MIX["version"], "amount": "1.00", "preference": {"risk_aversion": 2},
              "holdings": {"risky": "9000.00", "safe": "1000.00"}},
        headers=keys["portal"],
    )
    assert_problem(mismatch, 422, "amount")


async def test_every_preference_kind(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id, risk_score_table={"1": 10.0, "2": 4.0})
    await world.publish(new_plan_id, keys)
    base = {"member_id": "p", "mix_version": DEMO_MIX["version"], "amount": "5000"}
    for pref in ({"risk_aversion": 2.5}, {"target_volatility": 0.08}, {"max_loss": 0.1, "confidence": 0.95},
                 {"max_loss": 0.2, "confidence": 0.9, "horizon_years": 5}, {"risk_score": 2}):
        r = await world.client.post(f"/v1/plans/{new_plan_id}/allocations", json=base | {"preference": pref}, headers=keys["portal"])
        assert r.status_code == 201, (pref, r.text)
    for pref, field in (({"risk_score": 9}, "preference.risk_score"), ({}, "preference"),
                        ({"risk_aversion": 1, "target_volatility": 0.1}, "preference"),
                        ({"max_loss": 0.1}, "preference.confidence"), ({"max_loss": 0.1, "confidence": 0.4}, "preference.confidence"),
                        ({"risk_aversion": -1}, "preference.risk_aversion")):
        r = await world.client.post(f"/v1/plans/{new_plan_id}/allocations", json=base | {"preference": pref}, headers=keys["portal"])
        assert_problem(r, 422, field)
    # An unknown mix version is not the one in force.
    r = await world.client.post(f"/v1/plans/{new_plan_id}/allocations", json=base | {"mix_version": "nope", "preference": {"risk_aversion": 1}}, headers=keys["portal"])
    assert assert_problem(r, 409, "mix_version")["active_version"] == DEMO_MIX["version"]
    v = await world.client.get(f"/v1/plans/{new_plan_id}/audit/verify", headers=keys["committee"])
    assert (v.json()["ok"], v.json()["checked"]) == (True, 5)


async def test_operations(world: World) -> None:
    assert (await world.client.get("/livez")).json()["status"] == "live"
    ready = await world.client.get("/readyz")
    assert ready.status_code == 200 and ready.json()["checks"]["migrations"] == "current"
    m = await world.client.get("/metrics")
    assert m.status_code == 200 and b"mixline_http_requests_total" in m.content
    assert_problem(await world.client.get("/v1/nowhere"), 404)
    assert_problem(await world.client.delete("/livez"), 405)


async def test_openapi_declares_problem_json(world: World) -> None:
    doc = (await world.client.get("/openapi.json")).json()
    seen = 0
    for item in doc["paths"].values():
        for op in item.values():
            for status, resp in op.get("responses", {}).items():
                if status.isdigit() and int(status) >= 400:
                    assert list(resp["content"]) == [PROBLEM], (op["operationId"], status)
                    seen += 1
    assert seen > 20



async def test_readyz_fails_while_migrations_are_behind(empty_db_url: str) -> None:
    import httpx

    from service.api import create_app
    from service.settings import Settings
    from service.store import Database
    from service.store.revisions import downgrade

    db = Database(empty_db_url)
    try:
        db.upgrade()
        downgrade(db.engine, "0002")
        app = create_app(Settings(database_url=db.url), db, migrate=False)
        async with app.router.lifespan_context(app):
            async with httpx.AsyncClient(transport=httpx.ASGITransport(app=app), base_url="http://t") as c:
                r = await c.get("/readyz")
                assert_problem(r, 503)
                assert "migrations" in r.json()["detail"]
                assert (await c.get("/livez")).status_code == 200
    finally:
        db.close()


async def test_frontier_is_solved_once_after_publish_and_stored(world: World, new_plan_id: str, monkeypatch: pytest.MonkeyPatch) -> None:
    from service.api import state as state_module
    from service.api.metrics import Metrics
    from service.api.state import AppState
    from service.store import get_frontier

    keys = await world.plan(new_plan_id)
    mix = await world.publish(new_plan_id, keys)
    first = await world.client.get(f"/v1/plans/{new_plan_id}/mixes/{DEMO_MIX['version']}/frontier", params={"points": 7}, headers=keys["portal"])
    assert first.status_code == 200
    # Stored beside the mix just after it is answered from memory (the solver thread stores it
    # next): wait for that write, a few seconds at most.
    for _ in range(100):
        with world.database.reading() as s:
            if get_frontier(s, mix["content_hash"]) is not None:
                break
        await asyncio.sleep(0.05)
    with world.database.reading() as s:
        assert get_frontier(s, mix["content_hash"]) is not None
    # Another replica (a fresh catalog) reads the stored frontier and never solves one.
    def no_solving(*_: object) -> None:
        raise AssertionError("the frontier was solved again")

    monkeypatch.setattr(state_module, "efficient_frontier", no_solving)
    replica = AppState(world.settings, world.database, Metrics())
    try:
        view, frontier = replica.mixes.frontier(new_plan_id, DEMO_MIX["version"])
        assert frontier.corner_weights.shape[1] == len(view.codes)
    finally:
        replica.mixes.close()
    again = await world.client.get(f"/v1/plans/{new_plan_id}/mixes/{DEMO_MIX['version']}/frontier", params={"points": 7}, headers=keys["portal"])
    assert again.json() == first.json()
