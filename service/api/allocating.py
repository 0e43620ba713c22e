"""Answering and logging allocations: the steps around the pipeline, for single and batch.

Both go through the same pipeline (service.allocation.engine): a single request is a batch of
one, decided together with the other singles of the same event-loop turn (deciding.py); a batch
is decided in the batch process (batch_process.py). Either way the records reach the log writer
before any answer leaves: a single as one job, group-committed with other requests; a batch as
a LogStream, chunk by chunk, made visible in one step.
"""

from __future__ import annotations

import asyncio
from concurrent.futures import Future

import orjson
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from service.allocation import Setting, answer_texts, decisions_from_record, parse_json, read_single
from service.store import LogBatch, LogStream

from . import idempotency
from .auth import Caller
from .deciding import utc_now_text
from .responses import raw_json_response
from .state import AppState


async def allocate_one(
    state: AppState, caller: Caller, plan_id: str, raw: bytes, idempotency_key: str | None
) -> Response:
    caller.require(plan_id, "portal")
    plan = await state.plan_soon(plan_id)
    request = read_single(parse_json(raw))
    view = await state.view_in_force_soon(plan_id, request.mix_version)
    decided = await state.singles.decide(plan_id, plan.currency, plan.policy, view, request.members[0])
    owned = await idempotency.claim(state, caller, plan_id, idempotency_key, raw)
    if isinstance(owned, Response):
        return owned
    ctx = decided.context
    job = LogBatch(
        ctx.plan_id, ctx.mix_version, ctx.created_at, [decided.allocation_id], [decided.member_id],
        [decided.record], None if owned is None else owned.completion(201, decided.answer),
    )
    await _log(state, owned, state.db.writer.submit(job))
    state.metrics.allocations.labels(plan_id).inc()
    location = f"/v1/plans/{plan_id}/allocations/{decided.allocation_id}"
    return raw_json_response(decided.answer, 201, headers={"Location": location})


async def allocate_batch(
    state: AppState, caller: Caller, plan_id: str, raw: bytes, idempotency_key: str | None
) -> Response:
    caller.require(plan_id, "portal")
    plan = await state.plan_soon(plan_id)
    # Blocking steps of the conversation with the batch process run on worker threads; the
    # process does the Python work, so this one goes on serving other requests meanwhile.
    talk = await run_in_threadpool(state.batches.conversation)
    try:
        version = await run_in_threadpool(talk.read, raw, state.settings.batch_limit)
        view = await state.view_in_force_soon(plan_id, version)
        created_at = utc_now_text()
        on = Setting(plan_id, plan.currency, plan.policy, view.terms(), created_at)
        size = await run_in_threadpool(talk.decide, on)
        owned = await idempotency.claim(state, caller, plan_id, idempotency_key, raw)
        if isinstance(owned, Response):
            return owned
        claim = owned
        pull = talk.puller(lambda body: None if claim is None else claim.completion(201, body))
        stream = LogStream(plan_id, view.version, created_at, size, pull=pull)
        await _log(state, owned, state.db.writer.submit_stream(stream))
        payload = talk.body
    finally:
        talk.close()
    state.metrics.allocations.labels(plan_id).inc(size)
    return raw_json_response(payload, 201)


async def _log(state: AppState, owned: idempotency.Claim | None, committed: Future[None]) -> None:
    """Wait until the rows are committed: no answer leaves before its log rows exist."""
    try:
        await asyncio.wrap_future(committed)
    except BaseException:
        if owned is not None:
            await idempotency.give_up(state, owned)
        raise


def rendered(state: AppState, plan_id: str, stored: str) -> bytes:
    """A logged record's answer, by the same renderer as at the time it was given."""
    record = orjson.loads(stored)
    ctx, d = decisions_from_record(record, state.mixes.view(plan_id, record["mix_version"]).codes)
    return answer_texts(ctx, d, inline_disclosures=True)[0].encode()
