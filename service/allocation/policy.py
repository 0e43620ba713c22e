"""A plan's allocation policy: the band for the risky fraction, borrowing, and its risk-score table."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from .errors import AllocationError

# A plan may allow leverage, but a cap beyond 3x the account is not a retirement product.
MAX_RISKY_FRACTION_CEILING = 3.0
# Risk aversion beyond this puts almost nothing in the risky mix; larger values are typos.
MAX_RISK_AVERSION = 1000.0


@dataclass(frozen=True)
class Policy:
    min_risky_fraction: float = 0.0
    max_risky_fraction: float = 1.0
    borrowing_rate: float | None = None
    risk_score_table: Mapping[int, float] = field(default_factory=dict)

    @property
    def allows_borrowing(self) -> bool:
        return self.max_risky_fraction > 1.0

    def to_document(self) -> dict[str, Any]:
        return {
            "min_risky_fraction": self.min_risky_fraction,
            "max_risky_fraction": self.max_risky_fraction,
            "borrowing_rate": self.borrowing_rate,
            "risk_score_table": {str(k): v for k, v in sorted(self.risk_score_table.items())},
        }

    @classmethod
    def from_document(cls, doc: Mapping[str, Any]) -> Policy:
        table = doc.get("risk_score_table") or {}
        return cls(
            min_risky_fraction=float(doc.get("min_risky_fraction", 0.0)),
            max_risky_fraction=float(doc.get("max_risky_fraction", 1.0)),
            borrowing_rate=None if doc.get("borrowing_rate") is None else float(doc["borrowing_rate"]),
            risk_score_table={int(k): float(v) for k, v in table.items()},
        )


def _finite(name: str, value: float) -> float:
    if not math.isfinite(value):
        raise AllocationError(name, f"must be a finite number, got {value!r}")
    return value


def build_policy(
    *,
    min_risky_fraction: float = 0.0,
    max_risky_fraction: float = 1.0,
    borrowing_rate: float | None = None,
    risk_score_table: Mapping[str, float] | None = None,
) -> Policy:
    """Validate a policy as a plan's operator states it; field names are the request's."""
    lo = _finite("policy.min_risky_fraction", min_risky_fraction)
    hi = _finite("policy.max_risky_fraction", max_risky_fraction)
    if lo < 0.0:
        raise AllocationError("policy.min_risky_fraction", f"must be >= 0, got {lo}")
    if hi < lo:
        raise AllocationError(
            "policy.max_risky_fraction", f"{hi} is below min_risky_fraction {lo}"
        )
    if hi > MAX_RISKY_FRACTION_CEILING:
        raise AllocationError(
            "policy.max_risky_fraction",
            f"{hi} is above the ceiling {MAX_RISKY_FRACTION_CEILING} this service accepts",
        )
    if borrowing_rate is not None:
        _finite("policy.borrowing_rate", borrowing_rate)
        if not -1.0 < borrowing_rate < 1.0:
            raise AllocationError(
                "policy.borrowing_rate", f"{borrowing_rate} is not an annual rate in (-1, 1)"
            )
    if hi > 1.0 and borrowing_rate is None:
        raise AllocationError(
            "policy.borrowing_rate",
            f"required when max_risky_fraction ({hi}) is above 1: borrowing has a price",
        )
    table: dict[int, float] = {}
    for key, aversion in (risk_score_table or {}).items():
        name = f"policy.risk_score_table.{key}"
        try:
            score = int(key)
        except ValueError:
            raise AllocationError(name, f"score {key!r} is not an integer") from None
        if str(score) != key:
            raise AllocationError(name, f"score {key!r} is not written as a plain integer")
        _finite(name, aversion)
        if not 0.0 <= aversion <= MAX_RISK_AVERSION:
            raise AllocationError(name, f"risk aversion {aversion} is outside [0, {MAX_RISK_AVERSION}]")
        table[score] = aversion
    return Policy(lo, hi, borrowing_rate, table)


def check_rates(policy: Policy, risk_free_rate: float) -> None:
    """Borrowing cheaper than lending would make the line convex at y = 1: refuse the pairing."""
    if policy.allows_borrowing and policy.borrowing_rate is not None:
        if policy.borrowing_rate < risk_free_rate:
            raise AllocationError(
                "risk_free_rate",
                f"{risk_free_rate} is above the plan's borrowing_rate {policy.borrowing_rate}; "
                "borrowing must cost at least the risk-free rate",
            )
