"""One member through the pipeline's own rule functions, for tests that check the rules' figures.

Nothing is reimplemented here: the member is read by `read_members`, checked by
`check_preferences`, and its y comes from `wanted_fractions` and `bound_by_policy`, exactly as
in `engine.allocate`; this only unpacks the one row.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from service.allocation import AllocationLine, MemberErrors, Policy, read_members, single_field
from service.allocation.preferences import LIMIT_NAMES, bound_by_policy, check_preferences, wanted_fractions


@dataclass(frozen=True)
class Choice:
    risky_fraction: float
    unconstrained_risky_fraction: float | None
    limited_by: str | None


def choose(preference: dict[str, Any], line: AllocationLine, policy: Policy) -> Choice:
    members, issues = read_members([{"member_id": "m", "amount": "1.00", "preference": preference}], "USD")
    issues += check_preferences(members.preferences, policy)
    if issues:
        raise MemberErrors(issues, single_field)
    wanted, _, impossible = wanted_fractions(members.preferences, line, policy)
    if impossible:
        raise MemberErrors(impossible, single_field)
    f = bound_by_policy(wanted, policy)
    u = float(f.unconstrained[0])
    return Choice(float(f.risky_fraction[0]), None if math.isnan(u) else u, LIMIT_NAMES[int(f.limited[0])])


def aversion(a: float) -> dict[str, Any]:
    return {"risk_aversion": a}


def target(s: float) -> dict[str, Any]:
    return {"target_volatility": s}


def loss_tolerance(max_loss: float, confidence: float, horizon_years: float = 1.0) -> dict[str, Any]:
    return {"max_loss": max_loss, "confidence": confidence, "horizon_years": horizon_years}


def score(k: int) -> dict[str, Any]:
    return {"risk_score": k}
