"""A large publish body is read and solved in the frontier process: same answers as in a thread.

Differential tests of the two real entry points of ``prepare_publication`` (a worker thread, the
forked frontier process), chosen by ``PUBLICATION_PROCESS_MIN_BYTES``: every answer, refusal
and repeat must be the same byte for byte, whichever process did the work. References: the
thread path itself (the answers the rest of the suite checks against numpy and cvxpy) and the
contract's rules for a repeated version (API.md, "Mixes": same content 200, other content 409).
"""

from __future__ import annotations

import copy
import os
from collections.abc import Iterator
from typing import Any

import pytest

from service.api import state as state_module
from service.api.publishing import NotReadHere, PublishLimits, Reading
from service.api.state import MixCatalog

from .conftest import World
from .test_factor_model import factor_body
from .test_flow import assert_problem

pytestmark = pytest.mark.anyio


@pytest.fixture
def in_child(monkeypatch: pytest.MonkeyPatch) -> Iterator[list[int]]:
    """Every body goes to the frontier process; yields how many times it was used."""
    used: list[int] = []
    child = MixCatalog._child

    def counting(self: MixCatalog) -> Any:
        found = child(self)
        if found is not None:
            used.append(1)
        return found

    monkeypatch.setattr(MixCatalog, "_child", counting)
    monkeypatch.setattr(state_module, "PUBLICATION_PROCESS_MIN_BYTES", 0)
    yield used


async def post(world: World, plan_id: str, keys: dict[str, Any], body: dict[str, Any]) -> tuple[int, Any]:
    r = await world.client.post(f"/v1/plans/{plan_id}/mixes", json=body, headers=keys["committee"])
    return r.status_code, r.json()


async def read(world: World, plan_id: str, keys: dict[str, Any], version: str) -> Any:
    r = await world.client.get(f"/v1/plans/{plan_id}/mixes/{version}", headers=keys["committee"])
    assert r.status_code == 200, r.text
    return r.json()


def outcomes_of(body: dict[str, Any]) -> list[dict[str, Any]]:
    """The body, then variants the service must refuse or answer as a repeat."""
    bad_volatility = copy.deepcopy(body)
    bad_volatility["factor_model"]["specific_volatility"][3] = -0.1
    no_premium = copy.deepcopy(body)  # every expected return below the risk-free rate
    for a in no_premium["assets"]:
        a["expected_return"] = 0.01
    no_premium["version"] = "fm-low"
    other_content = copy.deepcopy(body)
    other_content["assets"][0]["expected_return"] += 0.001
    # A known version with content that would be refused: still 409, never the refusal.
    refused_repeat = copy.deepcopy(no_premium) | {"version": body["version"]}
    return [body, bad_volatility, no_premium, body, other_content, refused_repeat]


async def test_the_frontier_process_answers_as_the_thread_does(world: World, new_plan_id: str, in_child: list[int],
                                                                monkeypatch: pytest.MonkeyPatch) -> None:
    body = factor_body("fm-1")
    by_child = []
    child_keys = await world.plan(new_plan_id)
    for variant in outcomes_of(body):
        by_child.append(await post(world, new_plan_id, child_keys, variant))
    assert len(in_child) == len(by_child), "every body went to the frontier process"
    child_read = await read(world, new_plan_id, child_keys, "fm-1")

    # The same requests in a thread (the threshold as shipped: these bodies are small).
    monkeypatch.setattr(state_module, "PUBLICATION_PROCESS_MIN_BYTES", 1 << 40)
    thread_plan = new_plan_id + "-t"
    thread_keys = await world.plan(thread_plan)
    by_thread = [await post(world, thread_plan, thread_keys, variant) for variant in outcomes_of(body)]
    assert len(in_child) == len(by_child)

    assert [status for status, _ in by_child] == [201, 422, 422, 200, 409, 409]
    for (child_status, child_answer), (thread_status, thread_answer) in zip(by_child, by_thread, strict=True):
        assert child_status == thread_status
        if "instance" in child_answer:  # a problem names its path and request
            child_answer = child_answer | {"instance": None, "request_id": None}
            thread_answer = thread_answer | {"instance": None, "request_id": None}
        assert child_answer == thread_answer
    assert [e["field"] for e in by_child[1][1]["errors"]] == ["factor_model.specific_volatility[3]"]
    assert by_child[2][1]["errors"][0]["field"] == "risk_free_rate"  # no asset earns a premium over it

    # Read back (the inputs kept as text until first read): the same mix, the same inputs.
    thread_read = await read(world, thread_plan, thread_keys, "fm-1")
    assert child_read["inputs"] == thread_read["inputs"]
    assert child_read["inputs"]["factor_model"]["loadings"] == body["factor_model"]["loadings"]
    assert {k: v for k, v in child_read.items() if k != "lifecycle"} == \
        {k: v for k, v in thread_read.items() if k != "lifecycle"}


async def test_too_many_assets_in_the_frontier_process_is_413(world: World, new_plan_id: str,
                                                               in_child: list[int]) -> None:
    keys = await world.plan(new_plan_id)
    world.settings.max_assets = 10  # the catalog reads its settings on every publication
    try:
        status, answer = await post(world, new_plan_id, keys, factor_body("fm-big"))
    finally:
        world.settings.max_assets = 2000
    assert status == 413, answer
    assert "at most 10" in answer["detail"]
    assert in_child


async def test_a_bad_body_from_the_frontier_process_names_its_field(world: World, new_plan_id: str,
                                                                     in_child: list[int]) -> None:
    keys = await world.plan(new_plan_id)
    r = await world.client.post(f"/v1/plans/{new_plan_id}/mixes", content=b'{"version": "x", "assets": [',
                                headers={**keys["committee"], "content-type": "application/json"})
    problem = assert_problem(r, 422, "body")
    assert "invalid JSON" in problem["errors"][0]["reason"]
    assert in_child


def forgetful_solve(reading: Reading, policy: object, limits: PublishLimits) -> None:
    """What the frontier process answers when it no longer holds a reading (restarted meanwhile)."""
    raise NotReadHere(reading.digest)


async def test_a_reading_the_frontier_process_lost_is_solved_in_this_process(
    world: World, new_plan_id: str, in_child: list[int], monkeypatch: pytest.MonkeyPatch
) -> None:
    keys = await world.plan(new_plan_id)
    monkeypatch.setattr(state_module, "solve_here", forgetful_solve)
    status, answer = await post(world, new_plan_id, keys, factor_body("fm-lost"))
    assert status == 201, answer
    assert in_child
    monkeypatch.setattr(state_module, "PUBLICATION_PROCESS_MIN_BYTES", 1 << 40)
    thread_plan = new_plan_id + "-t"
    thread_keys = await world.plan(thread_plan)
    assert await post(world, thread_plan, thread_keys, factor_body("fm-lost")) == (201, answer)


async def test_a_repeat_in_the_frontier_process_is_not_solved_again(
    world: World, new_plan_id: str, in_child: list[int], monkeypatch: pytest.MonkeyPatch
) -> None:
    # The version is looked up between reading and solving: a repeat never asks for the solve.
    keys = await world.plan(new_plan_id)
    first = await post(world, new_plan_id, keys, factor_body("fm-again"))
    assert first[0] == 201
    monkeypatch.setattr(state_module, "solve_here", forgetful_solve)
    monkeypatch.setattr(state_module, "solve_publication", None)  # no solve in this process either
    assert await post(world, new_plan_id, keys, factor_body("fm-again")) == (200, first[1])


def dying_solve(reading: Reading, policy: object, limits: PublishLimits) -> None:
    """The frontier process dies in the middle of a solve (killed, out of memory)."""
    os._exit(1)


async def test_a_frontier_process_that_dies_mid_solve_is_replaced(
    world: World, new_plan_id: str, in_child: list[int], monkeypatch: pytest.MonkeyPatch,
    caplog: pytest.LogCaptureFixture,
) -> None:
    keys = await world.plan(new_plan_id)
    with monkeypatch.context() as dying:
        dying.setattr(state_module, "solve_here", dying_solve)
        status, answer = await post(world, new_plan_id, keys, factor_body("fm-died"))
    assert status == 201, answer  # solved in this process instead
    caplog.clear()
    status, again = await post(world, new_plan_id, keys, factor_body("fm-after"))
    assert status == 201, again
    assert again["tangency"] == answer["tangency"]
    # Through a new frontier process: nothing fell back to this one.
    assert not [r for r in caplog.records if "frontier process" in r.getMessage()], caplog.records
