"""One problem type per kind of error, messages without regexes, one timestamp format."""

from __future__ import annotations

import re
from typing import Any

import pytest

from service.api import create_app
from service.api.errors import PATTERN_WORDS
from service.demo import DEMO_ALLOCATION

from .conftest import World

pytestmark = pytest.mark.anyio

RFC3339_Z = re.compile(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{6}Z$")


def patterns(node: Any) -> set[str]:
    found: set[str] = set()
    if isinstance(node, dict):
        for key, value in node.items():
            if key == "pattern" and isinstance(value, str):
                found.add(value)
            else:
                found |= patterns(value)
    elif isinstance(node, list):
        for value in node:
            found |= patterns(value)
    return found


def test_every_pattern_in_the_api_document_has_words() -> None:
    declared = patterns(create_app().openapi())
    assert declared and declared <= set(PATTERN_WORDS), sorted(declared - set(PATTERN_WORDS))


async def test_a_pattern_mismatch_says_what_is_allowed_without_the_regex(world: World) -> None:
    r = await world.client.post("/v1/plans", json={"plan_id": "bad id!", "name": "X", "currency": "usd"}, headers=world.operator)
    assert r.status_code == 422
    reasons = {e["field"]: e["reason"] for e in r.json()["errors"]}
    assert reasons["plan_id"].startswith("must be 1 to 64 letters, digits")
    assert "three capital letters" in reasons["currency"]
    assert "^" not in r.text and "{0," not in r.text and "[A-Z" not in r.text


async def test_one_type_for_every_422_and_every_404(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    await world.publish(new_plan_id, keys)
    url = f"/v1/plans/{new_plan_id}/allocations"
    schema = await world.client.post(url, json=DEMO_ALLOCATION | {"amount": "12.345"}, headers=keys["portal"])
    rule = await world.client.post(url, json=DEMO_ALLOCATION | {"preference": {"risk_score": 9}}, headers=keys["portal"])
    wrong_type = await world.client.post(url, json=DEMO_ALLOCATION | {"amount": True}, headers=keys["portal"])
    answers = [schema, rule, wrong_type]
    assert [r.status_code for r in answers] == [422, 422, 422], [r.text for r in answers]
    assert {r.json()["type"] for r in answers} == {"urn:mixline:problem:validation"}
    assert {r.json()["title"] for r in answers} == {"Invalid request"}
    missing_record = await world.client.get(f"{url}/al_nope", headers=keys["portal"])
    missing_route = await world.client.get("/v1/nothing/here", headers=keys["portal"])
    missing_mix = await world.client.get(f"/v1/plans/{new_plan_id}/mixes/none", headers=keys["portal"])
    assert {r.status_code for r in (missing_record, missing_route, missing_mix)} == {404}
    assert {r.json()["type"] for r in (missing_record, missing_route, missing_mix)} == {"urn:mixline:problem:not-found"}


async def test_times_are_rfc3339_utc_with_z(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    await world.publish(new_plan_id, keys)
    plan = (await world.client.get(f"/v1/plans/{new_plan_id}", headers=world.operator)).json()
    allocation = (await world.client.post(f"/v1/plans/{new_plan_id}/allocations", json=DEMO_ALLOCATION, headers=keys["portal"])).json()
    listed = (await world.client.get(f"/v1/plans/{new_plan_id}/keys", headers=world.operator)).json()["keys"]
    head = (await world.client.get(f"/v1/plans/{new_plan_id}/audit/head", headers=keys["committee"])).json()
    for value in (plan["created_at"], allocation["created_at"], listed[0]["created_at"], head["signed_at"]):
        assert RFC3339_Z.match(value), value
