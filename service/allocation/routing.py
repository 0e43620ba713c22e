"""Directing a new contribution so the account gets as close to its target split as it can without selling."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class ContributionSplit:
    risky: int
    safe: int


def route_contribution(risky_held: int, contribution: int, risky_target: int) -> ContributionSplit:
    """All units are minor units. The risky side gets what it lacks, within [0, contribution]:
    when the gap is larger than the contribution all of it goes to one side."""
    to_risky = min(max(risky_target - risky_held, 0), contribution)
    return ContributionSplit(to_risky, contribution - to_risky)
