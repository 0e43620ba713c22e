"""Audit (operator or committee): verify a plan's hash-chained allocation log, and sign its head.

A signed head (`GET .../audit/head`) kept outside the database anchors the chain: `mixline audit
verify --head FILE` later fails if the chain was rebuilt or cut back. The public key that checks
the signatures is `GET /v1/audit/signing-key` (any key may read it).
"""

from __future__ import annotations

from fastapi import APIRouter
from starlette.responses import Response

from service.store import ChainReport, current_head, verify_chain
from service.timestamps import utc_now

from .deps import CallerDep, StateDep
from .responses import AUTHED, json_response, problems
from .schemas import AuditOut, SignedHeadOut, SigningKeyOut

router = APIRouter(prefix="/v1/plans/{plan_id}/audit", tags=["audit"])
keys_router = APIRouter(prefix="/v1/audit", tags=["audit"])


def report_document(report: ChainReport) -> dict[str, object]:
    bad = report.first_bad
    return {
        "plan_id": report.plan_id,
        "ok": report.ok,
        "checked": report.checked,
        "head_hash": report.head_hash,
        "first_bad": None
        if bad is None
        else {"seq": bad.seq, "allocation_id": bad.allocation_id, "reason": bad.reason},
    }


@router.get("/verify", response_model=AuditOut, operation_id="verify_audit", responses=problems(*AUTHED))
def verify(plan_id: str, caller: CallerDep, state: StateDep) -> Response:
    caller.require(plan_id, "committee")
    state.plan(plan_id)
    return json_response(report_document(verify_chain(state.db, plan_id)))


@router.get("/head", response_model=SignedHeadOut, operation_id="get_audit_head", responses=problems(*AUTHED))
def signed_head(plan_id: str, caller: CallerDep, state: StateDep) -> Response:
    """The plan's chain head (last seq and hash) signed now with the service's Ed25519 key."""
    caller.require(plan_id, "committee")
    state.plan(plan_id)
    with state.db.reading() as s:
        seq, head_hash = current_head(s, plan_id)
    return json_response(state.signer.sign(plan_id, seq, head_hash, utc_now()).to_document())


@keys_router.get("/signing-key", response_model=SigningKeyOut, operation_id="get_signing_key", responses=problems(401, 422))
def signing_key(caller: CallerDep, state: StateDep) -> Response:
    """The public key that checks signed heads (Ed25519; raw 32 bytes in base64, and PEM)."""
    return json_response(state.signer.public_document())
