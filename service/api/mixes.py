"""Risky-mix versions: publish (committee), list, activate, retire, read, current, frontier. HTTP only."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Query, Request
from starlette.background import BackgroundTask
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from service.allocation import MixState, frontier_document, state_of
from service.store import MixLifecycle

from .bodies import parse_body, request_body_schema
from .deps import CallerDep, StateDep
from .errors import NotFound, Unprocessable
from .responses import AUTHED, json_response, problems
from .schemas import (
    ActivationOut,
    FrontierOut,
    MixIn,
    MixListOut,
    MixOut,
    MixVersionOut,
)

router = APIRouter(prefix="/v1/plans/{plan_id}/mixes", tags=["mixes"])

READERS = ("committee", "portal")


def _time(value: object) -> str | None:
    return None if value is None else value.isoformat()  # type: ignore[attr-defined]


def lifecycle_document(entry: MixLifecycle, state: MixState) -> dict[str, object]:
    return {
        "version": entry.version,
        "state": state.value,
        "content_hash": entry.content_hash,
        "published_at": _time(entry.published_at),
        "published_by": entry.published_by,
        "activated_at": _time(entry.activated_at),
        "activated_by": entry.activated_by,
        "retired_at": _time(entry.retired_at),
        "retired_by": entry.retired_by,
    }


@router.get("", response_model=MixListOut, operation_id="list_mixes", responses=problems(*AUTHED))
def list_mixes(plan_id: str, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id, *READERS)
    active, entries = state.mixes.lifecycle(plan_id)
    versions = [
        lifecycle_document(e, state_of(e.version, active_version=active, retired=e.retired_at is not None))
        for e in entries
    ]
    return json_response({"plan_id": plan_id, "active_version": active, "versions": versions})


@router.post(
    "", status_code=201, response_model=MixOut, operation_id="publish_mix",
    responses={200: {"description": "Same version and content again: the first answer"}, **problems(*AUTHED, 409, 413)},
    openapi_extra=request_body_schema("MixIn"),
)
async def publish_mix(plan_id: str, request: Request, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id, "committee")
    plan = state.plan(plan_id)
    # A 200-asset covariance is 40,000 numbers: pydantic's own JSON parser validates them in one
    # pass, where FastAPI's body parameter (json.loads, then validation) took 16 ms.
    body = parse_body(MixIn, await request.body())
    # Solving is CPU work: keep it off the event loop so other requests go on being answered.
    created, doc = await run_in_threadpool(state.mixes.publish, plan, body, caller.key_id)
    # The frontier is solved once the answer has gone out, so it never delays it.
    later = BackgroundTask(state.mixes.solve_frontier_later, plan_id, body.version)
    return json_response(doc, 201 if created else 200, background=later)


@router.get("/current", response_model=MixOut, operation_id="get_current_mix", responses=problems(*AUTHED))
def current_mix(plan_id: str, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id, *READERS)
    version = state.active_version(plan_id)
    if version is None:
        raise NotFound(f"plan {plan_id!r} has no active mix yet; a committee activates one")
    return json_response({**state.mixes.published(plan_id, version), "active": True})


@router.get("/{version}", response_model=MixOut, operation_id="get_mix", responses=problems(*AUTHED))
def read_mix(plan_id: str, version: str, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id, *READERS)
    state.plan(plan_id)
    doc = state.mixes.published(plan_id, version)
    mix_state, entry = state.mixes.state(plan_id, version)
    return json_response({
        **doc,
        "active": mix_state is MixState.ACTIVE,
        "state": mix_state.value,
        "lifecycle": lifecycle_document(entry, mix_state),
        "inputs": state.mixes.inputs(plan_id, version),
    })


@router.post(
    "/{version}/activate", response_model=ActivationOut, operation_id="activate_mix",
    responses=problems(*AUTHED, 409),
)
def activate_mix(plan_id: str, version: str, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id, "committee")
    state.plan(plan_id)
    retired, entry = state.mixes.activate(plan_id, version, caller.key_id)
    return json_response({
        "plan_id": plan_id,
        "active_version": version,
        "content_hash": entry.content_hash,
        "retired_version": retired,
        "mix": lifecycle_document(entry, MixState.ACTIVE),
    })


@router.post(
    "/{version}/retire", response_model=MixVersionOut, operation_id="retire_mix",
    responses=problems(*AUTHED, 409),
)
def retire_mix(plan_id: str, version: str, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id, "committee")
    state.plan(plan_id)
    entry = state.mixes.retire(plan_id, version, caller.key_id)
    return json_response(lifecycle_document(entry, MixState.RETIRED))


@router.get(
    "/{version}/frontier", response_model=FrontierOut, operation_id="get_frontier",
    responses=problems(*AUTHED),
)
def read_frontier(
    plan_id: str,
    version: str,
    caller: CallerDep,
    state: StateDep,
    points: Annotated[int, Query(ge=2, description="how many evenly spaced frontier points")] = 25,
) -> Response:
    caller.require(plan_id, *READERS)
    state.plan(plan_id)
    if points > state.settings.max_frontier_points:
        raise Unprocessable(
            f"points: at most {state.settings.max_frontier_points}",
            errors=[{"field": "points", "reason": f"at most {state.settings.max_frontier_points}"}],
        )
    view, frontier = state.mixes.frontier(plan_id, version)
    return json_response(frontier_document(view, frontier, points))
