"""Answering and logging allocations: the one path both allocation routes take.

A single POST is a batch of one: the body is read into an `AllocationRequest` (one member, or
the batch's members), the allocation pipeline decides every member at once, and the records go
to the log writer before any answer leaves. Small requests are one job for the writer (group-
committed with other requests); a large batch is streamed to it in chunks inside one
transaction, so that writing record text, hashing and the database's own work overlap.
"""

from __future__ import annotations

import asyncio
from collections.abc import Awaitable
from concurrent.futures import Future
from typing import Any

import orjson
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from service.allocation import (
    Allocations,
    FieldIssue,
    MemberErrors,
    allocate,
    answer_texts,
    decisions_from_record,
    read_batch,
    read_single,
    single_field,
)
from service.store import LogBatch, LogStream

from . import idempotency
from .auth import Caller
from .responses import raw_json_response
from .deciding import allocation_ids, utc_now_text
from .state import AppState

# Rows handed to the log writer at a time: big enough that each chunk is a few C calls, small
# enough that the writer starts inserting almost at once. Requests up to this size are one job.
CHUNK = 8192

def _json(raw: bytes) -> Any:
    try:
        return orjson.loads(raw)
    except orjson.JSONDecodeError as error:
        issue = FieldIssue(0, "body", f"is not valid JSON: {error.msg} at character {error.pos}")
        raise MemberErrors([issue], single_field) from None


def prepare_batch(state: AppState, plan_id: str, raw: bytes) -> Allocations:
    """Read, check and decide every member of a batch; nothing is written (a refused batch logs nothing)."""
    plan = state.plan(plan_id)
    request = read_batch(_json(raw), state.settings.batch_limit)
    return allocate(
        request.members,
        plan_id=plan_id,
        currency=plan.currency,
        policy=plan.policy,
        view=state.mixes.view_in_force(plan_id, request.mix_version),
        created_at=utc_now_text(),
        new_ids=allocation_ids.block,
        locate=request.locate,
    )


def answer_body(prepared: Allocations) -> bytes:
    """A batch's answer: what all results share, then every member's result in order."""
    parts = [prepared.batch_head()]
    for start in range(0, prepared.size, CHUNK):
        texts = prepared.answers(slice(start, start + CHUNK), inline_disclosures=False)
        parts.append((("," if start else "") + ",".join(texts)).encode())
    parts.append(b"]}")
    return b"".join(parts)


def _feed(prepared: Allocations, stream: LogStream, owned: idempotency.Claim | None) -> bytes:
    """Put the records into the stream chunk by chunk, then build the answer (the writer inserts
    meanwhile: the driver releases the GIL inside the database calls)."""
    try:
        d = prepared.decisions
        for start in range(0, prepared.size, CHUNK):
            rows = slice(start, start + CHUNK)
            stream.put(d.allocation_ids[rows], d.member_ids[rows], prepared.records(rows))
        payload = answer_body(prepared)
        stream.finish(None if owned is None else owned.completion(201, payload))
        return payload
    except BaseException as error:
        stream.fail(error)
        raise


async def allocate_one(
    state: AppState, caller: Caller, plan_id: str, raw: bytes, idempotency_key: str | None
) -> Response:
    caller.require(plan_id, "portal")
    plan = state.plan(plan_id)
    request = read_single(_json(raw))
    view = state.mixes.view_in_force(plan_id, request.mix_version)
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
    prepared = await run_in_threadpool(prepare_batch, state, plan_id, raw)
    owned = await idempotency.claim(state, caller, plan_id, idempotency_key, raw)
    if isinstance(owned, Response):
        return owned
    ctx, d = prepared.context, prepared.decisions
    if prepared.size <= CHUNK:
        payload = answer_body(prepared)
        job = LogBatch(
            ctx.plan_id, ctx.mix_version, ctx.created_at, d.allocation_ids, d.member_ids, prepared.records(),
            None if owned is None else owned.completion(201, payload),
        )
        await _log(state, owned, state.db.writer.submit(job))
    else:
        stream = LogStream(ctx.plan_id, ctx.mix_version, ctx.created_at, prepared.size)
        payload = await _log(state, owned, state.db.writer.submit_stream(stream),
                             run_in_threadpool(_feed, prepared, stream, owned))
    state.metrics.allocations.labels(plan_id).inc(prepared.size)
    return raw_json_response(payload, 201)


async def _log(
    state: AppState, owned: idempotency.Claim | None, committed: Future[None], feeding: Awaitable[bytes] | None = None
) -> bytes:
    """Wait until the rows are committed: no answer leaves before its log rows exist."""
    try:
        payload = b"" if feeding is None else await feeding
        await asyncio.wrap_future(committed)
        return payload
    except BaseException:
        if owned is not None:
            await idempotency.give_up(state, owned)
        raise


def rendered(state: AppState, plan_id: str, stored: str) -> bytes:
    """A logged record's answer, by the same renderer as at the time it was given."""
    record = orjson.loads(stored)
    ctx, d = decisions_from_record(record, state.mixes.view(plan_id, record["mix_version"]).codes)
    return answer_texts(ctx, d, inline_disclosures=True)[0].encode()
