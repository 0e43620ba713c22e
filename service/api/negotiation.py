"""Choosing a response's media type from the Accept header (RFC 9110 section 12.5.1)."""

from __future__ import annotations

from collections.abc import Sequence

from .errors import ProblemError


class NotAcceptable(ProblemError):
    status, title, slug = 406, "Not acceptable", "not-acceptable"


def _ranges(accept: str) -> list[tuple[str, float, int]]:
    out = []
    for position, part in enumerate(accept.split(",")):
        media, *params = (p.strip() for p in part.split(";"))
        if not media:
            continue
        q = 1.0
        for param in params:
            name, _, value = param.partition("=")
            if name.strip().lower() == "q":
                try:
                    q = float(value)
                except ValueError:
                    q = 0.0
        out.append((media.lower(), q, position))
    return out


def _matches(media_range: str, offered: str) -> int:
    """How specifically ``media_range`` matches ``offered``: 2 exact, 1 type/*, 0 */*, -1 not."""
    if media_range == offered:
        return 2
    kind = offered.split("/")[0]
    if media_range == f"{kind}/*":
        return 1
    return 0 if media_range == "*/*" else -1


def choose(accept: str | None, offered: Sequence[str]) -> str:
    """The offered type the client prefers most (the first offered on a tie or with no Accept);
    406 when none is acceptable."""
    if not accept or not accept.strip():
        return offered[0]
    ranges = _ranges(accept)
    best: tuple[float, int, int] | None = None
    chosen = None
    for rank, media in enumerate(offered):
        # The most specific range that matches decides this type's quality.
        matching = [(_matches(r, media), q, pos) for r, q, pos in ranges if _matches(r, media) >= 0]
        if not matching:
            continue
        specificity, q, _ = max(matching, key=lambda m: (m[0], -m[2]))
        if q <= 0.0:
            continue
        key = (q, specificity, -rank)
        if best is None or key > best:
            best, chosen = key, media
    if chosen is None:
        raise NotAcceptable(f"this resource is available as {', '.join(offered)}; the Accept header allows none of them")
    return chosen
