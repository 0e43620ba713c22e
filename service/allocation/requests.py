"""The two shapes of an allocation request, read into one: a mix version and a list of members.

A single request is one member object with its `mix_version`; a batch is
`{"mix_version", "members": [...]}`. Both become an `AllocationRequest` whose members go through
the same pipeline; only the way a field is named in an error differs (`locate`).
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import orjson

from .errors import AllocationError
from .issues import FieldIssue, MemberErrors, batch_field, single_field

# Names of published versions (and plans): letters, digits and . _ - , a letter or digit first.
VERSION_PATTERN = r"[A-Za-z0-9][A-Za-z0-9._\-]{0,63}"
_VERSION = re.compile(VERSION_PATTERN)
_BATCH_FIELDS = frozenset({"mix_version", "members"})


class TooManyMembers(AllocationError):
    """More members than the service answers in one call."""


@dataclass(frozen=True)
class AllocationRequest:
    mix_version: str
    members: list[Any]
    locate: Callable[[int, str], str]


def parse_json(raw: bytes) -> Any:
    """A request body as JSON values (orjson refuses NaN and Infinity literals)."""
    try:
        return orjson.loads(raw)
    except orjson.JSONDecodeError as error:
        issue = FieldIssue(0, "body", f"is not valid JSON: {error.msg} at character {error.pos}")
        raise MemberErrors([issue], single_field) from None


def _version(doc: dict[str, Any]) -> list[FieldIssue]:
    version = doc.get("mix_version")
    if version is None:
        return [FieldIssue(0, "mix_version", "required: the published mix version the split is made with")]
    if type(version) is not str or not _VERSION.fullmatch(version):
        return [FieldIssue(0, "mix_version", "must be a version name: a letter or digit, then up to 63 letters, digits, '.', '_' or '-'")]
    return []


def read_single(doc: Any) -> AllocationRequest:
    if type(doc) is not dict:
        raise MemberErrors([FieldIssue(0, "", "must be a JSON object: one member with its mix_version")], single_field)
    issues = _version(doc)
    if issues:
        raise MemberErrors(issues, single_field)
    member = {k: v for k, v in doc.items() if k != "mix_version"}
    return AllocationRequest(doc["mix_version"], [member], single_field)


def read_batch(doc: Any, limit: int) -> AllocationRequest:
    top = single_field
    if type(doc) is not dict:
        raise MemberErrors([FieldIssue(0, "", "must be a JSON object with mix_version and members")], top)
    issues = [FieldIssue(0, k, "is not a field of a batch (mix_version, members)") for k in sorted(doc.keys() - _BATCH_FIELDS)]
    issues += _version(doc)
    members = doc.get("members")
    if type(members) is not list or not members:
        issues.append(FieldIssue(0, "members", "must be a non-empty list of members"))
    if issues:
        raise MemberErrors(issues, top)
    assert isinstance(members, list)
    if len(members) > limit:
        raise TooManyMembers("members", f"{len(members)} members in one batch; the limit is {limit}")
    return AllocationRequest(doc["mix_version"], members, batch_field)
