"""The life of a risky-mix version: published -> active -> retired, and which one allocations use.

A version is ``published`` once solved and stored, ``active`` while it is the plan's version in
force (at most one per plan), and ``retired`` for good once another version took its place or the
committee withdrew it unused. Allocations are made only against the active version. These are
the rules; the store applies them inside one locked transaction.

    AllocationError
    └── LifecycleConflict      the request clashes with a version's state (HTTP 409);
                               carries ``active_version`` so a caller can re-read and retry
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from enum import StrEnum

from .errors import AllocationError
from .requests import VERSION_PATTERN

# Path words under /mixes/ that a version name would shadow.
RESERVED_VERSION_NAMES = frozenset({"current", "estimate"})
_VERSION = re.compile(VERSION_PATTERN)


class MixState(StrEnum):
    PUBLISHED = "published"
    ACTIVE = "active"
    RETIRED = "retired"


class LifecycleConflict(AllocationError):
    def __init__(self, field: str, reason: str, *, active_version: str | None) -> None:
        super().__init__(field, reason)
        self.active_version = active_version


def check_version_name(version: str) -> None:
    """Refuse a name that is not a version name, or one of the path words beside versions."""
    if not _VERSION.fullmatch(version):
        raise AllocationError(
            "version",
            "a version name is 1-64 letters, digits, '.', '_' or '-', starting with a letter or digit",
        )
    if version.lower() in RESERVED_VERSION_NAMES:
        raise AllocationError(
            "version",
            f"{version!r} is reserved: it names a path beside the versions "
            f"({', '.join(sorted(RESERVED_VERSION_NAMES))})",
        )


def state_of(version: str, *, active_version: str | None, retired: bool) -> MixState:
    if retired:
        return MixState.RETIRED
    return MixState.ACTIVE if version == active_version else MixState.PUBLISHED


@dataclass(frozen=True)
class Activation:
    """What activating ``version`` does: nothing when it is already active, else it becomes
    active and ``retires`` (the version in force before, if any) is retired."""

    version: str
    changes: bool
    retires: str | None


def plan_activation(version: str, state: MixState, active_version: str | None) -> Activation:
    if state is MixState.RETIRED:
        raise LifecycleConflict(
            "version",
            f"{version!r} is retired and is never active again; publish a new version",
            active_version=active_version,
        )
    if state is MixState.ACTIVE:
        return Activation(version, changes=False, retires=None)
    return Activation(version, changes=True, retires=active_version)


def plan_retirement(version: str, state: MixState, active_version: str | None) -> bool:
    """True when ``version`` is to be retired now; False when it is retired already."""
    if state is MixState.ACTIVE:
        raise LifecycleConflict(
            "version",
            f"{version!r} is the only version in force; activate its successor, which retires it",
            active_version=active_version,
        )
    return state is MixState.PUBLISHED


def require_candidate(version: str, state: MixState, active_version: str | None) -> None:
    """A version whose impact is previewed must be one that can still be put in force."""
    if state is MixState.RETIRED:
        raise LifecycleConflict(
            "version", f"{version!r} is retired and is never active again; its impact is not previewed",
            active_version=active_version,
        )


def require_in_force(requested: str, active_version: str | None) -> None:
    """An allocation names the active version; any other is refused (the caller re-reads the
    current mix and retries)."""
    if requested == active_version:
        return
    if active_version is None:
        reason = f"{requested!r} is not in force: the plan has no active version yet"
    else:
        reason = f"{requested!r} is not in force; the active version is {active_version!r}"
    raise LifecycleConflict("mix_version", reason, active_version=active_version)
