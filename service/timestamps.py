"""The one way mixline writes a time: RFC 3339, UTC, microseconds, a literal Z.

Allocation records carry the same form ("2026-12-01T21:42:52.123456Z"); plans, keys, signed
audit heads and log lines use this function, so a client parses one format everywhere.
"""

from __future__ import annotations

from datetime import UTC, datetime


def rfc3339(moment: datetime) -> str:
    if moment.tzinfo is None:
        raise ValueError(f"naive datetime {moment!r}: only timezone-aware times are written")
    return moment.astimezone(UTC).isoformat(timespec="microseconds").replace("+00:00", "Z")


def parse_rfc3339(text: str) -> datetime:
    """The inverse of rfc3339 (any offset accepted, returned in UTC)."""
    moment = datetime.fromisoformat(text)  # Python 3.11 reads a trailing Z
    if moment.tzinfo is None:
        raise ValueError(f"{text!r} has no time zone")
    return moment.astimezone(UTC)


def utc_now() -> datetime:
    return datetime.now(UTC)
