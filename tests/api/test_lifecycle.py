"""The risky-mix lifecycle over HTTP: published -> active -> retired, allocations only against the
active version, the list of versions, inputs read back, version names and decimal rates."""

from __future__ import annotations

import copy
from typing import Any

import pytest

from service.demo import DEMO_MIX

from .conftest import World
from .test_flow import assert_problem

pytestmark = pytest.mark.anyio


def mix(version: str, **changes: Any) -> dict[str, Any]:
    return copy.deepcopy(DEMO_MIX) | {"version": version, "cross_check": False} | changes


def member(version: str, member_id: str = "m-1") -> dict[str, Any]:
    return {"member_id": member_id, "mix_version": version, "amount": "1000.00", "preference": {"risk_aversion": 4}}


async def versions(world: World, plan_id: str, keys: dict[str, Any]) -> dict[str, dict[str, Any]]:
    r = await world.client.get(f"/v1/plans/{plan_id}/mixes", headers=keys["portal"])
    assert r.status_code == 200, r.text
    return {v["version"]: v for v in r.json()["versions"]}


def key_id(keys: dict[str, Any], role: str) -> str:
    # A secret reads mxl_<key_id>_<random> (service/api/auth.py).
    return str(keys[role]["Authorization"].split("_")[1])


async def test_published_active_retired(world: World, new_plan_id: str) -> None:
    c, plan = world.client, new_plan_id
    keys = await world.plan(plan)
    url = f"/v1/plans/{plan}/allocations"
    committee = keys["committee"]
    await world.publish(plan, keys, mix("2026-q4"), activate=False)

    # Published is not in force: nothing may be allocated against it yet, and nothing is logged.
    r = await c.post(url, json=member("2026-q4"), headers=keys["portal"])
    assert assert_problem(r, 409, "mix_version")["active_version"] is None
    listed = await versions(world, plan, keys)
    q4 = listed["2026-q4"]
    assert q4["state"] == "published" and q4["published_by"] == key_id(keys, "committee")
    assert q4["activated_at"] is None and q4["retired_at"] is None

    a = await c.post(f"/v1/plans/{plan}/mixes/2026-q4/activate", headers=committee)
    assert a.status_code == 200 and a.json()["retired_version"] is None
    first = await c.post(url, json=member("2026-q4"), headers=keys["portal"])
    assert first.status_code == 201

    await world.publish(plan, keys, mix("2027-q1", risk_free_rate=0.029), activate=False)
    r = await c.post(url, json=member("2027-q1"), headers=keys["portal"])
    assert assert_problem(r, 409, "mix_version")["active_version"] == "2026-q4"

    a = await c.post(f"/v1/plans/{plan}/mixes/2027-q1/activate", headers=committee)
    assert a.status_code == 200, a.text
    assert a.json()["retired_version"] == "2026-q4" and a.json()["mix"]["activated_by"] == key_id(keys, "committee")
    listed = await versions(world, plan, keys)
    assert (listed["2026-q4"]["state"], listed["2027-q1"]["state"]) == ("retired", "active")
    assert listed["2026-q4"]["retired_at"] == listed["2027-q1"]["activated_at"]  # one transaction
    assert listed["2026-q4"]["retired_by"] == key_id(keys, "committee")

    # The old version is refused on this replica at once; the new one is accepted.
    r = await c.post(url, json=member("2026-q4"), headers=keys["portal"])
    assert assert_problem(r, 409, "mix_version")["active_version"] == "2027-q1"
    r = await c.post(f"{url}/batch", json={"mix_version": "2026-q4", "members": [{k: v for k, v in member("x").items() if k != "mix_version"}]}, headers=keys["portal"])
    assert assert_problem(r, 409, "mix_version")["active_version"] == "2027-q1"
    assert (await c.post(url, json=member("2027-q1"), headers=keys["portal"])).status_code == 201
    # What was logged under the retired version reads back unchanged.
    again = await c.get(f"{url}/{first.json()['allocation_id']}", headers=keys["portal"])
    assert again.status_code == 200 and again.json() == first.json()
    current = (await c.get(f"/v1/plans/{plan}/mixes/current", headers=keys["portal"])).json()
    assert (current["version"], current["state"], current["inputs"]["risk_free_rate"]) == ("2027-q1", "active", 0.029)

    # Retired is never active again; the only version in force cannot be retired.
    assert_problem(await c.post(f"/v1/plans/{plan}/mixes/2026-q4/activate", headers=committee), 409, "version")
    body = assert_problem(await c.post(f"/v1/plans/{plan}/mixes/2027-q1/retire", headers=committee), 409, "version")
    assert body["active_version"] == "2027-q1"
    # Activating the active version again changes nothing (same activation time).
    again = await c.post(f"/v1/plans/{plan}/mixes/2027-q1/activate", headers=committee)
    assert again.status_code == 200 and again.json()["mix"]["activated_at"] == listed["2027-q1"]["activated_at"]

    # A draft withdrawn unused: retired, and then never activated.
    await world.publish(plan, keys, mix("2027-q2-draft", risk_free_rate=0.028), activate=False)
    gone = await c.post(f"/v1/plans/{plan}/mixes/2027-q2-draft/retire", headers=committee)
    assert gone.status_code == 200 and gone.json()["state"] == "retired" and gone.json()["activated_at"] is None
    assert (await c.post(f"/v1/plans/{plan}/mixes/2027-q2-draft/retire", headers=committee)).status_code == 200
    assert_problem(await c.post(f"/v1/plans/{plan}/mixes/2027-q2-draft/activate", headers=committee), 409)
    assert_problem(await c.post(f"/v1/plans/{plan}/mixes/never/retire", headers=committee), 404)
    assert_problem(await c.post(f"/v1/plans/{plan}/mixes/2027-q1/retire", headers=keys["portal"]), 403)
    assert list(await versions(world, plan, keys)) == ["2026-q4", "2027-q1", "2027-q2-draft"]  # published order

    # The log holds exactly the two allocations that were answered, and still verifies.
    v = await c.get(f"/v1/plans/{plan}/audit/verify", headers=committee)
    assert (v.json()["ok"], v.json()["checked"]) == (True, 2)


async def test_a_version_reads_back_its_inputs_and_state(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    published = await world.publish(new_plan_id, keys, mix("2026-q4"))
    r = await world.client.get(f"/v1/plans/{new_plan_id}/mixes/2026-q4", headers=keys["portal"])
    doc = r.json()
    assert doc["state"] == "active" and doc["active"] is True and doc["lifecycle"]["state"] == "active"
    assert doc["content_hash"] == published["content_hash"]
    inputs = doc["inputs"]
    # What was published, as stored: enough to redo the split.
    assert [(a["code"], a["expected_return"], a["volatility"]) for a in inputs["assets"]] == [
        (a["code"], a["expected_return"], a["volatility"]) for a in DEMO_MIX["assets"]
    ]
    assert inputs["correlation"] == DEMO_MIX["correlation"] and inputs["covariance"] is None
    assert inputs["risk_free_rate"] == DEMO_MIX["risk_free_rate"] and inputs["long_only"] is True
    assert inputs["bounds"] == {k: list(v) for k, v in DEMO_MIX["bounds"].items()}
    # Republishing the stored inputs (plus the version) hashes to the same content.
    again = {k: v for k, v in inputs.items() if k != "form" and v is not None} | {"version": "2026-q4", "cross_check": False}
    same = await world.client.post(f"/v1/plans/{new_plan_id}/mixes", json=again, headers=keys["committee"])
    assert same.status_code == 200 and same.json()["content_hash"] == published["content_hash"]


@pytest.mark.parametrize("version", ["current", "Current", "estimate", "-leading-dash", "a" * 65, "has space", "x/y", ""])
async def test_version_names_are_checked(world: World, new_plan_id: str, version: str) -> None:
    keys = await world.plan(new_plan_id)
    r = await world.client.post(f"/v1/plans/{new_plan_id}/mixes", json=mix(version), headers=keys["committee"])
    assert_problem(r, 422, "version")


async def test_longest_version_name_is_accepted(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    await world.publish(new_plan_id, keys, mix("A1._-" + "z" * 59))  # 64 characters, the pattern's limit


@pytest.mark.parametrize(
    ("change", "field"),
    [
        (lambda m: m["assets"][0].update(expected_return=7.4), "assets[0].expected_return"),
        (lambda m: m["assets"][2].update(volatility=24.5), "assets[2].volatility"),
        (lambda m: m.update(risk_free_rate=3.1), "risk_free_rate"),
        (lambda m: m.update(risk_free_rate=0.51), "risk_free_rate"),
        (lambda m: m.update(correlation=None, covariance=[[4.0 if i == j else 0.0 for j in range(6)] for i in range(6)])
         or [a.pop("volatility") for a in m["assets"]], "covariance[0][0]"),
    ],
)
async def test_percent_looking_values_are_refused(world: World, new_plan_id: str, change: Any, field: str) -> None:
    keys = await world.plan(new_plan_id)
    body = mix("2026-q4")
    change(body)
    r = await world.client.post(f"/v1/plans/{new_plan_id}/mixes", json=body, headers=keys["committee"])
    problem = assert_problem(r, 422, field)
    assert "decimals" in next(e["reason"] for e in problem["errors"] if e["field"] == field)
