"""What a candidate mix version would do to the plan's members, before anyone activates it.

Each member's latest logged allocation is taken as their request (the same preference, the same
money), recomputed under the candidate by the allocation pipeline's own rules (`decide`), and
compared with what was logged. Nothing is logged. Members are read straight from their records
into columns: the records were checked when they were logged, and 300,000 of them must not go
through JSON again.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .engine import Setting, decide_apart
from .issues import FieldIssue
from .members import NOT_HELD, Members
from .preferences import LIMIT_NAMES, PreferenceColumns
from .records import preference_of_record

# The largest moves shown by member (the distribution covers everyone).
LARGEST_MOVES = 10


def members_from_records(records: Sequence[Mapping[str, Any]]) -> tuple[Members, NDArray[np.float64], list[str | None]]:
    """The members the records were made for, their logged risky fractions and bounds. Holdings
    by asset are left out: trades are not part of what a version changes for a member."""
    n = len(records)
    kind = np.zeros(n, dtype=np.int8)
    value, confidence, horizon, years = np.zeros(n), np.zeros(n), np.ones(n), np.full(n, np.nan)
    total = np.zeros(n, dtype=np.int64)
    held_risky = np.full(n, NOT_HELD, dtype=np.int64)
    held_safe = np.full(n, NOT_HELD, dtype=np.int64)
    contribution = np.zeros(n, dtype=np.int64)
    income = np.full(n, NOT_HELD, dtype=np.int64)
    growth = np.zeros(n)
    logged = np.zeros(n)
    bounds: list[str | None] = [None] * n
    for i, r in enumerate(records):
        kind[i], value[i], confidence[i], horizon[i] = preference_of_record(r["preference"])
        if "years_to_retirement" in r:
            years[i] = r["years_to_retirement"]
        if "income" in r:
            income[i], growth[i] = r["income"]["annual_minor"], r["income"]["growth"]
        total[i] = r["amount_minor"]
        if "holdings_minor" in r:
            held_risky[i], held_safe[i] = r["holdings_minor"]
            contribution[i] = r["contribution_minor"]
        logged[i] = r["risky_fraction"]
        bounds[i] = r["limited_by"]
    members = Members(
        [r["member_id"] for r in records], PreferenceColumns(kind, value, confidence, horizon, years),
        total, held_risky, held_safe, contribution, income, growth,
    )
    return members, logged, bounds


@dataclass(frozen=True)
class Impact:
    members: int
    change: NDArray[np.float64]  # after - before, per member recomputed
    before: NDArray[np.float64]
    after: NDArray[np.float64]
    member_ids: list[str]
    limited_before: dict[str, int]
    limited_after: dict[str, int]
    refused: int  # members no risky fraction satisfies under the candidate (a loss bound)

    def document(self) -> dict[str, Any]:
        c = self.change
        if c.size:
            p05, p50, p95 = np.percentile(c, [5, 50, 95]).tolist()
            summary = {"mean": float(c.mean()), "p05": p05, "p50": p50, "p95": p95, "max_abs": float(np.abs(c).max())}
        else:
            summary = {"mean": 0.0, "p05": 0.0, "p50": 0.0, "p95": 0.0, "max_abs": 0.0}
        top = np.argsort(-np.abs(c), kind="stable")[:LARGEST_MOVES].tolist()
        return {
            "members": self.members,
            "risky_fraction_change": summary,
            "limited_by": {"before": self.limited_before, "after": self.limited_after},
            "largest_moves": [
                {"member_id": self.member_ids[i], "before": float(self.before[i]), "after": float(self.after[i])}
                for i in top
            ],
            "refused_under_candidate": self.refused,
        }


#: The keys of the impact summary's bound counts: "none" for members no bound limited.
LIMIT_COUNT_KEYS = ("none", *(n for n in LIMIT_NAMES if n))


def _counts(bounds: Sequence[str | None]) -> dict[str, int]:
    names = [name or "none" for name in bounds]
    return {name: names.count(name) for name in LIMIT_COUNT_KEYS}


def impact(records: Sequence[Mapping[str, Any]], candidate: Setting) -> Impact:
    """Every record's request recomputed under `candidate` (its view, the plan's policy)."""
    members, before, logged_bounds = members_from_records(records)
    # A loss bound the candidate's line cannot meet at all: counted, left out of the moves.
    refused: dict[int, list[FieldIssue]] = {}
    d, keep = decide_apart(members, candidate, lambda n: [""] * n, refused)
    kept_before = before[keep]
    after_bounds = [LIMIT_NAMES[c] for c in d.limited.tolist()]
    return Impact(
        members=members.size,
        change=d.risky_fraction - kept_before,
        before=kept_before,
        after=d.risky_fraction,
        member_ids=list(d.member_ids),
        limited_before=_counts([logged_bounds[i] for i in keep]),
        limited_after=_counts(after_bounds),
        refused=len(refused),
    )
