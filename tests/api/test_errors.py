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
    mixes = (await world.client.get(f"/v1/plans/{new_plan_id}/mixes", headers=keys["committee"])).json()["versions"]
    lifecycle = [mixes[0]["published_at"], mixes[0]["activated_at"]]
    for value in (plan["created_at"], allocation["created_at"], listed[0]["created_at"], head["signed_at"], *lifecycle):
        assert RFC3339_Z.match(value), value


async def test_a_405_names_every_method_of_the_path(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    url = f"/v1/plans/{new_plan_id}/allocations"
    # GET and POST of this path are routes of two routers (the posting one reads its own body)
    r = await world.client.request("OPTIONS", url, headers=keys["portal"])
    assert r.status_code == 405 and r.headers["allow"] == "GET, POST", (r.status_code, r.headers.get("allow"))
    assert r.json()["type"] == "urn:mixline:problem:method-not-allowed"
    # "batch" is a path word, not an allocation id: its own path allows POST only
    r = await world.client.request("PUT", f"{url}/batch", headers=keys["portal"])
    assert r.status_code == 405 and r.headers["allow"] == "POST"


@pytest.mark.parametrize("route", ["/v1/plans", "keys", "allocations"])
async def test_a_body_that_is_not_utf8_is_a_422(world: World, new_plan_id: str, route: str) -> None:
    keys = await world.plan(new_plan_id)
    url = route if route.startswith("/") else f"/v1/plans/{new_plan_id}/{route}"
    r = await world.client.post(url, content=b"\xff\xfe{", headers={**world.operator, "Content-Type": "application/json"})
    assert r.status_code == 422, r.text
    assert r.json()["type"] == "urn:mixline:problem:validation" and r.json()["errors"][0]["field"] == "body"
    del keys


async def test_whole_numbers_are_integers_where_the_schema_says_integer(world: World, new_plan_id: str) -> None:
    # JSON Schema's integer is a number without a fraction: 30.0 is 30
    keys = await world.plan(new_plan_id, risk_score_table={"4": 3.5})
    await world.publish(new_plan_id, keys)
    r = await world.client.post(f"/v1/plans/{new_plan_id}/keys", json={"role": "portal", "expires_in_days": 30.0},
                                headers=world.operator)
    assert r.status_code == 201, r.text
    body = DEMO_ALLOCATION | {"preference": {"risk_score": 4.0}}
    r = await world.client.post(f"/v1/plans/{new_plan_id}/allocations", json=body, headers=keys["portal"])
    assert r.status_code == 201, r.text
    assert r.json()["risk_aversion_used"] == 3.5
    r = await world.client.post(f"/v1/plans/{new_plan_id}/keys", json={"role": "portal", "expires_in_days": 30.5},
                                headers=world.operator)
    assert r.status_code == 422


async def test_money_text_is_digits_and_a_point(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    await world.publish(new_plan_id, keys)
    url = f"/v1/plans/{new_plan_id}/allocations"
    for amount in ("1e3", " 100", "1_000", "+5"):
        r = await world.client.post(url, json=DEMO_ALLOCATION | {"amount": amount}, headers=keys["portal"])
        assert r.status_code == 422 and r.json()["errors"][0]["field"] == "amount", (amount, r.text)
