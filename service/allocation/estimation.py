"""A publishable mix body estimated from a return history (nothing is stored).

The numbers come from ``numerics.estimate_from_history``; here are the request's own rules:
dates are ISO dates in increasing order, given expected returns name every asset, and the
result must pass the same decimal-rate rule as a published mix (a history typed in percent
shows up as a volatility far above 100 %).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from datetime import date
from typing import Any

from service.numerics import InputError, estimate_from_history, history_matrix

from .errors import AllocationError
from .mixes import percent_like


def parse_dates(dates: Sequence[str], *, where: Sequence[str] | None = None) -> list[str]:
    """ISO dates, strictly increasing; returns their labels. ``where`` adds a location (a CSV
    line) to each refusal."""
    parsed: list[date] = []
    for i, text in enumerate(dates):
        at = "" if where is None else f" ({where[i]})"
        try:
            parsed.append(date.fromisoformat(text))
        except (TypeError, ValueError):
            raise AllocationError(f"dates[{i}]", f"{text!r}{at} is not an ISO date such as 2026-01-31") from None
        if i and parsed[i] <= parsed[i - 1]:
            raise AllocationError(
                f"dates[{i}]",
                f"{text}{at} does not come after {dates[i - 1]}: dates must increase, one row per period",
            )
    return [d.isoformat() if where is None else f"{d.isoformat()}, {where[i]}" for i, d in enumerate(parsed)]


def estimate_mix(
    *,
    returns: Mapping[str, Sequence[float | None]],
    frequency: str,
    covariance_method: str,
    expected_returns: str | Mapping[str, float],
    risk_free_rate: float,
    repair: bool,
    max_condition_number: float,
    dates: Sequence[str] | None = None,
    date_locations: Sequence[str] | None = None,
) -> dict[str, Any]:
    """{"mix": a body for POST .../mixes without its version, "estimation": how it was made}."""
    codes, matrix = history_matrix(returns)
    labels = None if dates is None else parse_dates(dates, where=date_locations)
    given: list[float] | None = None
    if isinstance(expected_returns, str):
        if expected_returns != "historical":
            raise AllocationError("expected_returns", f"{expected_returns!r}: give 'historical' or one number per asset code")
    else:
        unknown = sorted(set(expected_returns) - set(codes))
        if unknown:
            raise AllocationError(f"expected_returns.{unknown[0]}", "no return series has this code")
        missing = [c for c in codes if c not in expected_returns]
        if missing:
            raise AllocationError(f"expected_returns.{missing[0]}", "an expected return is needed for every asset")
        given = [float(expected_returns[c]) for c in codes]
    for code, mu in zip(codes, given or [], strict=False):
        if reason := percent_like(mu, "expected_return"):
            raise AllocationError(f"expected_returns.{code}", reason)
    if reason := percent_like(risk_free_rate, "risk_free_rate"):
        raise AllocationError("risk_free_rate", reason)

    found = estimate_from_history(
        codes, matrix, frequency=frequency, covariance_method=covariance_method, expected_returns=given,
        repair=repair, max_condition_number=max_condition_number, row_labels=labels,
    )
    for code, mu, vol in zip(codes, found.expected_returns, found.volatilities, strict=True):
        reason = percent_like(float(vol), "volatility") or (None if given else percent_like(float(mu), "expected_return"))
        if reason:
            raise InputError(
                f"returns.{code}", f"the annualised estimate: {reason}; are the returns in percent? "
                "Returns are simple returns per period as decimals (0.012 = 1.2 %)",
            )
    return {
        "mix": {
            "assets": [
                {"code": c, "expected_return": float(m), "volatility": float(v)}
                for c, m, v in zip(codes, found.expected_returns, found.volatilities, strict=True)
            ],
            "correlation": [[float(x) for x in row] for row in found.correlation],
            "risk_free_rate": float(risk_free_rate),
            "long_only": True,
        },
        "estimation": {
            "observations": found.observations,
            "periods_per_year": found.periods_per_year,
            "covariance_method": found.covariance_method,
            "shrinkage_intensity": found.shrinkage_intensity,
            "condition_number": found.condition_number,
            "repaired": found.repaired,
            "repair_distance": found.repair_distance,
            "expected_returns": "historical" if given is None else "given",
        },
    }
