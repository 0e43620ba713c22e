"""Keys: listed without secrets, issued with a lifetime, revoked on every replica within seconds,
rotated by issue-then-revoke; both databases."""

from __future__ import annotations

import asyncio
import re
import time
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from datetime import UTC, datetime, timedelta

import httpx
import pytest
from sqlalchemy import text

from service.api import create_app
from service.api.auth import KeyRing
from service.api.errors import Unauthorized
from service.settings import Settings
from service.store import Database, KeyRecord, secret_hash
from service.timestamps import parse_rfc3339

from .conftest import OPERATOR_KEY, World

pytestmark = pytest.mark.anyio

RFC3339_Z = r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{6}Z$"


@asynccontextmanager
async def replica(url: str, **settings: object) -> AsyncIterator[httpx.AsyncClient]:
    """Another process's app on the same database (its own Database, pools and caches)."""
    db = Database(url)
    app = create_app(Settings(database_url=url, bootstrap_operator_key=OPERATOR_KEY, access_log="off", **settings), db, migrate=False)  # type: ignore[arg-type]
    try:
        async with app.router.lifespan_context(app):
            async with httpx.AsyncClient(transport=httpx.ASGITransport(app=app), base_url="http://replica.test") as client:
                yield client
    finally:
        db.close()


async def test_list_shows_every_key_without_secrets(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    r = await world.client.post(f"/v1/plans/{new_plan_id}/keys", json={"role": "portal", "expires_in_days": 30},
                                headers=world.operator)
    assert r.status_code == 201, r.text
    issued = r.json()
    assert set(issued) == {"key_id", "plan_id", "role", "secret", "created_at", "expires_at"}
    created, expires = parse_rfc3339(issued["created_at"]), parse_rfc3339(issued["expires_at"])
    assert expires - created == timedelta(days=30)  # 30 days from issue, to the microsecond
    listing = await world.client.get(f"/v1/plans/{new_plan_id}/keys", headers=world.operator)
    assert listing.status_code == 200
    body = listing.json()
    assert body["plan_id"] == new_plan_id and len(body["keys"]) == 3  # committee, portal and this one
    for key in body["keys"]:
        assert set(key) == {"key_id", "plan_id", "role", "created_at", "expires_at", "revoked_at"}
        assert key["revoked_at"] is None
    assert issued["secret"] not in listing.text and secret_hash(issued["secret"]) not in listing.text
    mine = next(k for k in body["keys"] if k["key_id"] == issued["key_id"])
    assert mine["expires_at"] == issued["expires_at"]
    assert re.match(RFC3339_Z, mine["created_at"]) and re.match(RFC3339_Z, mine["expires_at"])
    # Only the operator: a committee key of this plan is 403 naming the operator role, of another plan 404.
    own = await world.client.get(f"/v1/plans/{new_plan_id}/keys", headers=keys["committee"])
    assert own.status_code == 403 and own.json()["detail"].endswith("it needs the operator role")
    other_id = new_plan_id + "-b"
    other = await world.plan(other_id)
    for method, path in (("GET", f"/v1/plans/{new_plan_id}/keys"), ("DELETE", f"/v1/plans/{new_plan_id}/keys/{issued['key_id']}"),
                         ("POST", f"/v1/plans/{new_plan_id}/keys")):
        r = await world.client.request(method, path, headers=other["committee"], json={"role": "portal"} if method == "POST" else None)
        assert r.status_code == 404 and r.json()["type"] == "urn:mixline:problem:not-found", (method, r.text)


async def test_expires_in_days_is_validated(world: World, new_plan_id: str) -> None:
    await world.plan(new_plan_id)
    for bad in (0, -1, 1.5, "7", 100_000):
        r = await world.client.post(f"/v1/plans/{new_plan_id}/keys", json={"role": "portal", "expires_in_days": bad},
                                    headers=world.operator)
        assert r.status_code == 422 and r.json()["errors"][0]["field"] == "expires_in_days", (bad, r.text)


async def test_expired_key_is_401(world: World, new_plan_id: str) -> None:
    await world.plan(new_plan_id)
    r = await world.client.post(f"/v1/plans/{new_plan_id}/keys", json={"role": "portal", "expires_in_days": 1},
                                headers=world.operator)
    key_id, portal = r.json()["key_id"], {"Authorization": f"Bearer {r.json()['secret']}"}
    assert (await world.client.get(f"/v1/plans/{new_plan_id}", headers=portal)).status_code == 200
    with world.database.writing() as s:  # a day passes
        s.execute(text("UPDATE api_keys SET expires_at = :t WHERE key_id = :k"),
                  {"t": datetime.now(UTC) - timedelta(seconds=1), "k": key_id})
    async with replica(world.database.url) as other:  # a replica that has not read the key yet
        late = await other.get(f"/v1/plans/{new_plan_id}", headers=portal)
    assert late.status_code == 401 and "expired" in late.json()["detail"]
    assert late.headers["WWW-Authenticate"] == "Bearer"


async def test_revoked_key_is_refused_here_at_once_and_on_another_replica_within_seconds(
    world: World, new_plan_id: str
) -> None:
    keys = await world.plan(new_plan_id)
    listing = (await world.client.get(f"/v1/plans/{new_plan_id}/keys", headers=world.operator)).json()["keys"]
    portal_id = next(k["key_id"] for k in listing if k["role"] == "portal")
    url = f"/v1/plans/{new_plan_id}"
    async with replica(world.database.url, key_cache_seconds=0.5) as other:
        assert (await other.get(url, headers=keys["portal"])).status_code == 200  # cached there now
        # Rotation: a new key first, then the old one revoked.
        new = await world.client.post(f"/v1/plans/{new_plan_id}/keys", json={"role": "portal"}, headers=world.operator)
        fresh = {"Authorization": f"Bearer {new.json()['secret']}"}
        revoked = await world.client.delete(f"/v1/plans/{new_plan_id}/keys/{portal_id}", headers=world.operator)
        assert revoked.status_code == 200 and revoked.json()["revoked_at"] is not None
        at = time.monotonic()
        assert (await world.client.get(url, headers=keys["portal"])).status_code == 401  # this replica: at once
        while (await other.get(url, headers=keys["portal"])).status_code == 200:
            assert time.monotonic() - at < 1.5, "the other replica still accepts a revoked key"
            await asyncio.sleep(0.05)
        refused = await other.get(url, headers=keys["portal"])
        assert refused.status_code == 401 and "revoked" in refused.json()["detail"]
        assert (await other.get(url, headers=fresh)).status_code == 200
        assert (await world.client.get(url, headers=fresh)).status_code == 200
    again = await world.client.delete(f"/v1/plans/{new_plan_id}/keys/{portal_id}", headers=world.operator)
    assert again.status_code == 200 and again.json()["revoked_at"] == revoked.json()["revoked_at"]
    missing = await world.client.delete(f"/v1/plans/{new_plan_id}/keys/nope", headers=world.operator)
    assert missing.status_code == 404
    after = (await world.client.get(f"/v1/plans/{new_plan_id}/keys", headers=world.operator)).json()["keys"]
    assert next(k for k in after if k["key_id"] == portal_id)["revoked_at"] == revoked.json()["revoked_at"]


def test_key_ring_rereads_a_key_after_its_cache_time() -> None:
    now = [100.0]
    loads: list[str] = []
    record = KeyRecord("k1", "p", "portal", secret_hash("mxl_x"), datetime.now(UTC))

    def load(key_id: str) -> KeyRecord | None:
        loads.append(key_id)
        return record

    ring = KeyRing(cache_seconds=2.0, clock=lambda: now[0])
    assert ring.lookup("k1", load) is record and ring.lookup("k1", load) is record
    assert loads == ["k1"]
    now[0] += 1.999
    ring.lookup("k1", load)
    assert loads == ["k1"]
    now[0] += 0.002  # 2.001 s after the first read
    ring.lookup("k1", load)
    assert loads == ["k1", "k1"]


def test_key_ring_tells_when_a_key_must_be_read_first() -> None:
    now = [100.0]
    record = KeyRecord("0123456789abcdef", "p", "portal", secret_hash("mxl_0123456789abcdef_s"), datetime.now(UTC))
    bearer = "Bearer mxl_0123456789abcdef_s"
    ring = KeyRing(cache_seconds=2.0, clock=lambda: now[0], bootstrap_secret="operator-secret")
    assert ring.due(bearer) == "0123456789abcdef"
    assert ring.due("Bearer operator-secret") is None and ring.due(None) is None and ring.due("Basic x") is None
    ring.store("0123456789abcdef", record)
    assert ring.due(bearer) is None

    def unreachable(key_id: str) -> KeyRecord | None:
        raise AssertionError("read again although just read")

    assert ring.caller(bearer, unreachable).key_id == "0123456789abcdef"
    now[0] += 2.5
    assert ring.due(bearer) == "0123456789abcdef"  # stale: read again (in a worker thread, AppState.caller)
    ring.store("0123456789abcdef", None)  # revoked keys stay; this one was deleted outright
    with pytest.raises(Unauthorized):
        ring.caller(bearer, unreachable)  # known absent for the cache time: not read twice
