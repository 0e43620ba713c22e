"""The loop of the process that decides record-keepers' batches apart from the serving one.

Started by the API layer (service.api.batch_process, whose docstring draws the conversation);
it runs the same pipeline as every request (`allocate`) and sends back records and the answer.
It knows nothing of HTTP or databases: only a pipe.
"""

from __future__ import annotations

import gc
import os
import traceback
from collections.abc import Callable
from dataclasses import dataclass
from multiprocessing.connection import Connection
from typing import Any

from .engine import allocate
from .errors import AllocationError
from .identifiers import AllocationIds
from .issues import MAX_LISTED, MemberErrors, batch_field, single_field
from .requests import TooManyMembers, parse_json, read_batch

# Rows per chunk handed back, and so to the log writer: each is one short transaction there,
# so a portal's request waits for at most one of them.
STREAM_CHUNK = 1024
BATCH_NICENESS = 10

Locate = Callable[[int, str], str]
_LOCATE: dict[str, Locate] = {"single": single_field, "batch": batch_field}


@dataclass(frozen=True)
class Refusal:
    """A refused batch as it crosses the pipe (exceptions with custom arguments do not pickle)."""

    kind: str  # "members" | "too_many" | "field" | "failed"
    issues: tuple[Any, ...] = ()
    locate: str = "batch"
    counted: tuple[int, int] = (0, 0)
    field: str = ""
    reason: str = ""

    @classmethod
    def of(cls, error: BaseException) -> Refusal:
        if isinstance(error, MemberErrors):
            locate = "batch" if any(f.startswith("members[") for f, _ in error.listed) else "single"
            return cls("members", tuple(error.issues[:MAX_LISTED]), locate, (error.count, error.members))
        if isinstance(error, TooManyMembers | AllocationError) and not isinstance(error, MemberErrors):
            kind = "too_many" if isinstance(error, TooManyMembers) else "field"
            return cls(kind, field=error.field, reason=error.reason)
        return cls("failed", reason="".join(traceback.format_exception(error)))

    def error(self) -> BaseException:
        if self.kind == "members":
            return MemberErrors(self.issues, _LOCATE[self.locate], counted=self.counted)
        if self.kind == "too_many":
            return TooManyMembers(self.field, self.reason)
        if self.kind == "field":
            return AllocationError(self.field, self.reason)
        return RuntimeError(f"the batch process failed:\n{self.reason}")


def serve_batches(conn: Connection) -> None:
    """The child's loop: one batch conversation after another until the pipe closes."""
    ids = AllocationIds()  # a stem of its own: unique beside the parent's and other replicas'
    # Below the serving process in the scheduler: when both want a core, portals' requests go
    # first and the batch takes a little longer (it runs at full speed on an idle machine).
    os.nice(BATCH_NICENESS)
    # 300,000 members are a few million objects made at once, all alive until the batch ends:
    # the cyclic collector would walk them again and again (it tripled the time of reading the
    # body). Nothing here makes reference cycles that outlive a batch; one collection after each.
    gc.disable()
    while True:
        try:
            message = conn.recv()
        except EOFError:
            return
        if message[0] != "read":
            continue
        raw = conn.recv_bytes()
        try:
            request = read_batch(parse_json(raw), message[1])
        except Exception as error:
            conn.send(("refused", Refusal.of(error)))
            continue
        del raw
        conn.send(("version", request.mix_version))
        message = conn.recv()
        if message[0] != "decide":
            continue
        try:
            prepared = allocate(request.members, message[1], new_ids=ids.block, locate=request.locate)
        except Exception as error:
            conn.send(("refused", Refusal.of(error)))
            continue
        del request
        conn.send(("decided", prepared.size))
        if conn.recv()[0] != "write":
            continue
        try:
            d = prepared.decisions
            conn.send(("head", prepared.batch_head()))
            for start in range(0, prepared.size, STREAM_CHUNK):
                rows = slice(start, start + STREAM_CHUNK)
                # Each chunk's answers travel with its records, so that the answer is assembled
                # while the log writer inserts, not rendered and copied after the last row.
                results = ",".join(prepared.answers(rows, inline_disclosures=False)).encode()
                conn.send(("rows", list(d.allocation_ids[rows]), list(d.member_ids[rows]), prepared.records(rows), results))
        except Exception as error:
            conn.send(("refused", Refusal.of(error)))
            continue
        conn.send(("done",))
        del prepared
        gc.collect()


