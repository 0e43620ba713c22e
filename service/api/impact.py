"""POST .../mixes/{version}/impact (committee): a candidate version's effect on members. HTTP only."""

from __future__ import annotations

import gc
from collections.abc import Iterator
from contextlib import contextmanager

import orjson
from fastapi import APIRouter
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from service.allocation import Setting, impact, require_candidate
from service.store import latest_allocations

from .deciding import utc_now_text
from .deps import CallerDep, StateDep
from .errors import ConflictError
from .responses import AUTHED, json_response, problems
from .schemas import ImpactOut
from .state import AppState

router = APIRouter(prefix="/v1/plans/{plan_id}/mixes", tags=["mixes"])


@contextmanager
def collector_paused() -> Iterator[None]:
    """Parsing 300,000 records makes millions of objects at once; the cyclic collector would
    walk them repeatedly (it doubles the time). They make no cycles: collect once afterwards."""
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()


def impact_document(state: AppState, plan_id: str, version: str) -> dict[str, object]:
    """Every member whose latest allocation is under the active version, recomputed under
    `version` by the allocation rules; nothing is logged. Also used by the review page."""
    plan = state.plan(plan_id)
    candidate = state.mixes.view(plan_id, version)
    active = state.active_version(plan_id)
    require_candidate(version, state.mixes.state(plan_id, version)[0], active)
    if active is None:
        raise ConflictError(f"plan {plan_id!r} has no active version to compare {version!r} with")
    with state.db.reading() as s:
        bodies = latest_allocations(s, plan_id, active)
    with collector_paused():
        records = orjson.loads("[" + ",".join(bodies) + "]")
    del bodies
    found = impact(records, Setting(plan_id, plan.currency, plan.policy, candidate.terms(), utc_now_text()))
    return {"plan_id": plan_id, "from_version": active, "to_version": version} | found.document()


@router.post(
    "/{version}/impact", response_model=ImpactOut, operation_id="preview_mix_impact",
    responses=problems(*AUTHED, 409),
)
async def preview_impact(plan_id: str, version: str, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id, "committee")
    # Reading and recomputing every member is CPU work: off the event loop.
    return json_response(await run_in_threadpool(impact_document, state, plan_id, version))
