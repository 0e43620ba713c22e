"""What an allocation reads from the database is read in a worker thread, never on the event loop.

The active version is re-read once its time to live is over (API.md: an activation reaches every
replica within that time); if that read hangs (a database that stopped answering), the event
loop must go on serving others, /livez first. Checked by order of events, not by timing: the
read is held until /livez has been answered, which can only happen if the loop is free.
"""

from __future__ import annotations

import threading
from collections.abc import AsyncIterator
from typing import Any

import anyio
import httpx
import pytest

from service.api import create_app
from service.api import state as state_module
from service.settings import Settings
from service.store import Database

from .conftest import OPERATOR_KEY, World

pytestmark = pytest.mark.anyio


@pytest.fixture
async def rereading_world(database: Database) -> AsyncIterator[World]:
    """The app with an active-version time to live of 0: every allocation re-reads it."""
    settings = Settings(database_url=database.url, bootstrap_operator_key=OPERATOR_KEY, access_log="off",
                        active_version_ttl_seconds=0.0)
    app = create_app(settings, database, migrate=False)
    async with app.router.lifespan_context(app):
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://mixline.test") as client:
            yield World(client, database, settings)


async def test_a_hanging_active_version_read_does_not_stall_the_event_loop(
    rereading_world: World, new_plan_id: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    world = rereading_world
    keys = await world.plan(new_plan_id)
    mix = await world.publish(new_plan_id, keys)
    body = {"member_id": "m-held", "mix_version": mix["version"], "amount": "1000.00", "preference": {"risk_aversion": 4}}
    assert (await world.client.post(f"/v1/plans/{new_plan_id}/allocations", json=body, headers=keys["portal"])).status_code == 201

    events: list[str] = []
    entered, release = threading.Event(), threading.Event()
    read = state_module.get_plan

    def held(s: Any, plan_id: str) -> Any:
        if plan_id == new_plan_id and not release.is_set():
            events.append("read entered")
            entered.set()
            # Held until /livez was answered: on the event loop, /livez could not be answered
            # meanwhile, and the hold would end by its time-out instead.
            if not release.wait(5):
                events.append("read timed out")
        return read(s, plan_id)

    monkeypatch.setattr(state_module, "get_plan", held)

    async def allocate(member_id: str = "m-held", last: bool = True) -> None:
        r = await world.client.post(f"/v1/plans/{new_plan_id}/allocations", json=body | {"member_id": member_id},
                                    headers=keys["portal"])
        assert r.status_code == 201, r.text
        if last:
            events.append("allocated")

    async with anyio.create_task_group() as tasks:
        tasks.start_soon(allocate)
        with anyio.fail_after(10):
            while not entered.is_set():
                await anyio.sleep(0.01)
        live = await world.client.get("/livez")
        assert live.status_code == 200
        events.append("livez answered")
        # Requests that come while the read is under way wait for that one read.
        for i in range(5):
            tasks.start_soon(allocate, f"m-also-{i}", False)
        await anyio.sleep(0.2)
        release.set()
        events.append("read released")
    assert events == ["read entered", "livez answered", "read released", "allocated"]  # one read for six
