"""Members as they are, over HTTP on both databases: the plan's policy terms, glide-path and
human-capital members alone and in a batch, trades, what is logged, the impact preview, and the
4xx answers for what cannot be used."""

from __future__ import annotations

from decimal import Decimal
from typing import Any

import orjson
import pytest

from service.demo import DEMO_MIX
from service.store import get_allocation

from .conftest import World

pytestmark = pytest.mark.anyio

GLIDE = [{"years_to_retirement": 35, "risk_aversion": 2.0}, {"years_to_retirement": 0, "risk_aversion": 8.0}]
POLICY = {"glide_path": GLIDE, "human_capital": {"discount_rate": 0.04, "equity_like_share": 0.15}, "rebalance_band": 0.05}
VERSION = DEMO_MIX["version"]


async def setup(world: World, plan_id: str, **policy: Any) -> dict[str, dict[str, str]]:
    keys = await world.plan(plan_id, **(POLICY | policy))
    await world.publish(plan_id, keys)
    return keys


async def test_the_policy_terms_are_stored_and_returned(world: World, new_plan_id: str) -> None:
    keys = await setup(world, new_plan_id)
    plan = (await world.client.get(f"/v1/plans/{new_plan_id}", headers=keys["portal"])).json()
    # Points are kept sorted by years, whatever order they came in.
    assert plan["policy"]["glide_path"] == sorted(GLIDE, key=lambda p: p["years_to_retirement"])
    assert plan["policy"]["human_capital"] == POLICY["human_capital"]
    assert plan["policy"]["rebalance_band"] == 0.05


@pytest.mark.parametrize(
    ("policy", "field"),
    [
        ({"glide_path": [{"years_to_retirement": 5, "risk_aversion": 3}]}, "policy.glide_path"),
        ({"glide_path": [{"years_to_retirement": 5, "risk_aversion": 3}, {"years_to_retirement": 5, "risk_aversion": 4}]},
         "policy.glide_path[1].years_to_retirement"),
        ({"human_capital": {"equity_like_share": 1.5}}, "policy.human_capital.equity_like_share"),
        ({"rebalance_band": -0.01}, "policy.rebalance_band"),
    ],
)
async def test_bad_policy_terms_are_refused_naming_the_field(
    world: World, new_plan_id: str, policy: dict[str, Any], field: str
) -> None:
    r = await world.client.post(
        "/v1/plans", json={"plan_id": new_plan_id, "name": "x", "currency": "USD", "policy": policy}, headers=world.operator
    )
    assert r.status_code == 422 and r.headers["content-type"].startswith("application/problem+json")
    assert field in [e["field"] for e in r.json()["errors"]], r.text


def members() -> list[dict[str, Any]]:
    return [
        {"member_id": "g-1", "amount": "18000.00", "years_to_retirement": 31, "income": {"annual": "48000.00", "growth": 0.01}},
        {"member_id": "g-2", "amount": "260000.00", "years_to_retirement": 2.5},
        {"member_id": "r-1", "preference": {"risk_aversion": 5}, "years_to_retirement": 12,
         "holdings_by_asset": {a["code"]: "1000.00" for a in DEMO_MIX["assets"]} | {"safe": "9000.00"},
         "contribution": "250.00"},
    ]


async def test_single_and_batch_agree_and_the_log_keeps_why(world: World, new_plan_id: str) -> None:
    keys = await setup(world, new_plan_id)
    batch = await world.client.post(f"/v1/plans/{new_plan_id}/allocations/batch",
                                    json={"mix_version": VERSION, "members": members()}, headers=keys["portal"])
    assert batch.status_code == 201, batch.text
    results = batch.json()["results"]
    for m, res in zip(members(), results, strict=True):
        single = await world.client.post(f"/v1/plans/{new_plan_id}/allocations", json=m | {"mix_version": VERSION},
                                         headers=keys["portal"])
        s = single.json()
        for field in ("risky_fraction", "amounts", "preference_source", "risk_aversion_used", "human_capital",
                      "trades", "explanation"):
            assert s.get(field) == res.get(field), field
        got = await world.client.get(f"/v1/plans/{new_plan_id}/allocations/{s['allocation_id']}", headers=keys["portal"])
        assert got.content == single.content
    g1, g2, r1 = results
    assert (g1["preference_source"], g1["preference"]) == ("glide_path", None)
    # 31 years on the path from (35, 2) to (0, 8): 2 + 6 x 4/35 (linear interpolation by hand).
    assert g1["risk_aversion_used"] == pytest.approx(2 + 6 * 4 / 35, rel=1e-14)
    assert Decimal(g1["human_capital"]["value"]) > 0 and "human_capital" not in g2
    trades = r1["trades"]
    assert sum(Decimal(v) for v in trades.values()) == Decimal("250.00")
    with world.database.reading() as s:
        record = orjson.loads(get_allocation(s, new_plan_id, g1["allocation_id"]) or "")
    assert record["preference"] is None and record["preference_source"] == "glide_path"
    assert record["years_to_retirement"] == 31 and record["income"] == {"annual_minor": 4800000, "growth": 0.01}
    assert record["human_capital"]["value_minor"] == round(Decimal(g1["human_capital"]["value"]) * 100)
    assert record["explanation_version"] == g1["explanation"]["version"]
    verify = (await world.client.get(f"/v1/plans/{new_plan_id}/audit/verify", headers=keys["committee"])).json()
    assert verify["ok"] is True


async def test_the_impact_preview_recomputes_glide_path_and_income_members(world: World, new_plan_id: str) -> None:
    keys = await setup(world, new_plan_id)
    r = await world.client.post(f"/v1/plans/{new_plan_id}/allocations/batch",
                                json={"mix_version": VERSION, "members": members()}, headers=keys["portal"])
    assert r.status_code == 201, r.text
    candidate = DEMO_MIX | {"version": "cand-1", "risk_free_rate": DEMO_MIX["risk_free_rate"] + 0.005}
    await world.publish(new_plan_id, keys, candidate, activate=False)
    preview = await world.client.post(f"/v1/plans/{new_plan_id}/mixes/cand-1/impact", headers=keys["committee"])
    assert preview.status_code == 200, preview.text
    assert preview.json()["members"] == 3


@pytest.mark.parametrize(
    ("member", "field"),
    [
        ({"amount": "1.00"}, "years_to_retirement"),
        ({"amount": "1.00", "years_to_retirement": 70}, "years_to_retirement"),
        ({"amount": "1.00", "years_to_retirement": 10, "income": {"annual": "1.00", "growth": 0.3}}, "income.growth"),
        ({"amount": "1.00", "years_to_retirement": True}, "years_to_retirement"),
        ({"preference": {"risk_aversion": 2}, "holdings_by_asset": {"safe": "1.00"}}, "holdings_by_asset"),
    ],
)
async def test_unusable_member_fields_get_a_problem_naming_them(
    world: World, new_plan_id: str, member: dict[str, Any], field: str
) -> None:
    keys = await setup(world, new_plan_id)
    r = await world.client.post(f"/v1/plans/{new_plan_id}/allocations",
                                json={"member_id": "x", "mix_version": VERSION} | member, headers=keys["portal"])
    assert r.status_code == 422 and r.headers["content-type"].startswith("application/problem+json")
    assert [e["field"] for e in r.json()["errors"]] == [field], r.text
    b = await world.client.post(f"/v1/plans/{new_plan_id}/allocations/batch",
                                json={"mix_version": VERSION, "members": [{"member_id": "x"} | member]},
                                headers=keys["portal"])
    assert b.status_code == 422 and [e["field"] for e in b.json()["errors"]] == [f"members[0].{field}"]
    verify = (await world.client.get(f"/v1/plans/{new_plan_id}/audit/verify", headers=keys["committee"])).json()
    assert verify["checked"] == 0  # nothing logged


async def test_no_preference_without_a_glide_path_names_preference(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    await world.publish(new_plan_id, keys)
    r = await world.client.post(f"/v1/plans/{new_plan_id}/allocations",
                                json={"member_id": "x", "mix_version": VERSION, "amount": "5.00", "years_to_retirement": 3},
                                headers=keys["portal"])
    assert r.status_code == 422 and [e["field"] for e in r.json()["errors"]] == ["preference"]


async def test_the_demo_members_are_answered_on_the_demo_plan(world: World, new_plan_id: str) -> None:
    from service.demo import DEMO_MEMBERS, DEMO_PLAN

    keys = await world.plan(new_plan_id, **DEMO_PLAN["policy"])
    await world.publish(new_plan_id, keys)
    sources = []
    for member in DEMO_MEMBERS:
        r = await world.client.post(f"/v1/plans/{new_plan_id}/allocations", json=member, headers=keys["portal"])
        assert r.status_code == 201, r.text
        sources.append((r.json()["preference_source"], "human_capital" in r.json(), r.json().get("trades") is not None))
    assert sources == [("member", False, False), ("glide_path", True, False), ("member", False, True)]
