"""From a member's stated risk preference to the risky fraction y on the allocation line.

- risk aversion A (utility E[r] - A/2 sigma^2): y = (mu_T - rf) / (A sigma_T^2); above 1 the
  borrowing piece applies, y = max(1, (mu_T - r_b) / (A sigma_T^2)); A = 0 asks for as much risk as
  the policy allows;
- target volatility s: y = s / sigma_T (the kink does not move volatility);
- loss tolerance (Telser's safety-first criterion, normal returns): the largest y with
  P(R_H < -L) <= 1 - c, where over H years R_H ~ N(H E[r](y), H sigma(y)^2), i.e.
  H E[r](y) - z_c sqrt(H) sigma(y) >= -L with z_c the standard normal c-quantile;
- risk score: the plan's table gives A, then as risk aversion.
Then the policy band [min_risky_fraction, max_risky_fraction] clips y and names what bound.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from statistics import NormalDist

from .errors import AllocationError
from .line import AllocationLine
from .policy import MAX_RISK_AVERSION, Policy


@dataclass(frozen=True)
class RiskAversion:
    risk_aversion: float


@dataclass(frozen=True)
class TargetVolatility:
    target_volatility: float


@dataclass(frozen=True)
class LossTolerance:
    max_loss: float
    confidence: float
    horizon_years: float = 1.0


@dataclass(frozen=True)
class RiskScore:
    risk_score: int


Preference = RiskAversion | TargetVolatility | LossTolerance | RiskScore


@dataclass(frozen=True)
class FractionChoice:
    risky_fraction: float
    # None when the preference asks for unlimited risk (risk aversion 0, a loss bound never reached).
    unconstrained_risky_fraction: float | None
    limited_by: str | None


def validate_preference(pref: Preference) -> None:
    """Range checks beyond the schema's types; fields are named as in the request."""
    if isinstance(pref, RiskAversion):
        if not math.isfinite(pref.risk_aversion) or pref.risk_aversion < 0:
            raise AllocationError("preference.risk_aversion", f"must be >= 0, got {pref.risk_aversion}")
        if pref.risk_aversion > MAX_RISK_AVERSION:
            raise AllocationError(
                "preference.risk_aversion", f"{pref.risk_aversion} is above {MAX_RISK_AVERSION}"
            )
    elif isinstance(pref, TargetVolatility):
        if not math.isfinite(pref.target_volatility) or pref.target_volatility < 0:
            raise AllocationError(
                "preference.target_volatility", f"must be >= 0, got {pref.target_volatility}"
            )
        if pref.target_volatility > 5.0:
            raise AllocationError(
                "preference.target_volatility",
                f"{pref.target_volatility} is not an annual volatility (decimal, 0.12 = 12 %)",
            )
    elif isinstance(pref, LossTolerance):
        if not math.isfinite(pref.max_loss) or pref.max_loss <= 0:
            raise AllocationError("preference.max_loss", f"must be > 0, got {pref.max_loss}")
        if pref.max_loss > 1.0:
            raise AllocationError(
                "preference.max_loss", f"{pref.max_loss} is a loss above 100 % of the account"
            )
        if not 0.5 < pref.confidence < 1.0:
            raise AllocationError(
                "preference.confidence", f"must lie strictly between 0.5 and 1, got {pref.confidence}"
            )
        if not 0 < pref.horizon_years <= 100:
            raise AllocationError(
                "preference.horizon_years", f"must be in (0, 100] years, got {pref.horizon_years}"
            )


def _from_risk_aversion(a: float, line: AllocationLine, policy: Policy) -> float | None:
    if a == 0.0:
        return None
    variance = line.tangency_volatility**2
    lending = (line.tangency_return - line.risk_free_rate) / (a * variance)
    if lending <= 1.0 or not policy.allows_borrowing or line.borrowing_rate is None:
        return lending
    borrowing = (line.tangency_return - line.borrowing_rate) / (a * variance)
    return max(1.0, borrowing)


def _from_loss_tolerance(pref: LossTolerance, line: AllocationLine, policy: Policy) -> float | None:
    h = pref.horizon_years
    z = NormalDist().inv_cdf(pref.confidence)
    # On a piece E[r](y) = a + b y: the criterion is y (z sqrt(h) sigma_T - h b) <= L + h a.
    def largest(intercept: float, excess: float) -> float | None:
        k = z * math.sqrt(h) * line.tangency_volatility - h * excess
        room = pref.max_loss + h * intercept
        if k <= 0.0:
            return None if room >= 0.0 else -math.inf
        return room / k

    lending = largest(line.risk_free_rate, line.tangency_return - line.risk_free_rate)
    if lending is not None and lending < 0.0:
        raise AllocationError(
            "preference.max_loss",
            f"no risky fraction keeps P(loss > {pref.max_loss}) within {1 - pref.confidence:.4g} "
            f"over {h} years: even the safe holding fails it at a risk-free rate of "
            f"{line.risk_free_rate}",
        )
    if lending is not None and lending <= 1.0:
        return lending
    if not policy.allows_borrowing or line.borrowing_rate is None:
        return lending
    # Past y = 1 the line's intercept is r_b and its excess mu_T - r_b (continuous at y = 1).
    return largest(line.borrowing_rate, line.tangency_return - line.borrowing_rate)


def choose_risky_fraction(pref: Preference, line: AllocationLine, policy: Policy) -> FractionChoice:
    validate_preference(pref)
    wanted: float | None
    if isinstance(pref, RiskAversion):
        wanted = _from_risk_aversion(pref.risk_aversion, line, policy)
    elif isinstance(pref, TargetVolatility):
        wanted = pref.target_volatility / line.tangency_volatility
    elif isinstance(pref, LossTolerance):
        wanted = _from_loss_tolerance(pref, line, policy)
    else:
        if not policy.risk_score_table:
            raise AllocationError(
                "preference.risk_score", "this plan has no risk_score_table to map scores"
            )
        if pref.risk_score not in policy.risk_score_table:
            known = ", ".join(str(k) for k in sorted(policy.risk_score_table))
            raise AllocationError(
                "preference.risk_score",
                f"score {pref.risk_score} is not in the plan's risk_score_table (scores: {known})",
            )
        wanted = _from_risk_aversion(policy.risk_score_table[pref.risk_score], line, policy)
    return bound_by_policy(wanted, policy)


def bound_by_policy(wanted: float | None, policy: Policy) -> FractionChoice:
    if wanted is None or wanted > policy.max_risky_fraction:
        return FractionChoice(policy.max_risky_fraction, wanted, "max_risky_fraction")
    if wanted < policy.min_risky_fraction:
        return FractionChoice(policy.min_risky_fraction, wanted, "min_risky_fraction")
    return FractionChoice(wanted, wanted, None)
