"""Allocation: a member's preference, a solved risky mix and the plan's policy make a recommendation.

Imports numerics below it; knows nothing of HTTP or databases.
"""

from .disclosures import DISCLOSURES, disclosures_for
from .errors import AllocationError
from .estimation import estimate_mix, parse_dates
from .lifecycle import (
    RESERVED_VERSION_NAMES,
    Activation,
    LifecycleConflict,
    MixState,
    check_version_name,
    plan_activation,
    plan_retirement,
    require_in_force,
    state_of,
)
from .line import AllocationLine
from .mixes import (
    MixView,
    canonical_inputs,
    check_decimal_rates,
    content_hash,
    frontier_document,
    is_finite_document,
    published_document,
    solve,
)
from .money import format_units, minor_exponent, parse_amount, split_units
from .policy import Policy, build_policy, check_rates
from .preferences import (
    FractionChoice,
    LossTolerance,
    Preference,
    RiskAversion,
    RiskScore,
    TargetVolatility,
    choose_risky_fraction,
)
from .recommendation import Account, account_from_request, line_for, recommend
from .records import RECORD_FORM, record_text, render, render_text
from .routing import ContributionSplit, route_contribution

__all__ = [
    "RESERVED_VERSION_NAMES",
    "Activation",
    "LifecycleConflict",
    "MixState",
    "check_decimal_rates",
    "estimate_mix",
    "parse_dates",
    "check_version_name",
    "plan_activation",
    "plan_retirement",
    "require_in_force",
    "state_of",
    "DISCLOSURES",
    "RECORD_FORM",
    "Account",
    "AllocationError",
    "AllocationLine",
    "ContributionSplit",
    "FractionChoice",
    "LossTolerance",
    "MixView",
    "Policy",
    "Preference",
    "RiskAversion",
    "RiskScore",
    "TargetVolatility",
    "account_from_request",
    "build_policy",
    "canonical_inputs",
    "check_rates",
    "choose_risky_fraction",
    "content_hash",
    "disclosures_for",
    "format_units",
    "frontier_document",
    "is_finite_document",
    "line_for",
    "minor_exponent",
    "parse_amount",
    "published_document",
    "recommend",
    "record_text",
    "render",
    "render_text",
    "route_contribution",
    "solve",
    "split_units",
]
