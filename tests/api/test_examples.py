"""Every documented example request, sent to the app; each answer has its example's shape."""

from __future__ import annotations

from typing import Any

import pytest

from .conftest import OPERATOR_KEY, World
from .examples_runner import load_examples, replay

pytestmark = pytest.mark.anyio


def shape(value: Any) -> Any:
    """The structure of a JSON value: keys and types, not the values (ids and times differ)."""
    if isinstance(value, dict):
        return {k: shape(v) for k, v in value.items()}
    if isinstance(value, list):
        return [shape(value[0])] if value else []
    if isinstance(value, bool) or value is None:
        return type(value).__name__
    if isinstance(value, int | float):
        return "number"
    return type(value).__name__


def test_every_operation_has_an_example() -> None:
    from service.api import create_app

    app = create_app()
    ops = {op["operationId"] for item in app.openapi()["paths"].values() for op in item.values()}
    documented = {ex["operation_id"] for _, ex in load_examples()}
    assert ops <= documented, sorted(ops - documented)


def test_examples_are_embedded_in_openapi() -> None:
    from service.api import create_app

    doc = create_app().openapi()
    missing = []
    for item in doc["paths"].values():
        for op in item.values():
            media = [m for resp in op["responses"].values() for m in resp.get("content", {}).values()]
            if "requestBody" in op:
                media += list(op["requestBody"]["content"].values())
            if not any("examples" in m for m in media):
                missing.append(op["operationId"])
    assert not missing


async def test_examples_replay_with_their_documented_shape(world: World) -> None:
    for path, ex, r in await replay(world.client, OPERATOR_KEY):
        assert r.status_code == ex["status"], (path.name, r.text)
        if isinstance(ex["response"], dict | list):
            assert shape(r.json()) == shape(ex["response"]), path.name
