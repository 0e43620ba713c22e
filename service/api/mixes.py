"""Risky-mix versions: publish (committee), list, activate, retire, read, current, frontier. HTTP only."""

from __future__ import annotations

from datetime import datetime
from typing import Annotated, Literal

import orjson
from fastapi import APIRouter, Query, Request
from starlette.background import BackgroundTask
from starlette.concurrency import run_in_threadpool
from starlette.responses import HTMLResponse, Response

from service.allocation import MixState, frontier_document, state_of
from service.store import MixLifecycle, get_allocation
from service.timestamps import rfc3339

from .allocating import rendered
from .bodies import request_body_schema
from .charts import frontier_svg
from .deps import CallerDep, StateDep
from .errors import NotFound, Unprocessable
from .impact import impact_document
from .negotiation import choose
from .pictures import frontier_chart, frontier_csv, member_split
from .responses import AUTHED, json_response, problems
from .review_page import CONTENT_SECURITY_POLICY, review_html
from .schemas import (
    ActivationOut,
    FrontierOut,
    MixListOut,
    MixOut,
    MixVersionOut,
)
from .state import AppState, PlanView

router = APIRouter(prefix="/v1/plans/{plan_id}/mixes", tags=["mixes"])

READERS = ("committee", "portal")


def _time(value: datetime | None) -> str | None:
    return None if value is None else rfc3339(value)


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
    responses={200: {"model": MixOut, "description": "Same version and content again: the first answer"},
               **problems(*AUTHED, 409, 413)},
    openapi_extra=request_body_schema("MixIn"),
)
async def publish_mix(plan_id: str, request: Request, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id, "committee")
    plan = await state.plan_soon(plan_id)
    # Parsing (a 2,000-asset factor model is 1 MB of numbers) and solving are CPU work: off the
    # event loop, and for a large body in the frontier process (publishing.py). pydantic's own
    # JSON parser validates the body in one pass, where FastAPI's body parameter (json.loads,
    # then validation) took 16 ms for a 200-asset covariance.
    created, doc = await run_in_threadpool(state.mixes.publish, plan, await request.body(), caller.key_id)
    # The frontier is solved once the answer has gone out, so it never delays it.
    later = BackgroundTask(state.mixes.solve_frontier_later, plan_id, str(doc["version"]))
    return json_response(doc, 201 if created else 200, background=later)


@router.get("/current", response_model=MixOut, operation_id="get_current_mix", responses=problems(*AUTHED))
def current_mix(plan_id: str, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id, *READERS)
    version = state.active_version(plan_id)
    if version is None:
        raise NotFound(f"plan {plan_id!r} has no active mix yet; a committee activates one")
    return json_response(_mix_document(state, plan_id, version))


@router.get("/{version}", response_model=MixOut, operation_id="get_mix", responses=problems(*AUTHED))
def read_mix(plan_id: str, version: str, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id, *READERS)
    state.plan(plan_id)
    return json_response(_mix_document(state, plan_id, version))


def _mix_document(state: AppState, plan_id: str, version: str) -> dict[str, object]:
    """The solved mix as published, its state and lifecycle, and the inputs as stored."""
    doc = state.mixes.published(plan_id, version)
    mix_state, entry = state.mixes.state(plan_id, version)
    return {
        **doc,
        "active": mix_state is MixState.ACTIVE,
        "state": mix_state.value,
        "lifecycle": lifecycle_document(entry, mix_state),
        "inputs": state.mixes.inputs(plan_id, version),
    }


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


FRONTIER_MEDIA = ("application/json", "text/csv", "image/svg+xml")


@router.get(
    "/{version}/frontier", response_model=FrontierOut, operation_id="get_frontier",
    responses={
        200: {"content": {"text/csv": {"schema": {"type": "string"}}, "image/svg+xml": {"schema": {"type": "string"}}},
              "description": "JSON, a CSV table (Accept: text/csv) or an SVG chart (Accept: image/svg+xml)"},
        **problems(*AUTHED, 406),
    },
)
async def read_frontier(
    plan_id: str,
    version: str,
    request: Request,
    caller: CallerDep,
    state: StateDep,
    points: Annotated[int, Query(ge=2, description="how many evenly spaced frontier points (corners and the tangency are added)")] = 25,
    spacing: Annotated[Literal["return", "volatility"], Query(description="space the points evenly in expected return or in volatility")] = "return",
    allocation_id: Annotated[str | None, Query(max_length=128, description="mark this logged allocation's split")] = None,
    corners: Annotated[bool, Query(description="include every corner portfolio (thousands for a large capped mix)")] = True,
) -> Response:
    caller.require(plan_id, *READERS)
    media = choose(request.headers.get("accept"), FRONTIER_MEDIA)
    await state.plan_soon(plan_id)
    if points > state.settings.max_frontier_points:
        raise Unprocessable(
            f"points: at most {state.settings.max_frontier_points}",
            errors=[{"field": "points", "reason": f"at most {state.settings.max_frontier_points}"}],
        )
    # The frontier may still be being solved just after publication: wait off the event loop.
    view, frontier = await run_in_threadpool(state.mixes.frontier, plan_id, version)
    member = None if allocation_id is None else _member(state, plan_id, version, allocation_id)
    if media == "image/svg+xml":
        chart = frontier_chart(view, frontier, f"Risky mix {version}: efficient frontier", member)
        svg = await run_in_threadpool(frontier_svg, chart)
        return Response(svg, media_type="image/svg+xml")
    # Thousands of weight vectors for a large mix: written off the event loop.
    doc = await run_in_threadpool(lambda: frontier_document(view, frontier, points, spacing, corners=corners))
    if media == "text/csv":
        return Response(frontier_csv(doc), media_type="text/csv; charset=utf-8",
                        headers={"Content-Disposition": f'inline; filename="frontier-{version}.csv"'})
    if member is not None:
        doc["member_split"] = member
    return json_response(doc)


def _member(state: AppState, plan_id: str, version: str, allocation_id: str) -> dict[str, object]:
    with state.db.reading() as s:
        stored = get_allocation(s, plan_id, allocation_id)
    if stored is None:
        raise NotFound(f"allocation {allocation_id!r} not found in plan {plan_id!r}")
    allocation = orjson.loads(rendered(state, plan_id, stored))
    if allocation["mix_version"] != version:
        reason = f"was made under mix version {allocation['mix_version']!r}, not {version!r}"
        raise Unprocessable(f"allocation_id: {reason}", errors=[{"field": "allocation_id", "reason": reason}])
    return member_split(allocation)


@router.get(
    "/{version}/review", operation_id="review_mix", response_class=HTMLResponse,
    responses={200: {"content": {"text/html": {"schema": {"type": "string"}}},
                     "description": "one self-contained HTML document for the committee"}, **problems(*AUTHED)},
)
async def review_mix(plan_id: str, version: str, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id, "committee")
    plan = await state.plan_soon(plan_id)
    # Off the event loop as a whole: live reads of the lifecycle, possibly a wait for the frontier,
    # the chart, the impact preview and a large mix's inputs parsed from their stored text.
    page = await run_in_threadpool(_review_page, state, plan, version)
    return HTMLResponse(page, headers={"Content-Security-Policy": CONTENT_SECURITY_POLICY})


def _review_page(state: AppState, plan: PlanView, version: str) -> str:
    plan_id = plan.plan_id
    doc = state.mixes.published(plan_id, version)
    mix_state, entry = state.mixes.state(plan_id, version)
    view, frontier = state.mixes.frontier(plan_id, version)
    chart = frontier_chart(view, frontier, f"Risky mix {version}: efficient frontier")
    svg = frontier_svg(chart)
    # The impact against the active version, for a candidate (a published version) only: the
    # active version against itself moves nobody, and a retired one is never put in force again.
    active = state.active_version(plan_id)
    impact = None
    if active is not None and mix_state is MixState.PUBLISHED:
        impact = impact_document(state, plan_id, version)
    not_computed = (
        "no version is in force yet" if active is None
        else "this is the version in force" if mix_state is MixState.ACTIVE
        else "a retired version is never in force again" if mix_state is MixState.RETIRED else None
    )
    return review_html(
        plan={"plan_id": plan.plan_id, "name": plan.name},
        mix=doc,
        inputs=state.mixes.inputs(plan_id, version),
        lifecycle=lifecycle_document(entry, mix_state),
        active_version=active,
        chart_svg=svg,
        lower=[float(x) for x in view.solved.inputs.lower],
        upper=[float(x) for x in view.solved.inputs.upper],
        impact=impact,
        impact_note=not_computed,
    )
