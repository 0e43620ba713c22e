"""Deciding single requests: allocation ids, the time stamp, and singles decided together."""

from __future__ import annotations

import asyncio
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from service.allocation import (
    AllocationIds,
    Context,
    MemberErrors,
    MixView,
    Policy,
    Setting,
    allocate_each,
    single_field,
)

allocation_ids = AllocationIds()


def utc_now_text() -> str:
    return datetime.now(UTC).isoformat(timespec="microseconds").replace("+00:00", "Z")


@dataclass(frozen=True)
class Decided:
    """One single request's member, decided: what its log row and its answer need."""

    context: Context
    allocation_id: str
    member_id: str
    record: str
    answer: bytes


Waiting = list[tuple[Any, "asyncio.Future[Decided]"]]


class SinglesTogether:
    """Single requests that arrive together are decided together, as the rows of one call.

    Each request is still a batch of one of the same pipeline (`allocate_each` runs the very
    functions a batch runs, row by row independent of the other rows, which the differential
    test holds to the bit); deciding the requests waiting in one turn of the event loop in one
    call pays numpy's fixed cost per call once for all of them instead of once each. A member
    that cannot be answered fails its own request only.
    """

    def __init__(self) -> None:
        self._waiting: dict[tuple[str, str], tuple[str, Policy, MixView, Waiting]] = {}
        self._scheduled = False

    def decide(self, plan_id: str, currency: str, policy: Policy, view: MixView, member: Any) -> asyncio.Future[Decided]:
        loop = asyncio.get_running_loop()
        decided: asyncio.Future[Decided] = loop.create_future()
        self._waiting.setdefault((plan_id, view.version), (currency, policy, view, []))[3].append((member, decided))
        if not self._scheduled:
            self._scheduled = True
            # After the callbacks already due: the other requests read in this turn join in.
            loop.call_soon(self._decide_waiting)
        return decided

    def _decide_waiting(self) -> None:
        self._scheduled = False
        waiting, self._waiting = self._waiting, {}
        created_at = utc_now_text()
        for (plan_id, _), (currency, policy, view, entries) in waiting.items():
            try:
                done, rows, refused = allocate_each(
                    [member for member, _ in entries], Setting(plan_id, currency, policy, view, created_at),
                    new_ids=allocation_ids.block,
                )
                records = done.records()
                answers = done.answers(inline_disclosures=True)
            except Exception as error:
                for _, future in entries:
                    if not future.done():
                        future.set_exception(error)
                continue
            d = done.decisions
            for j, i in enumerate(rows):
                entries[i][1].set_result(Decided(
                    done.context, d.allocation_ids[j], d.member_ids[j], records[j], answers[j].encode()
                ))
            for i, issues in refused.items():
                entries[i][1].set_exception(MemberErrors(issues, single_field))
