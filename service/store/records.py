"""The plain values the store hands out and takes in (frozen dataclasses, no ORM state)."""

from __future__ import annotations

from collections.abc import Sequence
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
