"""Answering and logging allocations: the one path both allocation routes take.

A single POST is a batch of one: the body is read into an `AllocationRequest` (one member, or
the batch's members), the allocation pipeline decides every member at once, and the records go
to the log writer before any answer leaves. Small requests are one job for the writer (group-
committed with other requests); a large batch is streamed to it in chunks inside one
transaction, so that writing record text, hashing and the database's own work overlap.
"""

from __future__ import annotations

import asyncio
from datetime import UTC, datetime
from functools import partial
from typing import Any

import orjson
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from service.allocation import (
    AllocationIds,
    Allocations,
    answer_texts,
    allocate,
    decisions_from_record,
)
from service.allocation.issues import FieldIssue, MemberErrors, single_field
from service.allocation.requests import read_batch, read_single
from service.store import LogBatch, LogStream

from . import idempotency
from .auth import Caller
from .responses import raw_json_response
from .state import AppState

# Rows handed to the log writer at a time: big enough that each chunk is a few C calls, small
# enough that the writer starts inserting almost at once. Requests up to this size are one job.
CHUNK = 8192

allocation_ids = AllocationIds()


def utc_now_text() -> str:
    return datetime.now(UTC).isoformat(timespec="microseconds").replace("+00:00", "Z")


def _json(raw: bytes) -> Any:
    try:
        return orjson.loads(raw)
    except orjson.JSONDecodeError as error:
        issue = FieldIssue(0, "body", f"is not valid JSON: {error.msg} at character {error.pos}")
        raise MemberErrors([issue], single_field) from None


def prepare(state: AppState, plan_id: str, raw: bytes, *, batch: bool) -> Allocations:
    """Read, check and decide every member; nothing is written (a refused request logs nothing)."""
    plan = state.plan(plan_id)
    doc = _json(raw)
    request = read_batch(doc, state.settings.batch_limit) if batch else read_single(doc)
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


def answer_body(prepared: Allocations, *, batch: bool) -> bytes:
    if not batch:
        return prepared.answers(inline_disclosures=True)[0].encode()
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
        payload = answer_body(prepared, batch=True)
        stream.finish(None if owned is None else owned.completion(201, payload))
        return payload
    except BaseException as error:
        stream.fail(error)
        raise


async def allocate_and_log(
    state: AppState, caller: Caller, plan_id: str, raw: bytes, idempotency_key: str | None, *, batch: bool
) -> Response:
    caller.require(plan_id, "portal")
    work = partial(prepare, state, plan_id, raw, batch=batch)
    # A single member takes microseconds; a batch's reading and rules are CPU work off the loop.
    prepared = await run_in_threadpool(work) if batch else work()
    owned = await idempotency.claim(state, caller, plan_id, idempotency_key, raw)
    if isinstance(owned, Response):
        return owned
    ctx, d = prepared.context, prepared.decisions
    try:
        if prepared.size <= CHUNK:
            payload = answer_body(prepared, batch=batch)
            job = LogBatch(
                ctx.plan_id, ctx.mix_version, ctx.created_at, d.allocation_ids, d.member_ids, prepared.records(),
                None if owned is None else owned.completion(201, payload),
            )
            # The answer goes out only once its log rows are committed: no unlogged recommendation.
            await asyncio.wrap_future(state.db.writer.submit(job))
        else:
            stream = LogStream(ctx.plan_id, ctx.mix_version, ctx.created_at, prepared.size)
            committed = state.db.writer.submit_stream(stream)
            payload = await run_in_threadpool(_feed, prepared, stream, owned)
            await asyncio.wrap_future(committed)
    except BaseException:
        if owned is not None:
            await idempotency.give_up(state, owned)
        raise
    state.metrics.allocations.labels(plan_id).inc(prepared.size)
    headers = None if batch else {"Location": f"/v1/plans/{plan_id}/allocations/{d.allocation_ids[0]}"}
    return raw_json_response(payload, 201, headers=headers)


def rendered(state: AppState, plan_id: str, stored: str) -> bytes:
    """A logged record's answer, by the same renderer as at the time it was given."""
    record = orjson.loads(stored)
    ctx, d = decisions_from_record(record, state.mixes.view(plan_id, record["mix_version"]).codes)
    return answer_texts(ctx, d, inline_disclosures=True)[0].encode()
