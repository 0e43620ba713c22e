"""Idempotency-Key handling for the allocation routes (draft-ietf-httpapi-idempotency-key-header).

- The key is scoped to the calling plan and API key; its fingerprint is the SHA-256 of the raw
  request body, so "the same request" means the same bytes.
- First use: the request reserves the key, and its answer is stored with its log rows in one
  transaction (the writer completes the reservation), so a retry gets exactly what was logged.
- Same key, same body, answer stored: the first answer again (`Mixline-Replay: true`), nothing
  new logged.
- Same key, same body, first request still running: 409 with Retry-After.
- Same key, another body: 422.
- A request that fails before anything is logged gives its reservation up, so a corrected
  retry is answered normally. A reservation without an answer is a lease of
  MIXLINE_IDEMPOTENCY_LEASE_SECONDS (60 by default): a process that crashed mid-request holds
  the key no longer, and the retry after it is answered as a new request. Stored answers are
  replayed for MIXLINE_IDEMPOTENCY_RETENTION_HOURS (24 by default), then replaced.
"""

from __future__ import annotations

import asyncio
import hashlib
import re
import time
from dataclasses import dataclass

from starlette.responses import Response

from service.store import IdempotencyCompletion, KeyRelease, KeyReservation

from .auth import Caller
from .errors import IDEMPOTENCY_KEY_PATTERN, IDEMPOTENCY_KEY_WORDS, ConflictError, ProblemError, Unprocessable
from .state import AppState

# Marks an answer that is a replay of the first one (our name; the capability is the draft's).
REPLAY_HEADER = "Mixline-Replay"

# The one pattern (errors.py): the OpenAPI declares it, and parse_key reads with it.
KEY_PATTERN = IDEMPOTENCY_KEY_PATTERN
_VALUE = re.compile(KEY_PATTERN)
HEADER_PARAMETER = {
    "name": "Idempotency-Key",
    "in": "header",
    "required": False,
    "description": 'Optional. A retry with the same key and body returns the first answer; e.g. "8e03-41a2" '
    f"({IDEMPOTENCY_KEY_WORDS})",
    "schema": {"type": "string", "pattern": KEY_PATTERN},
}


class BadIdempotencyKey(ProblemError):
    status, title, slug = 400, "Bad Idempotency-Key", "bad-idempotency-key"


@dataclass(frozen=True)
class Claim:
    plan_id: str
    key_id: str
    key: str
    reserved_at: int  # unix seconds: names this owner's reservation
    retention_seconds: int

    def completion(self, status_code: int, response: bytes | memoryview) -> IdempotencyCompletion:
        return IdempotencyCompletion(
            self.plan_id, self.key_id, self.key, status_code, str(response, "utf-8"),
            reserved_at=self.reserved_at, expires_at=int(time.time()) + self.retention_seconds,
        )


def parse_key(value: str | None) -> str | None:
    if value is None:
        return None
    match = _VALUE.fullmatch(value.strip())
    if match is None:
        raise BadIdempotencyKey(
            'Idempotency-Key must be a quoted string of 1 to 255 printable ASCII characters, e.g. "8e03-41a2"'
        )
    return match.group(1) or match.group(2)


async def claim(state: AppState, caller: Caller, plan_id: str, header: str | None, raw: bytes) -> Claim | Response | None:
    """None without a key; a Claim when this request owns the key; a Response to replay."""
    key = parse_key(header)
    if key is None:
        return None
    fingerprint = hashlib.sha256(raw).hexdigest()
    retention = state.settings.idempotency_retention_hours * 3600

    # The log writer runs the reservation in its next group transaction (see store.idempotency).
    now = int(time.time())
    operation = KeyReservation(
        plan_id, caller.key_id, key, fingerprint, now, state.settings.idempotency_lease_seconds
    )
    standing = await asyncio.wrap_future(state.db.writer.submit_key_operation(operation))
    if standing is None:
        return Claim(plan_id, caller.key_id, key, now, retention)
    if standing.fingerprint != fingerprint:
        raise Unprocessable(
            "Idempotency-Key was already used with another request body; use a new key for a new request",
            errors=[{"field": "Idempotency-Key", "reason": "reused with another request body"}],
        )
    if standing.state != "done" or standing.response is None or standing.status_code is None:
        raise ConflictError(
            "a request with this Idempotency-Key is still being processed; retry shortly",
            headers={"Retry-After": "1"},
        )
    return Response(standing.response.encode(), status_code=standing.status_code,
                    media_type="application/json", headers={REPLAY_HEADER: "true"})


async def give_up(state: AppState, owned: Claim) -> None:
    release = KeyRelease(owned.plan_id, owned.key_id, owned.key, owned.reserved_at)
    await asyncio.wrap_future(state.db.writer.submit_key_operation(release))
