"""Plans and their keys (operator only): HTTP only; the rules sit in allocation and store.

Keys are listed (never their secrets), issued with an optional lifetime and revoked; rotating a
key is issuing a new one and revoking the old once the client uses the new one. Every replica
refuses a revoked key within MIXLINE_KEY_CACHE_SECONDS (auth.py).
"""

from __future__ import annotations

from datetime import timedelta

from fastapi import APIRouter
from starlette.responses import Response

from service.allocation import build_policy
from service.store import (
    Conflict,
    KeyRecord,
    PlanRecord,
    get_plan,
    insert_key,
    insert_plan,
    list_keys,
    revoke_key,
    secret_hash,
)
from service.timestamps import rfc3339, utc_now

from .auth import new_secret
from .deps import CallerDep, StateDep
from .errors import ConflictError, NotFound
from .responses import AUTHED, json_response, problems
from .schemas import KeyIn, KeyInfoOut, KeyListOut, KeyOut, PlanIn, PlanOut

router = APIRouter(prefix="/v1/plans", tags=["plans"])


def _plan_document(record: PlanRecord | None) -> dict[str, object]:
    assert record is not None
    return {
        "plan_id": record.plan_id,
        "name": record.name,
        "currency": record.currency,
        "policy": record.policy,
        "active_version": record.active_version,
        "created_at": rfc3339(record.created_at),
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
        glide_path=None if p.glide_path is None else [point.model_dump() for point in p.glide_path],
        human_capital=None if p.human_capital is None else p.human_capital.model_dump(),
        rebalance_band=p.rebalance_band,
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


def _key_document(record: KeyRecord) -> dict[str, object]:
    return {
        "key_id": record.key_id,
        "plan_id": record.plan_id,
        "role": record.role,
        "created_at": rfc3339(record.created_at),
        "expires_at": None if record.expires_at is None else rfc3339(record.expires_at),
        "revoked_at": None if record.revoked_at is None else rfc3339(record.revoked_at),
    }


@router.post(
    "/{plan_id}/keys", status_code=201, response_model=KeyOut, operation_id="create_key",
    responses=problems(*AUTHED),
)
def create_key(plan_id: str, body: KeyIn, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id)  # 404 for another plan's key, 403 for this plan's: operator only
    state.plan(plan_id)
    key_id, secret = new_secret()
    now = utc_now()
    expires_at = None if body.expires_in_days is None else now + timedelta(days=body.expires_in_days)
    with state.db.writing() as s:
        record = insert_key(
            s, key_id=key_id, plan_id=plan_id, role=body.role, secret_hash=secret_hash(secret),
            expires_at=expires_at, created_at=now,
        )
    doc = _key_document(record)
    del doc["revoked_at"]
    return json_response({**doc, "secret": secret}, 201)


@router.get(
    "/{plan_id}/keys", response_model=KeyListOut, operation_id="list_keys", responses=problems(*AUTHED),
)
def read_keys(plan_id: str, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id)
    state.plan(plan_id)
    with state.db.reading() as s:
        records = list_keys(s, plan_id)
    return json_response({"plan_id": plan_id, "keys": [_key_document(r) for r in records]})


@router.delete(
    "/{plan_id}/keys/{key_id}", response_model=KeyInfoOut, operation_id="revoke_key",
    responses=problems(*AUTHED),
)
def revoke(plan_id: str, key_id: str, caller: CallerDep, state: StateDep) -> Response:
    """Revoke a key (again: the first revocation time stands). This replica refuses it at once,
    every other within MIXLINE_KEY_CACHE_SECONDS."""
    caller.require(plan_id)
    state.plan(plan_id)
    with state.db.writing() as s:
        record = revoke_key(s, plan_id, key_id, now=utc_now())
    if record is None:
        raise NotFound(f"key {key_id!r} not found in plan {plan_id!r}")
    state.keys.remember(record)
    return json_response(_key_document(record))
