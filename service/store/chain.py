"""The allocation log's hash chain: how a link's hash is made and how a chain is checked.

Each plan has its own chain. Row ``seq`` (1, 2, ...) stores ``prev_hash`` (the previous
row's ``row_hash``, GENESIS_HASH for seq 1) and ``row_hash`` = SHA-256 of the fields
joined by the unit separator U+001F. The writer refuses fields containing U+001F, so
a genuine link's text has exactly seven separators and splits back into its fields
one way only: text cannot be moved between fields without changing the hash.
"""

from __future__ import annotations

import hashlib
from typing import TYPE_CHECKING, Protocol

from sqlalchemy import select
from sqlalchemy.engine import Row
from sqlalchemy.orm import Session

from service.store.records import BadRow, ChainReport
from service.store.schema import Allocation, ChainHead

if TYPE_CHECKING:
    from contextlib import AbstractContextManager

GENESIS_HASH = "0" * 64
SEPARATOR = "\x1f"
_STREAM_CHUNK = 10_000


class _Readable(Protocol):
    def reading(self) -> AbstractContextManager[Session]: ...


def link_hash(
    prev_hash: str,
    plan_id: str,
    seq: int,
    allocation_id: str,
    member_id: str,
    mix_version: str,
    created_at: str,
    body: str,
) -> str:
    text = SEPARATOR.join(
        (prev_hash, plan_id, str(seq), allocation_id, member_id, mix_version, created_at, body)
    )
    return hashlib.sha256(text.encode()).hexdigest()


def verify_chain(db_or_session: Session | _Readable, plan_id: str) -> ChainReport:
    """Walk ``plan_id``'s chain in seq order and report the first bad row, if any.

    Given a Database, the walk runs in one ``reading()`` transaction, a consistent
    snapshot on both dialects, so appends committed meanwhile do not show up as
    tampering. A Session passed in is used as it is: on PostgreSQL it should be
    REPEATABLE READ (as ``reading()`` sessions are) if writers are active.
    """
    if isinstance(db_or_session, Session):
        return _verify(db_or_session, plan_id)
    with db_or_session.reading() as session:
        return _verify(session, plan_id)


def _verify(session: Session, plan_id: str) -> ChainReport:
    head = session.execute(
        select(ChainHead.last_seq, ChainHead.last_hash).where(ChainHead.plan_id == plan_id)
    ).one_or_none()
    head_seq, head_hash = (head.last_seq, head.last_hash) if head is not None else (0, GENESIS_HASH)

    rows = session.execute(
        select(
            Allocation.seq,
            Allocation.allocation_id,
            Allocation.member_id,
            Allocation.mix_version,
            Allocation.created_at,
            Allocation.body,
            Allocation.prev_hash,
            Allocation.row_hash,
        )
        .where(Allocation.plan_id == plan_id)
        .order_by(Allocation.seq, Allocation.id)
        .execution_options(yield_per=_STREAM_CHUNK)
    )
    expected_seq = 1
    prev_hash = GENESIS_HASH
    last_allocation_id: str | None = None
    checked = 0
    for row in rows:
        checked += 1
        reason = _fault(row, plan_id, expected_seq, prev_hash, head_seq)
        if reason is not None:
            rows.close()
            return ChainReport(
                plan_id, False, checked, prev_hash, BadRow(row.seq, row.allocation_id, reason)
            )
        prev_hash = row.row_hash
        last_allocation_id = row.allocation_id
        expected_seq += 1

    last_seq = expected_seq - 1
    bad: BadRow | None = None
    if last_seq < head_seq:
        bad = BadRow(
            last_seq + 1,
            None,
            f"rows {last_seq + 1}..{head_seq} missing: the chain head records last_seq "
            f"{head_seq} but the last row is seq {last_seq} (row removed from the end)",
        )
    elif prev_hash != head_hash:
        bad = BadRow(
            last_seq or None,
            last_allocation_id,
            f"chain head mismatch: the head records hash {head_hash[:12]}... for seq "
            f"{head_seq}, the last row's hash is {prev_hash[:12]}...",
        )
    return ChainReport(plan_id, bad is None, checked, prev_hash, bad)


def _fault(
    row: Row[tuple[int, str, str, str, str, str, str, str]],
    plan_id: str,
    expected_seq: int,
    prev_hash: str,
    head_seq: int,
) -> str | None:
    seq = row.seq
    if seq < expected_seq:
        return f"seq {seq} duplicated or out of order (expected {expected_seq})"
    if seq > expected_seq:
        return f"seq gap: expected {expected_seq}, found {seq} (row removed)"
    if row.prev_hash != prev_hash:
        return (
            f"prev_hash does not match the hash of seq {seq - 1} "
            "(row inserted, removed or reordered)"
        )
    text = SEPARATOR.join(
        (
            row.prev_hash,
            plan_id,
            str(seq),
            row.allocation_id,
            row.member_id,
            row.mix_version,
            row.created_at,
            row.body,
        )
    )
    if hashlib.sha256(text.encode()).hexdigest() != row.row_hash:
        return "row_hash does not match the row's content (row edited)"
    if seq > head_seq:
        return (
            f"seq {seq} is beyond the chain head (last_seq {head_seq}): "
            "row added outside the writer"
        )
    return None
