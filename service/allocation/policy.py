"""A plan's allocation policy: the band for the risky fraction, borrowing, its risk-score table, the
glide path for members who state no preference, how future earnings count, and the rebalancing band."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from .errors import AllocationError

# A plan may allow leverage, but a cap beyond 3x the account is not a retirement product.
MAX_RISKY_FRACTION_CEILING = 3.0
# Risk aversion beyond this puts almost nothing in the risky mix; larger values are typos.
MAX_RISK_AVERSION = 1000.0
# A working life longer than this is not a plausible distance to retirement.
MAX_YEARS_TO_RETIREMENT = 60.0
# A drift band of 5 percentage points is a common practice threshold for rebalancing (common practice).
DEFAULT_REBALANCE_BAND = 0.05


@dataclass(frozen=True)
class GlidePath:
    """Risk aversion by years to retirement: linear between points, flat beyond the ends."""

    years: tuple[float, ...]  # increasing
    risk_aversion: tuple[float, ...]

    def to_document(self) -> list[dict[str, float]]:
        return [{"years_to_retirement": y, "risk_aversion": a} for y, a in zip(self.years, self.risk_aversion, strict=True)]


@dataclass(frozen=True)
class HumanCapitalTerms:
    """How a member's future earnings count (Bodie, Merton and Samuelson 1992): discounted at
    `discount_rate` (None: the mix's risk-free rate), `equity_like_share` of them behaving like
    the risky mix."""

    discount_rate: float | None
    equity_like_share: float

    def to_document(self) -> dict[str, float | None]:
        return {"discount_rate": self.discount_rate, "equity_like_share": self.equity_like_share}


@dataclass(frozen=True)
class Policy:
    min_risky_fraction: float = 0.0
    max_risky_fraction: float = 1.0
    borrowing_rate: float | None = None
    risk_score_table: Mapping[int, float] = field(default_factory=dict)
    glide_path: GlidePath | None = None
    human_capital: HumanCapitalTerms | None = None
    rebalance_band: float = DEFAULT_REBALANCE_BAND

    @property
    def allows_borrowing(self) -> bool:
        return self.max_risky_fraction > 1.0

    def to_document(self) -> dict[str, Any]:
        return {
            "min_risky_fraction": self.min_risky_fraction,
            "max_risky_fraction": self.max_risky_fraction,
            "borrowing_rate": self.borrowing_rate,
            "risk_score_table": {str(k): v for k, v in sorted(self.risk_score_table.items())},
            "glide_path": None if self.glide_path is None else self.glide_path.to_document(),
            "human_capital": None if self.human_capital is None else self.human_capital.to_document(),
            "rebalance_band": self.rebalance_band,
        }

    @classmethod
    def from_document(cls, doc: Mapping[str, Any]) -> Policy:
        table = doc.get("risk_score_table") or {}
        glide = doc.get("glide_path")
        human = doc.get("human_capital")
        return cls(
            min_risky_fraction=float(doc.get("min_risky_fraction", 0.0)),
            max_risky_fraction=float(doc.get("max_risky_fraction", 1.0)),
            borrowing_rate=None if doc.get("borrowing_rate") is None else float(doc["borrowing_rate"]),
            risk_score_table={int(k): float(v) for k, v in table.items()},
            glide_path=None if not glide else GlidePath(
                tuple(float(p["years_to_retirement"]) for p in glide), tuple(float(p["risk_aversion"]) for p in glide)
            ),
            human_capital=None if human is None else HumanCapitalTerms(
                None if human.get("discount_rate") is None else float(human["discount_rate"]),
                float(human.get("equity_like_share", 0.0)),
            ),
            # Plans stored before the band existed get the default.
            rebalance_band=float(doc.get("rebalance_band", DEFAULT_REBALANCE_BAND)),
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
    glide_path: Sequence[Mapping[str, float]] | None = None,
    human_capital: Mapping[str, float | None] | None = None,
    rebalance_band: float = DEFAULT_REBALANCE_BAND,
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
    band = _finite("policy.rebalance_band", rebalance_band)
    if not 0.0 <= band <= 1.0:
        raise AllocationError("policy.rebalance_band", f"{band} is not a drift in risky fraction within [0, 1] (0.05 = 5 points)")
    return Policy(
        lo, hi, borrowing_rate, table,
        glide_path=None if glide_path is None else _glide_path(glide_path),
        human_capital=None if human_capital is None else _human_capital(human_capital),
        rebalance_band=band,
    )


def _glide_path(points: Sequence[Mapping[str, float]]) -> GlidePath:
    if len(points) < 2:
        raise AllocationError("policy.glide_path", "needs at least two points (years_to_retirement, risk_aversion)")
    pairs: list[tuple[float, float]] = []
    for i, point in enumerate(points):
        years = _finite(f"policy.glide_path[{i}].years_to_retirement", point["years_to_retirement"])
        aversion = _finite(f"policy.glide_path[{i}].risk_aversion", point["risk_aversion"])
        if not 0.0 <= years <= MAX_YEARS_TO_RETIREMENT:
            raise AllocationError(
                f"policy.glide_path[{i}].years_to_retirement", f"{years} is outside [0, {MAX_YEARS_TO_RETIREMENT:g}] years"
            )
        if not 0.0 <= aversion <= MAX_RISK_AVERSION:
            raise AllocationError(
                f"policy.glide_path[{i}].risk_aversion", f"risk aversion {aversion} is outside [0, {MAX_RISK_AVERSION:g}]"
            )
        pairs.append((years, aversion))
    seen: dict[float, int] = {}
    for i, (years, _) in enumerate(pairs):
        if years in seen:
            raise AllocationError(
                f"policy.glide_path[{i}].years_to_retirement",
                f"{years} is also point {seen[years]}: each point needs its own years_to_retirement",
            )
        seen[years] = i
    pairs.sort()
    return GlidePath(tuple(y for y, _ in pairs), tuple(a for _, a in pairs))


def _human_capital(terms: Mapping[str, float | None]) -> HumanCapitalTerms:
    rate = terms.get("discount_rate")
    if rate is not None:
        _finite("policy.human_capital.discount_rate", rate)
        if not -0.5 < rate < 1.0:
            raise AllocationError("policy.human_capital.discount_rate", f"{rate} is not an annual rate in (-0.5, 1)")
    share = terms.get("equity_like_share", 0.0)
    if share is None or not math.isfinite(share) or not 0.0 <= share <= 1.0:
        raise AllocationError("policy.human_capital.equity_like_share", f"{share!r} is not a share in [0, 1]")
    return HumanCapitalTerms(rate, float(share))


def check_rates(policy: Policy, risk_free_rate: float) -> None:
    """Borrowing cheaper than lending would make the line convex at y = 1: refuse the pairing."""
    if policy.allows_borrowing and policy.borrowing_rate is not None:
        if policy.borrowing_rate < risk_free_rate:
            raise AllocationError(
                "risk_free_rate",
                f"{risk_free_rate} is above the plan's borrowing_rate {policy.borrowing_rate}; "
                "borrowing must cost at least the risk-free rate",
            )
