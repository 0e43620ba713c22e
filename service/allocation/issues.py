"""What is wrong with which member: the one way the allocation pipeline reports bad input.

    AllocationError(ValueError)   (errors.py) one field of a plan or mix that cannot be used
    MemberErrors(AllocationError) every bad member of a request, each as a FieldIssue

A single request is a batch of one, so both report through `MemberErrors`; the field is named
as the caller wrote it: `preference.risk_aversion` for a single request,
`members[3].preference.risk_aversion` in a batch.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from dataclasses import dataclass

from .errors import AllocationError

# A 300,000-member file with a systematic mistake would otherwise answer with 300,000 entries.
MAX_LISTED = 1000


@dataclass(frozen=True, order=True)
class FieldIssue:
    index: int  # the member's position in the request
    field: str  # relative to the member, e.g. "preference.risk_aversion" ("" = the member itself)
    reason: str


class MemberErrors(AllocationError):
    """Every bad member of a request: `issues` lists up to MAX_LISTED, `count` says how many in all."""

    def __init__(
        self, issues: Iterable[FieldIssue], locate: Callable[[int, str], str], *, counted: tuple[int, int] | None = None
    ) -> None:
        ordered = sorted(issues)
        self.issues = ordered
        # `counted` (issues, members) when `issues` is already a listed part of a longer list.
        self.count, self.members = counted or (len(ordered), len({i.index for i in ordered}))
        self.listed = [(locate(i.index, i.field), i.reason) for i in ordered[:MAX_LISTED]]
        field, reason = self.listed[0]
        super().__init__(field, reason)


def single_field(index: int, field: str) -> str:
    return field or "body"


def batch_field(index: int, field: str) -> str:
    return f"members[{index}].{field}" if field else f"members[{index}]"
