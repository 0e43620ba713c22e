"""POST .../allocations/batch: a whole membership in one call, all or nothing.

The body is read into columns, every member validated and answered with numpy, and every record
written to the plan's chain by the log writer in one transaction; a bad member fails the call with
a 422 naming its index and field before anything is written. The answer lists results in the
members' order.
"""

from __future__ import annotations

import asyncio
from dataclasses import dataclass

import numpy as np
import orjson
from fastapi import APIRouter, Request
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from service.allocation import disclosures_for, line_for
from service.allocation.batch import LIMIT_NAMES, BatchResult, allocate
from service.allocation.batch_records import BatchContext, money_texts, numbers, record_texts
from service.store import LogStream

from . import idempotency
from .allocating import new_allocation_id, utc_now_text
from .batch_members import BatchRequest, read_batch
from .bodies import request_body_schema
from .deps import CallerDep, StateDep
from .responses import AUTHED, problems, raw_json_response
from .schemas import BatchOut
from .state import AppState, PlanView

router = APIRouter(prefix="/v1/plans/{plan_id}/allocations", tags=["allocations"])


# Rows handed to the log writer at a time: big enough that each chunk is a few C calls, small
# enough that the writer starts inserting almost at once.
CHUNK = 8192


@dataclass(frozen=True)
class PreparedBatch:
    context: BatchContext
    request: BatchRequest
    result: BatchResult
    allocation_ids: list[str]


def prepare(state: AppState, plan: PlanView, raw: bytes) -> PreparedBatch:
    """Read, validate and answer every member; nothing is written yet (all or nothing)."""
    request = read_batch(raw, plan.currency, state.settings.batch_limit)
    view = state.mixes.view_in_force(plan.plan_id, request.mix_version)
    result = allocate(request.columns, line_for(view, plan.policy), plan.policy, view.weights)
    context = BatchContext(plan.plan_id, view.version, view.content_hash, utc_now_text(), plan.currency)
    return PreparedBatch(context, request, result, new_allocation_id.block(request.columns.size))


def feed(prepared: PreparedBatch, stream: LogStream, owned: idempotency.Claim | None) -> bytes:
    """Write the records chunk by chunk into the stream, then build the answer.

    Runs while the writer inserts what it was given, so that record text, hashing and the
    database's own work overlap (the driver releases the GIL inside the database calls).
    """
    try:
        ctx, request, result = prepared.context, prepared.request, prepared.result
        n = request.columns.size
        for start in range(0, n, CHUNK):
            rows = slice(start, min(start + CHUNK, n))
            ids, members = prepared.allocation_ids[rows], request.member_ids[rows]
            texts = record_texts(ctx, ids, members, request.columns.subset(rows), result.subset(rows))  # type: ignore[arg-type]
            stream.put(ids, members, texts)
        payload = answer(prepared)
        stream.finish(None if owned is None else owned.completion(201, payload))
        return payload
    except BaseException as error:
        stream.fail(error)
        raise


def answer(prepared: PreparedBatch) -> bytes:
    ctx, result, request = prepared.context, prepared.result, prepared.request
    allocation_ids = prepared.allocation_ids
    risky = money_texts(result.risky, ctx.currency)
    safe = money_texts(result.safe, ctx.currency)
    y = numbers(result.risky_fraction)
    unconstrained = numbers(result.unconstrained)
    limited = [orjson.dumps(n).decode() for n in LIMIT_NAMES]
    routed = [""] * len(y)
    if result.to_risky is not None and result.to_safe is not None:
        to_r, to_s = money_texts(result.to_risky, ctx.currency), money_texts(result.to_safe, ctx.currency)
        held = request.columns.risky_held
        assert held is not None
        for i in np.flatnonzero(held >= 0).tolist():
            routed[i] = f',"contribution_split":{{"risky":"{to_r[i]}","safe":"{to_s[i]}"}}'
    rows = [
        f'{{"allocation_id":"{a}","member_id":"{m}","risky_fraction":{f},"unconstrained_risky_fraction":{u},'
        f'"limited_by":{lb},"amounts":{{"risky":"{r}","safe":"{sf}"}}{c}}}'
        for a, m, f, u, lb, r, sf, c in zip(
            allocation_ids, request.member_ids, y, unconstrained,
            [limited[c] for c in result.limited.tolist()], risky, safe, routed, strict=True,
        )
    ]
    head = orjson.dumps({
        "plan_id": ctx.plan_id,
        "mix_version": ctx.mix_version,
        "mix_content_hash": ctx.mix_content_hash,
        "created_at": ctx.created_at,
        "count": len(rows),
        # Shown once for the whole batch; a member with y > 1 also gets the borrowing text.
        "disclosures": disclosures_for(float(result.risky_fraction.max(initial=0.0))),
    })
    return head[:-1] + b',"results":[' + ",".join(rows).encode() + b"]}"


@router.post(
    "/batch", status_code=201, response_model=BatchOut, operation_id="create_allocation_batch",
    responses=problems(400, *AUTHED, 409, 413), openapi_extra=request_body_schema("BatchIn"),
)
async def create_batch(
    plan_id: str, request: Request, caller: CallerDep, state: StateDep, idempotency_key: idempotency.KeyHeader = None
) -> Response:
    caller.require(plan_id, "portal")
    plan = state.plan(plan_id)
    raw = await request.body()
    prepared = await run_in_threadpool(prepare, state, plan, raw)
    owned = await idempotency.claim(state, caller, plan_id, idempotency_key, raw)
    if isinstance(owned, Response):
        return owned
    try:
        ctx = prepared.context
        stream = LogStream(ctx.plan_id, ctx.mix_version, ctx.created_at, prepared.request.columns.size)
        committed = state.db.writer.submit_stream(stream)
        payload = await run_in_threadpool(feed, prepared, stream, owned)
        # The answer goes out only after every member's record is committed.
        await asyncio.wrap_future(committed)
    except BaseException:
        if owned is not None:
            await idempotency.give_up(state, owned)
        raise
    state.metrics.allocations.labels(plan_id).inc(prepared.result.risky.size)
    return raw_json_response(payload, 201)
