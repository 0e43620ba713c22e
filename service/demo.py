"""The demo scenario: an invented plan, invented asset classes and their invented assumptions.

Every number here is made up for demonstration; none is a forecast or a recommendation.
"""

from __future__ import annotations

from typing import Any

DEMO_PLAN: dict[str, Any] = {
    "plan_id": "lakeshore-transit",
    "name": "Lakeshore Transit Workers' Savings Plan",
    "currency": "USD",
    "policy": {
        "min_risky_fraction": 0.0,
        "max_risky_fraction": 1.0,
        "risk_score_table": {"1": 12.0, "2": 8.0, "3": 5.0, "4": 3.5, "5": 2.0},
        # Members who answer no questionnaire: more risk far from retirement, less near it.
        "glide_path": [
            {"years_to_retirement": 40, "risk_aversion": 2.5},
            {"years_to_retirement": 20, "risk_aversion": 4.0},
            {"years_to_retirement": 0, "risk_aversion": 9.0},
        ],
        # Transit wages are steady: a tenth of them counted as equity-like.
        "human_capital": {"discount_rate": None, "equity_like_share": 0.1},
        "rebalance_band": 0.05,
    },
}

# Invented asset classes of the plan's risky mix: (code, expected return, volatility).
_ASSETS = [
    ("HARBOR_EQ", 0.074, 0.165),  # home-market shares
    ("FARSHORE_EQ", 0.079, 0.185),  # overseas shares
    ("FRONTIER_EQ", 0.088, 0.245),  # young-market shares
    ("CIVIC_BOND", 0.035, 0.055),  # long public bonds
    ("GUILD_CREDIT", 0.042, 0.082),  # company bonds
    ("TIMBERLAND", 0.061, 0.135),  # land and forestry
]
_CORRELATION = [
    [1.00, 0.78, 0.66, 0.05, 0.35, 0.42],
    [0.78, 1.00, 0.74, 0.02, 0.33, 0.40],
    [0.66, 0.74, 1.00, -0.03, 0.38, 0.36],
    [0.05, 0.02, -0.03, 1.00, 0.58, 0.10],
    [0.35, 0.33, 0.38, 0.58, 1.00, 0.25],
    [0.42, 0.40, 0.36, 0.10, 0.25, 1.00],
]

DEMO_MIX: dict[str, Any] = {
    "version": "2026-q4",
    "assets": [{"code": c, "expected_return": mu, "volatility": vol} for c, mu, vol in _ASSETS],
    "correlation": _CORRELATION,
    "risk_free_rate": 0.031,
    "bounds": {"FRONTIER_EQ": [0.0, 0.15], "TIMBERLAND": [0.0, 0.20]},
    "long_only": True,
    "cross_check": True,
}

DEMO_ALLOCATION: dict[str, Any] = {
    "member_id": "m-000417",
    "mix_version": "2026-q4",
    "amount": "48250.00",
    "preference": {"risk_aversion": 6},
}

# Invented members as they are: one who states no preference (the glide path decides) and sends
# an income, and one whose holdings drifted from the split.
DEMO_MEMBERS: list[dict[str, Any]] = [
    DEMO_ALLOCATION,
    {
        "member_id": "m-002286",
        "mix_version": "2026-q4",
        "amount": "18400.00",
        "years_to_retirement": 27,
        "income": {"annual": "51500.00", "growth": 0.015},
    },
    {
        "member_id": "m-003051",
        "mix_version": "2026-q4",
        "preference": {"risk_score": 3},
        "holdings_by_asset": {
            "HARBOR_EQ": "21000.00", "FARSHORE_EQ": "9000.00", "FRONTIER_EQ": "4000.00",
            "CIVIC_BOND": "3000.00", "GUILD_CREDIT": "0.00", "TIMBERLAND": "2500.00", "safe": "6500.00",
        },
        "contribution": "400.00",
    },
]
