"""Allocation: members' preferences, a solved risky mix and the plan's policy make recommendations.

One pipeline (engine.py) answers a single member and a 300,000-member batch alike. Imports
numerics below it; knows nothing of HTTP or databases.
"""

from .answers import answer_texts
from .disclosures import DISCLOSURES, DISCLOSURES_VERSION, disclosures_for
from .engine import Allocations, Setting, allocate, allocate_each, decide, line_for
from .errors import AllocationError
from .estimation import estimate_mix, parse_dates
from .identifiers import AllocationIds
from .impact import Impact, impact
from .issues import MAX_LISTED, FieldIssue, MemberErrors, batch_field, single_field
from .lifecycle import (
    RESERVED_VERSION_NAMES,
    Activation,
    LifecycleConflict,
    MixState,
    check_version_name,
    plan_activation,
    plan_retirement,
    require_candidate,
    require_in_force,
    state_of,
)
from .line import AllocationLine
from .members import MEMBER_ID_PATTERN, Members, read_members
from .mixes import (
    MixTerms,
    MixView,
    canonical_inputs,
    canonical_text,
    check_decimal_rates,
    content_hash,
    cross_checks_wanted,
    frontier_document,
    is_finite_document,
    published_document,
    solve,
)
from .money import format_units, minor_exponent, money_texts, parse_amount, parse_amounts
from .policy import Policy, build_policy, check_rates
from .records import RECORD_FORM, Context, Decisions, decisions_from_record, record_texts
from .requests import VERSION_PATTERN, AllocationRequest, TooManyMembers, parse_json, read_batch, read_single

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
    "require_candidate",
    "require_in_force",
    "state_of",
    "DISCLOSURES",
    "DISCLOSURES_VERSION",
    "MAX_LISTED",
    "MEMBER_ID_PATTERN",
    "RECORD_FORM",
    "VERSION_PATTERN",
    "AllocationError",
    "AllocationIds",
    "AllocationLine",
    "AllocationRequest",
    "Allocations",
    "Context",
    "Decisions",
    "FieldIssue",
    "Impact",
    "MemberErrors",
    "Members",
    "MixTerms",
    "MixView",
    "Policy",
    "Setting",
    "TooManyMembers",
    "allocate",
    "allocate_each",
    "answer_texts",
    "batch_field",
    "build_policy",
    "canonical_inputs",
    "canonical_text",
    "check_rates",
    "content_hash",
    "decide",
    "decisions_from_record",
    "cross_checks_wanted",
    "disclosures_for",
    "format_units",
    "frontier_document",
    "impact",
    "is_finite_document",
    "line_for",
    "minor_exponent",
    "money_texts",
    "parse_amount",
    "parse_amounts",
    "parse_json",
    "published_document",
    "read_batch",
    "read_members",
    "read_single",
    "record_texts",
    "single_field",
    "solve",
]
