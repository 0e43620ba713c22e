"""API fixtures: the app on a migrated database (SQLite and PostgreSQL), called through httpx."""

from __future__ import annotations

import copy
from collections.abc import AsyncIterator, Callable
from dataclasses import dataclass
from typing import Any

import httpx
import pytest

from service.api import create_app
from service.demo import DEMO_MIX
from service.settings import Settings
from service.store import Database

OPERATOR_KEY = "test-operator-key-0123456789abcdef0123456789"


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


@dataclass
class World:
    client: httpx.AsyncClient
    database: Database
    settings: Settings

    @property
    def operator(self) -> dict[str, str]:
        return {"Authorization": f"Bearer {OPERATOR_KEY}"}

    async def plan(self, plan_id: str, **policy: Any) -> dict[str, str]:
        """A plan with committee and portal keys; returns headers by role."""
        r = await self.client.post(
            "/v1/plans",
            json={"plan_id": plan_id, "name": f"Plan {plan_id}", "currency": "USD", "policy": policy},
            headers=self.operator,
        )
        assert r.status_code == 201, r.text
        keys = {"operator": self.operator}
        for role in ("committee", "portal"):
            r = await self.client.post(f"/v1/plans/{plan_id}/keys", json={"role": role}, headers=self.operator)
            assert r.status_code == 201, r.text
            keys[role] = {"Authorization": f"Bearer {r.json()['secret']}"}
        return keys  # type: ignore[return-value]

    async def publish(self, plan_id: str, keys: dict[str, Any], mix: dict[str, Any] | None = None, activate: bool = True) -> dict[str, Any]:
        body = copy.deepcopy(mix or DEMO_MIX)
        body.setdefault("cross_check", False)
        r = await self.client.post(f"/v1/plans/{plan_id}/mixes", json=body, headers=keys["committee"])
        assert r.status_code == 201, r.text
        if activate:
            a = await self.client.post(f"/v1/plans/{plan_id}/mixes/{body['version']}/activate", headers=keys["committee"])
            assert a.status_code == 200, a.text
        return r.json()  # type: ignore[no-any-return]


@pytest.fixture
async def world(database: Database) -> AsyncIterator[World]:
    settings = Settings(database_url=database.url, bootstrap_operator_key=OPERATOR_KEY, access_log="off")
    app = create_app(settings, database, migrate=False)
    async with app.router.lifespan_context(app):
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://mixline.test") as client:
            yield World(client, database, settings)


@pytest.fixture
def fresh_id(new_plan_id: str) -> Callable[[], str]:
    counter = iter(range(1000))
    return lambda: f"{new_plan_id}-{next(counter)}"
