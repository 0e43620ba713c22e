"""Allocations (portal): answer one member or a whole membership, read answers back. HTTP only."""

from __future__ import annotations

from collections.abc import Callable, Coroutine
from typing import Annotated, Any

import orjson
from fastapi import APIRouter, Query, Request
from fastapi.routing import APIRoute
from starlette.responses import Response

from service.store import get_allocation, list_allocations

from . import idempotency
from .allocating import allocate_batch, allocate_one, rendered
from .auth import Caller
from .bodies import request_body_schema
from .deps import CallerDep, StateDep
from .errors import NotFound
from .responses import AUTHED, problems, raw_json_response
from .schemas import AllocationListOut, AllocationOut, BatchOut
from .state import AppState

router = APIRouter(prefix="/v1/plans/{plan_id}/allocations", tags=["allocations"])

READERS = ("portal",)


def _documented(body: str) -> dict[str, object]:
    """The OpenAPI of a route that reads its own key, Idempotency-Key and body (see below)."""
    return {"parameters": [idempotency.HEADER_PARAMETER], "security": [{"HTTPBearer": []}], **request_body_schema(body)}


# The two allocation routes take only their path parameter: FastAPI's dependency resolution
# (the bearer scheme, the state, the header) cost more than the allocation itself in a profile,
# so they read the same things directly, through the same KeyRing, and declare them above.


class PlainRoute(APIRoute):
    """A FastAPI route (documented from its declaration, as any other) whose handler calls the
    endpoint with the plan id and the request, and nothing else: FastAPI's per-request machinery
    (body reading, dependency solving, response validation) had nothing to do for these two
    endpoints but still cost about a third of a request's CPU. FastAPI's documented extension
    point for this is `get_route_handler`."""

    def get_route_handler(self) -> Callable[[Request], Coroutine[Any, Any, Response]]:
        endpoint = self.endpoint

        async def handler(request: Request) -> Response:
            response: Response = await endpoint(request.path_params["plan_id"], request)
            return response

        return handler


posting = APIRouter(prefix="/v1/plans/{plan_id}/allocations", tags=["allocations"], route_class=PlainRoute)


async def _read(request: Request) -> tuple[AppState, Caller, str | None]:
    state: AppState = request.app.state.mixline
    caller = await state.caller(request.headers.get("authorization"))
    return state, caller, request.headers.get("idempotency-key")


@posting.post(
    "", status_code=201, response_model=AllocationOut, operation_id="create_allocation",
    responses=problems(400, *AUTHED, 409, 413), openapi_extra=_documented("AllocationIn"),
)
async def create_allocation(plan_id: str, request: Request) -> Response:
    state, caller, key = await _read(request)
    return await allocate_one(state, caller, plan_id, await request.body(), key)


@posting.post(
    "/batch", status_code=201, response_model=BatchOut, operation_id="create_allocation_batch",
    responses=problems(400, *AUTHED, 409, 413), openapi_extra=_documented("BatchIn"),
)
async def create_allocation_batch(plan_id: str, request: Request) -> Response:
    state, caller, key = await _read(request)
    return await allocate_batch(state, caller, plan_id, await request.body(), key)


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
    return raw_json_response(rendered(state, plan_id, body))


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
    head = orjson.dumps({"plan_id": plan_id, "member_id": member_id, "count": len(bodies)})[:-1] + b',"allocations":['
    return raw_json_response(head + b",".join(rendered(state, plan_id, b) for b in bodies) + b"]}")

