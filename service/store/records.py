"""The plain values the store hands out and takes in (frozen dataclasses, no ORM state)."""

from __future__ import annotations

import queue
from collections.abc import Iterator, Sequence
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


@dataclass(frozen=True)
class LogBatch:
    """Rows to append to one plan's chain, in order.

    ``created_at`` is ISO-8601 UTC text (e.g. "2026-12-01T21:42:52.123456Z") and is
    hashed exactly as given; ``bodies`` are canonical JSON texts, one per allocation.
    """

    plan_id: str
    mix_version: str
    created_at: str
    allocation_ids: Sequence[str]
    member_ids: Sequence[str]
    bodies: Sequence[str]
    completes: IdempotencyCompletion | None = None

    def triples(self) -> Iterator[tuple[str, str, str]]:
        return zip(self.allocation_ids, self.member_ids, self.bodies, strict=True)

    def completion(self) -> IdempotencyCompletion | None:
        return self.completes


class LogStream:
    """A batch whose rows arrive in chunks from another thread while the writer inserts them.

    The producer calls ``put`` until ``size`` rows were given, or ``fail`` to abandon the batch
    (the writer then rolls back: nothing of it is logged). The writer gives each stream a
    transaction of its own. Chunks are checked for the field separator as they arrive.
    """

    def __init__(self, plan_id: str, mix_version: str, created_at: str, size: int, *, wait_seconds: float = 300.0) -> None:
        self.plan_id = plan_id
        self.mix_version = mix_version
        self.created_at = created_at
        self.size = size
        self._wait = wait_seconds
        self._chunks: queue.SimpleQueue[Any] = queue.SimpleQueue()

    def put(self, allocation_ids: Sequence[str], member_ids: Sequence[str], bodies: Sequence[str]) -> None:
        if not len(allocation_ids) == len(member_ids) == len(bodies):
            raise ValueError("a chunk's allocation_ids, member_ids and bodies must have one length")
        self._chunks.put((allocation_ids, member_ids, bodies))

    def fail(self, error: BaseException) -> None:
        self._chunks.put(error)

    def finish(self, completes: IdempotencyCompletion | None = None) -> None:
        """After the last rows: the writer commits once this arrives (with what it completes)."""
        self._chunks.put(_Finish(completes))

    def completion(self) -> IdempotencyCompletion | None:
        """Blocks until the producer finished; called by the writer after the last row."""
        chunk = self._next()
        if isinstance(chunk, _Finish):
            return chunk.completes
        raise ValueError(f"stream sent more than the {self.size} rows it announced")

    def _next(self) -> Any:
        try:
            chunk = self._chunks.get(timeout=self._wait)
        except queue.Empty:
            raise TimeoutError(f"no rows for {self._wait} s; the batch is abandoned") from None
        if isinstance(chunk, BaseException):
            raise chunk
        return chunk

    def triples(self) -> Iterator[tuple[str, str, str]]:
        seen = 0
        while seen < self.size:
            chunk = self._next()
            if isinstance(chunk, _Finish):
                raise ValueError(f"stream finished after {seen} of {self.size} rows")
            ids, members, bodies = chunk
            for name, values in (("allocation_ids", ids), ("member_ids", members), ("bodies", bodies)):
                # One join per chunk finds a separator (or a non-string) in C, not row by row.
                if "\x1f" in "".join(values):
                    raise ValueError(f"stream {name} contain the U+001F separator")
            seen += len(ids)
            if seen > self.size:
                raise ValueError(f"stream announced {self.size} rows and sent {seen}")
            yield from zip(ids, members, bodies, strict=True)


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
class _Finish:
    completes: IdempotencyCompletion | None
