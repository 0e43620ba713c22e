"""Plans and their keys (operator only): HTTP only; the rules sit in allocation and store."""

from __future__ import annotations

from fastapi import APIRouter
from starlette.responses import Response

from service.allocation import build_policy
from service.store import Conflict, PlanRecord, get_plan, insert_key, insert_plan, secret_hash

from .auth import new_secret
from .deps import CallerDep, StateDep
from .errors import ConflictError, NotFound
from .responses import AUTHED, json_response, problems
from .schemas import KeyIn, KeyOut, PlanIn, PlanOut

router = APIRouter(prefix="/v1/plans", tags=["plans"])


def _plan_document(record: PlanRecord | None) -> dict[str, object]:
    assert record is not None
    return {
        "plan_id": record.plan_id,
        "name": record.name,
        "currency": record.currency,
        "policy": record.policy,
        "active_version": record.active_version,
        "created_at": record.created_at.isoformat(),
    }


@router.post(
    "", status_code=201, response_model=PlanOut, operation_id="create_plan",
    responses=problems(*AUTHED, 409),
)
def create_plan(body: PlanIn, caller: CallerDep, state: StateDep) -> Response:
    caller.require_operator()
    p = body.policy
    policy = build_policy(
        min_risky_fraction=p.min_risky_fraction,
        max_risky_fraction=p.max_risky_fraction,
        borrowing_rate=p.borrowing_rate,
        risk_score_table=p.risk_score_table,
    )
    try:
        with state.db.writing() as s:
            insert_plan(s, plan_id=body.plan_id, name=body.name, currency=body.currency, policy=policy.to_document())
    except Conflict:
        raise ConflictError(f"plan {body.plan_id!r} already exists") from None
    with state.db.reading() as s:
        record = get_plan(s, body.plan_id)
    return json_response(_plan_document(record), 201)


@router.get("/{plan_id}", response_model=PlanOut, operation_id="get_plan", responses=problems(*AUTHED))
def read_plan(plan_id: str, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id, "committee", "portal")
    with state.db.reading() as s:
        record = get_plan(s, plan_id)
    if record is None:
        raise NotFound(f"plan {plan_id!r} not found")
    return json_response(_plan_document(record))


@router.post(
    "/{plan_id}/keys", status_code=201, response_model=KeyOut, operation_id="create_key",
    responses=problems(*AUTHED),
)
def create_key(plan_id: str, body: KeyIn, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id)  # 404 for another plan's key, 403 for this plan's: operator only
    state.plan(plan_id)
    key_id, secret = new_secret()
    with state.db.writing() as s:
        insert_key(s, key_id=key_id, plan_id=plan_id, role=body.role, secret_hash=secret_hash(secret))
    return json_response({"key_id": key_id, "plan_id": plan_id, "role": body.role, "secret": secret}, 201)
