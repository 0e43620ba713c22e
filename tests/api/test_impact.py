"""POST .../mixes/{version}/impact: each member's latest request recomputed under a candidate.

Reference: the same requests posted for real once the candidate is active (the allocation
routes, through HTTP); the summary figures are numpy's, computed here from those answers.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.demo import DEMO_MIX

from .conftest import World

pytestmark = pytest.mark.anyio


def member(i: int) -> dict[str, Any]:
    prefs = [{"risk_aversion": 2 + i % 5}, {"target_volatility": 0.04 + 0.01 * (i % 6)},
             {"max_loss": 0.08, "confidence": 0.95, "horizon_years": 2.0}, {"risk_score": 1 + i % 2}]
    m: dict[str, Any] = {"member_id": f"m-{i:04d}", "preference": prefs[i % 4]}
    if i % 3 == 0:
        m["holdings"] = {"risky": f"{1000 + i}.00", "safe": "2500.00"}
        m["contribution"] = "150.00"
    else:
        m["amount"] = f"{5000 + 17 * i}.25"
    return m


def candidate_mix() -> dict[str, Any]:
    mix = copy.deepcopy(DEMO_MIX)
    mix["version"] = "2027-q1"
    for a in mix["assets"]:
        a["expected_return"] = round(a["expected_return"] - 0.006, 4)  # a more cautious outlook
    return mix


async def test_impact_is_the_requests_recomputed_and_logs_nothing(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id, risk_score_table={"1": 8.0, "2": 3.0}, min_risky_fraction=0.1, max_risky_fraction=0.9)
    await world.publish(new_plan_id, keys)
    members = [member(i) for i in range(40)]
    url = f"/v1/plans/{new_plan_id}/allocations"
    r = await world.client.post(f"{url}/batch", json={"mix_version": DEMO_MIX["version"], "members": members[:30]}, headers=keys["portal"])
    assert r.status_code == 201, r.text
    for m in members[30:]:
        assert (await world.client.post(url, json=m | {"mix_version": DEMO_MIX["version"]}, headers=keys["portal"])).status_code == 201
    # A member's later request replaces the earlier one as their latest.
    members[5] = members[5] | {"preference": {"risk_aversion": 1.5}}
    assert (await world.client.post(url, json=members[5] | {"mix_version": DEMO_MIX["version"]}, headers=keys["portal"])).status_code == 201
    before = {m["member_id"]: None for m in members}
    for m in members:
        got = (await world.client.get(url, params={"member_id": m["member_id"], "limit": 1}, headers=keys["portal"])).json()
        before[m["member_id"]] = got["allocations"][0]["risky_fraction"]
    logged = (await world.client.get(f"/v1/plans/{new_plan_id}/audit/verify", headers=keys["committee"])).json()["checked"]

    mix = candidate_mix()
    await world.publish(new_plan_id, keys, mix, activate=False)
    r = await world.client.post(f"/v1/plans/{new_plan_id}/mixes/{mix['version']}/impact", headers=keys["committee"])
    assert r.status_code == 200, r.text
    out = r.json()
    assert (out["from_version"], out["to_version"], out["members"]) == (DEMO_MIX["version"], mix["version"], 40)
    assert (await world.client.get(f"/v1/plans/{new_plan_id}/audit/verify", headers=keys["committee"])).json()["checked"] == logged

    # Reference: activate the candidate and post the very same requests for real.
    a = await world.client.post(f"/v1/plans/{new_plan_id}/mixes/{mix['version']}/activate", headers=keys["committee"])
    assert a.status_code == 200, a.text
    after, bounds_after = {}, []
    for m in members:
        res = (await world.client.post(url, json=m | {"mix_version": mix["version"]}, headers=keys["portal"])).json()
        after[m["member_id"]] = res["risky_fraction"]
        bounds_after.append(res["limited_by"] or "none")
    change = np.array([after[k] - before[k] for k in before])
    s = out["risky_fraction_change"]
    assert_allclose([s["mean"], s["max_abs"]], [change.mean(), np.abs(change).max()], rtol=1e-12, atol=1e-15)
    assert_allclose([s["p05"], s["p50"], s["p95"]], np.percentile(change, [5, 50, 95]), rtol=1e-12, atol=1e-15)
    assert out["limited_by"]["after"] == {b: bounds_after.count(b) for b in ("none", "min_risky_fraction", "max_risky_fraction")}
    top = out["largest_moves"][0]
    assert abs(top["after"] - top["before"]) == pytest.approx(np.abs(change).max(), rel=1e-12)
    assert top["after"] == after[top["member_id"]] and top["before"] == before[top["member_id"]]


async def test_impact_refusals(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    await world.publish(new_plan_id, keys, activate=False)
    base = f"/v1/plans/{new_plan_id}/mixes"
    r = await world.client.post(f"{base}/{DEMO_MIX['version']}/impact", headers=keys["committee"])
    assert r.status_code == 409 and r.headers["content-type"].startswith("application/problem+json")  # nothing active
    r = await world.client.post(f"{base}/no-such-version/impact", headers=keys["committee"])
    assert r.status_code == 404
    r = await world.client.post(f"{base}/{DEMO_MIX['version']}/impact", headers=keys["portal"])
    assert r.status_code == 403


async def test_a_retired_candidate_is_refused(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    await world.publish(new_plan_id, keys)
    await world.publish(new_plan_id, keys, candidate_mix(), activate=False)
    base = f"/v1/plans/{new_plan_id}/mixes"
    assert (await world.client.post(f"{base}/2027-q1/retire", headers=keys["committee"])).status_code == 200
    r = await world.client.post(f"{base}/2027-q1/impact", headers=keys["committee"])
    assert r.status_code == 409 and r.json()["errors"][0]["field"] == "version"
    assert r.json()["active_version"] == DEMO_MIX["version"]
