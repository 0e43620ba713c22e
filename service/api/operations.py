"""Operations endpoints, no key: liveness, readiness (database and migrations), Prometheus metrics."""

from __future__ import annotations

from fastapi import APIRouter, Request
from starlette.responses import PlainTextResponse, Response

from .deps import StateDep
from .errors import NotReady
from .metrics import EXPOSITION_MEDIA_TYPE
from .responses import json_response, problems
from .schemas import HealthOut

router = APIRouter(tags=["operations"])


@router.get("/livez", response_model=HealthOut, operation_id="livez")
async def livez() -> Response:
    return json_response({"status": "live"})


@router.get("/readyz", response_model=HealthOut, operation_id="readyz", responses=problems(503))
def readyz(state: StateDep) -> Response:
    if state.shutting_down:
        raise NotReady("shutting down: finishing the requests in progress")
    if not state.db.ping():
        raise NotReady("database unreachable")
    if not state.db.migrations_current():
        raise NotReady("database migrations are behind the code; run `mixline migrate`")
    return json_response({"status": "ready", "checks": {"database": "ok", "migrations": "current"}})


@router.get(
    "/metrics", operation_id="metrics", response_class=PlainTextResponse,
    summary="Prometheus metrics",
    responses={200: {
        "description": f"Prometheus text exposition format (`{EXPOSITION_MEDIA_TYPE}`), not JSON",
        "content": {"text/plain": {"schema": {"type": "string"}}},
    }},
)
def metrics(request: Request) -> Response:
    body = request.app.state.metrics.render()
    return Response(body, media_type=EXPOSITION_MEDIA_TYPE)
