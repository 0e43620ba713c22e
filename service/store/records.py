"""The plain values the store hands out and takes in (frozen dataclasses, no ORM state)."""

from __future__ import annotations

import secrets
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any


@dataclass(frozen=True)
class PlanRecord:
    plan_id: str
    name: str
    currency: str
    policy: dict[str, Any]
    active_version: str | None
    created_at: datetime


@dataclass(frozen=True)
class KeyRecord:
    key_id: str
    plan_id: str | None
    role: str
    secret_hash: str
    created_at: datetime
    expires_at: datetime | None = None
    revoked_at: datetime | None = None

    def unusable_at(self, now: datetime) -> str | None:
        """Why the key may not be used at ``now`` ("revoked", "expired"), or None."""
        if self.revoked_at is not None and self.revoked_at <= now:
            return "revoked"
        if self.expires_at is not None and self.expires_at <= now:
            return "expired"
        return None


@dataclass(frozen=True)
class MixRecord:
    plan_id: str
    version: str
    content_hash: str
    inputs: dict[str, Any]
    solved: dict[str, Any]
    created_at: datetime


@dataclass(frozen=True)
class MixLifecycle:
    """One version's place in its plan's lifecycle: when and by which key it was published,
    activated and retired (None where that has not happened)."""

    version: str
    content_hash: str
    published_at: datetime
    published_by: str | None
    activated_at: datetime | None
    activated_by: str | None
    retired_at: datetime | None
    retired_by: str | None


@dataclass(frozen=True)
class IdempotencyCompletion:
    """What the writer stores into an Idempotency-Key reservation in the same transaction as
    the rows it guards, so that an answer is replayable exactly when it was logged."""

    plan_id: str
    key_id: str
    idempotency_key: str
    status_code: int
    response: str
    reserved_at: int  # the reservation this answer completes (unix seconds; see store.idempotency)
    expires_at: int  # until when the answer is replayed (unix seconds)


@dataclass(frozen=True)
class LogBatch:
    """Rows to append to one plan's chain, in order, in one transaction.

    ``created_at`` is ISO-8601 UTC text (e.g. "2026-12-01T21:42:52.123456Z") and is
    hashed exactly as given; ``bodies`` are canonical JSON texts, one per allocation.
    ``batch_id`` marks the rows of a LogStream's chunk (None for rows visible at once).
    """

    plan_id: str
    mix_version: str
    created_at: str
    allocation_ids: Sequence[str]
    member_ids: Sequence[str]
    bodies: Sequence[str]
    completes: IdempotencyCompletion | None = None
    batch_id: str | None = None

    def triples(self) -> Iterator[tuple[str, str, str]]:
        return zip(self.allocation_ids, self.member_ids, self.bodies, strict=True)

    def completion(self) -> IdempotencyCompletion | None:
        return self.completes


# States of a LogStream's batch (allocation_batches.state).
STAGED, VISIBLE, ABANDONED = "staged", "visible", "abandoned"


class LogStream:
    """A large batch whose rows arrive in chunks from another thread: all or nothing, without
    holding the log for the whole batch.

    The writer commits each chunk in a transaction of its own as it arrives, the rows marked
    with ``batch_id`` and chained like any others, and writes other requests' rows between
    chunks, so nobody waits for the whole batch. Reads do not see the rows until the batch is
    made visible, in one step, by the transaction that follows the last chunk (with its
    Idempotency-Key answer, if any). A batch that fails is marked abandoned: its rows stay in
    the chain, which never forgets, but no read returns them.

    The writer pulls: ``pull(timeout)`` returns the next (allocation_ids, member_ids, bodies), a
    ``Finished`` after the last rows, or None when nothing came within ``timeout``; it raises to
    abandon the batch. A producer quiet for ``wait_seconds`` abandons it too.
    """

    def __init__(
        self,
        plan_id: str,
        mix_version: str,
        created_at: str,
        size: int,
        *,
        pull: Callable[[float], Any],
        wait_seconds: float = 300.0,
    ) -> None:
        self.plan_id = plan_id
        self.mix_version = mix_version
        self.created_at = created_at
        self.size = size
        self.batch_id = f"ab_{secrets.token_hex(12)}"
        self._wait = wait_seconds
        self._pull = pull
        self._seen = 0
        self._last = time.monotonic()

    def next_chunk(self, timeout: float) -> LogBatch | Finished | None:
        """The next chunk as a LogBatch, the finish, or None if nothing came within ``timeout``.
        Raises the producer's error, or TimeoutError when the producer went quiet for too long."""
        chunk = self._pull(timeout)
        if chunk is None:
            if time.monotonic() - self._last > self._wait:
                raise TimeoutError(f"no rows for {self._wait} s; the batch is abandoned")
            return None
        self._last = time.monotonic()
        if isinstance(chunk, Finished):
            if self._seen != self.size:
                raise ValueError(f"stream finished after {self._seen} of {self.size} rows")
            return chunk
        ids, members, bodies = chunk
        for name, values in (("allocation_ids", ids), ("member_ids", members), ("bodies", bodies)):
            # One join per chunk finds a separator (or a non-string) in C, not row by row.
            if "\x1f" in "".join(values):
                raise ValueError(f"stream {name} contain the U+001F separator")
        self._seen += len(ids)
        if self._seen > self.size:
            raise ValueError(f"stream announced {self.size} rows and sent {self._seen}")
        if not len(ids) == len(members) == len(bodies):
            raise ValueError("a chunk's allocation_ids, member_ids and bodies must have one length")
        return LogBatch(self.plan_id, self.mix_version, self.created_at, ids, members, bodies, batch_id=self.batch_id)


@dataclass(frozen=True)
class BadRow:
    """The first link that fails verification; ``seq`` is None when no row can be named."""

    seq: int | None
    allocation_id: str | None
    reason: str


@dataclass(frozen=True)
class ChainReport:
    """Outcome of walking one plan's chain.

    ``checked`` counts the rows examined (up to and including the first bad one);
    ``head_hash`` is the hash of the last row that passed (GENESIS_HASH if none).
    """

    plan_id: str
    ok: bool
    checked: int
    head_hash: str
    first_bad: BadRow | None


@dataclass(frozen=True)
class Finished:
    completes: IdempotencyCompletion | None
