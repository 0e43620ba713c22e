"""The allocation log's hash chain: how a link's hash is made and how a chain is checked.

Each plan has its own chain. Row ``seq`` (1, 2, ...) stores ``prev_hash`` (the previous
row's ``row_hash``, GENESIS_HASH for seq 1) and ``row_hash`` = SHA-256 of the fields
joined by the unit separator U+001F. The writer refuses fields containing U+001F, so
a genuine link's text has exactly seven separators and splits back into its fields
one way only: text cannot be moved between fields without changing the hash.
"""

from __future__ import annotations

import hashlib
from typing import TYPE_CHECKING, Any, Protocol

from sqlalchemy import select
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
    # Core rows through the session's connection: the ORM's per-row work would cost
    # more than the hashing on a chain of a few hundred thousand rows.
    connection = session.connection()
    heads, log = ChainHead.__table__.c, Allocation.__table__.c
    head = connection.execute(
        select(heads.last_seq, heads.last_hash).where(heads.plan_id == plan_id)
    ).one_or_none()
    head_seq, head_hash = (head[0], head[1]) if head is not None else (0, GENESIS_HASH)

    rows = connection.execution_options(yield_per=_STREAM_CHUNK).execute(
        select(
            log.seq,
            log.allocation_id,
            log.member_id,
            log.mix_version,
            log.created_at,
            log.body,
            log.prev_hash,
            log.row_hash,
        )
        .where(log.plan_id == plan_id)
        .order_by(log.seq, log.id)
    )
    expected_seq = 1
    prev_hash = GENESIS_HASH
    last_allocation_id: str | None = None
    checked = 0
    with rows:
        for link in rows:
            fields: tuple[Any, ...] = tuple(link)
            seq, allocation_id, member_id, mix_version, created_at, body, stored_prev, row_hash = fields
            checked += 1
            if not (
                seq == expected_seq
                and stored_prev == prev_hash
                and seq <= head_seq
                and link_hash(
                    prev_hash, plan_id, seq, allocation_id, member_id, mix_version, created_at,
                    body,
                )
                == row_hash
            ):
                reason = _fault(fields, plan_id, expected_seq, prev_hash, head_seq)
                return ChainReport(
                    plan_id, False, checked, prev_hash, BadRow(seq, allocation_id, reason)
                )
            prev_hash = row_hash
            last_allocation_id = allocation_id
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
    link: tuple[Any, ...], plan_id: str, expected_seq: int, prev_hash: str, head_seq: int
) -> str:
    """Why ``link`` failed; the checks in the order that names the likeliest cause."""
    seq, allocation_id, member_id, mix_version, created_at, body, stored_prev, row_hash = link
    if seq < expected_seq:
        return f"seq {seq} duplicated or out of order (expected {expected_seq})"
    if seq > expected_seq:
        return f"seq gap: expected {expected_seq}, found {seq} (row removed)"
    if stored_prev != prev_hash:
        return (
            f"prev_hash does not match the hash of seq {seq - 1} "
            "(row inserted, removed or reordered)"
        )
    recomputed = link_hash(
        stored_prev, plan_id, seq, allocation_id, member_id, mix_version, created_at, body
    )
    if recomputed != row_hash:
        return "row_hash does not match the row's content (row edited)"
    return (
        f"seq {seq} is beyond the chain head (last_seq {head_seq}): row added outside the writer"
    )
