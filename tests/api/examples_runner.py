"""Runs the documented examples in service/api/openapi_examples/ against an app, in their numbered order.

Each file holds one operation's example in our invented scenario:
  {"operation_id", "summary", "role", "method", "path", "query", "request", "status", "response"}
`role` names whose key sends it (operator, committee, portal, or none). Paths may hold
{allocation_id}, filled from the latest create_allocation answer, and {replaced_key_id}, the key a
second create_key for the same role replaced.

`python -m tests.api.examples_runner` rewrites the response halves from a fresh run (the requests
are the hand-written part); the test in test_examples.py replays every request and checks each
answer against its example's shape.
"""

from __future__ import annotations

import asyncio
import json
import sys
import tempfile
from pathlib import Path
from typing import Any

import httpx

EXAMPLES = Path(__file__).resolve().parents[2] / "service" / "api" / "openapi_examples"


def load_examples() -> list[tuple[Path, dict[str, Any]]]:
    return [(p, json.loads(p.read_text())) for p in sorted(EXAMPLES.glob("*.json"))]


async def replay(client: httpx.AsyncClient, operator_key: str) -> list[tuple[Path, dict[str, Any], httpx.Response]]:
    keys: dict[str, str] = {"operator": operator_key}
    context: dict[str, str] = {}
    key_ids: dict[str, str] = {}
    done = []
    for path, ex in load_examples():
        headers = {"Authorization": f"Bearer {keys[ex['role']]}"} if ex["role"] != "none" else {}
        url = ex["path"].format(**context)
        r = await client.request(ex["method"], url, json=ex.get("request"), params=ex.get("query"), headers=headers)
        if ex["operation_id"] == "create_key" and r.status_code == 201:
            role = r.json()["role"]
            if role in key_ids:  # a second key for a role: the rotation examples revoke the first
                context["replaced_key_id"] = key_ids[role]
            keys[role], key_ids[role] = r.json()["secret"], r.json()["key_id"]
        if ex["operation_id"] == "create_allocation" and r.status_code == 201:
            context["allocation_id"] = r.json()["allocation_id"]
        done.append((path, ex, r))
    return done


async def _write() -> None:
    from service.api import create_app
    from service.settings import Settings
    from service.store import Database

    operator = "example-operator-key-0123456789abcdefghijkl"
    with tempfile.TemporaryDirectory() as tmp:
        db = Database(f"sqlite:///{tmp}/examples.db")
        app = create_app(Settings(database_url=db.url, bootstrap_operator_key=operator), db)
        async with app.router.lifespan_context(app):
            async with httpx.AsyncClient(transport=httpx.ASGITransport(app=app), base_url="http://mixline.test") as c:
                for path, ex, r in await replay(c, operator):
                    if r.status_code != ex["status"]:
                        sys.exit(f"{path.name}: expected {ex['status']}, got {r.status_code}: {r.text}")
                    ex["response"] = r.json() if r.headers.get("content-type", "").find("json") >= 0 else r.text
                    path.write_text(json.dumps(ex, indent=2) + "\n")
        db.close()


if __name__ == "__main__":
    asyncio.run(_write())
