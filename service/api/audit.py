"""Audit (operator or committee): verify a plan's hash-chained allocation log."""

from __future__ import annotations

from fastapi import APIRouter
from starlette.responses import Response

from service.store import ChainReport, verify_chain

from .deps import CallerDep, StateDep
from .responses import AUTHED, json_response, problems
from .schemas import AuditOut

router = APIRouter(prefix="/v1/plans/{plan_id}/audit", tags=["audit"])


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
