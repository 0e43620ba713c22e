"""Allocations (portal): answer one member, read one back, list a member's. HTTP only."""

from __future__ import annotations

import asyncio
from typing import Annotated

import orjson
from fastapi import APIRouter, Query, Request
from starlette.responses import Response

from service.allocation import render
from service.store import get_allocation, list_allocations

from . import idempotency
from .allocating import answer, log_batch, rendered, utc_now_text
from .auth import Caller
from .bodies import parse_body, request_body_schema
from .deps import CallerDep, StateDep
from .errors import NotFound
from .responses import AUTHED, json_response, problems, raw_json_response
from .schemas import AllocationIn, AllocationListOut, AllocationOut
from .state import AppState

router = APIRouter(prefix="/v1/plans/{plan_id}/allocations", tags=["allocations"])

READERS = ("portal",)


@router.post(
    "", status_code=201, response_model=AllocationOut, operation_id="create_allocation",
    responses=problems(400, *AUTHED, 409), openapi_extra=request_body_schema("AllocationIn"),
)
async def create_allocation(
    plan_id: str, request: Request, caller: CallerDep, state: StateDep, idempotency_key: idempotency.KeyHeader = None
) -> Response:
    return await allocate_one(state, caller, plan_id, await request.body(), idempotency_key)


async def allocate_one(state: AppState, caller: Caller, plan_id: str, raw: bytes, idempotency_key: str | None) -> Response:
    """One member's allocation, logged before it is answered. Shared by the route above and the
    fast path (fastpath.py), which calls it without FastAPI's routing and dependency work."""
    caller.require(plan_id, "portal")
    plan = state.plan(plan_id)
    body = parse_body(AllocationIn, raw)
    owned = await idempotency.claim(state, caller, plan_id, idempotency_key, raw)
    if isinstance(owned, Response):
        return owned
    try:
        created_at = utc_now_text()
        record, view = answer(state, plan, body, created_at=created_at)
        doc = render(record, view.codes)
        payload = orjson.dumps(doc)
        completes = None if owned is None else owned.completion(201, payload)
        # The answer goes out only once its log row is committed: no unlogged recommendation exists.
        await asyncio.wrap_future(
            state.db.writer.submit(log_batch(plan_id, body.mix_version, created_at, [record], completes))
        )
    except BaseException:
        if owned is not None:
            await idempotency.give_up(state, owned)
        raise
    state.metrics.allocations.labels(plan_id).inc()
    return raw_json_response(payload, 201, headers={"Location": f"/v1/plans/{plan_id}/allocations/{doc['allocation_id']}"})


@router.get(
    "/{allocation_id}", response_model=AllocationOut, operation_id="get_allocation",
    responses=problems(*AUTHED),
)
def read_allocation(plan_id: str, allocation_id: str, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id, *READERS)
    with state.db.reading() as s:
        body = get_allocation(s, plan_id, allocation_id)
    if body is None:
        raise NotFound(f"allocation {allocation_id!r} not found in plan {plan_id!r}")
    return json_response(rendered(state, plan_id, body))


@router.get("", response_model=AllocationListOut, operation_id="list_allocations", responses=problems(*AUTHED))
def list_member_allocations(
    plan_id: str,
    caller: CallerDep,
    state: StateDep,
    member_id: Annotated[str, Query(min_length=1, max_length=128)],
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
) -> Response:
    caller.require(plan_id, *READERS)
    state.plan(plan_id)
    with state.db.reading() as s:
        bodies = list_allocations(s, plan_id, member_id, limit=limit)
    docs = [rendered(state, plan_id, b) for b in bodies]
    return json_response({"plan_id": plan_id, "member_id": member_id, "count": len(docs), "allocations": docs})

