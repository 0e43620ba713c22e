"""One member's recommendation: risky fraction, money split to the unit, per-asset amounts, routing."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from .disclosures import DISCLOSURES_VERSION
from .errors import AllocationError
from .line import AllocationLine
from .mixes import MixView
from .money import format_units, parse_amount, risky_units, split_units
from .records import RECORD_FORM
from .policy import Policy
from .preferences import Preference, choose_risky_fraction
from .routing import route_contribution

MoneyInput = str | int | float


@dataclass(frozen=True)
class Account:
    """The money a recommendation splits, in minor units."""

    total: int
    risky_held: int | None = None
    safe_held: int | None = None
    contribution: int | None = None

    @property
    def routed(self) -> bool:
        return self.risky_held is not None


def account_from_request(
    currency: str,
    amount: MoneyInput | None,
    holdings: Mapping[str, MoneyInput] | None,
    contribution: MoneyInput | None,
) -> Account:
    if holdings is None:
        if contribution is not None:
            raise AllocationError("contribution", "needs holdings: the split of what is already held")
        if amount is None:
            raise AllocationError("amount", "required unless holdings are given")
        return Account(parse_amount("amount", amount, currency))
    risky = parse_amount("holdings.risky", holdings["risky"], currency)
    safe = parse_amount("holdings.safe", holdings["safe"], currency)
    new = 0 if contribution is None else parse_amount("contribution", contribution, currency)
    total = risky + safe + new
    if amount is not None:
        stated = parse_amount("amount", amount, currency)
        if stated != total:
            raise AllocationError(
                "amount",
                f"{format_units(stated, currency)} differs from holdings plus contribution "
                f"{format_units(total, currency)}; leave amount out or make them agree",
            )
    return Account(total, risky, safe, new)


def line_for(view: MixView, policy: Policy) -> AllocationLine:
    return AllocationLine(
        risk_free_rate=view.risk_free_rate,
        tangency_return=view.tangency_return,
        tangency_volatility=view.tangency_volatility,
        borrowing_rate=policy.borrowing_rate if policy.allows_borrowing else None,
    )


def recommend(
    *,
    allocation_id: str,
    plan_id: str,
    member_id: str,
    created_at: str,
    currency: str,
    view: MixView,
    policy: Policy,
    preference: Preference,
    preference_document: Mapping[str, Any],
    account: Account,
) -> dict[str, Any]:
    """The allocation record (see records.py): what the log keeps and the answer is rendered from."""
    line = line_for(view, policy)
    choice = choose_risky_fraction(preference, line, policy)
    y = choice.risky_fraction
    risky = risky_units(account.total, y)
    record: dict[str, Any] = {
        "form": RECORD_FORM,
        "allocation_id": allocation_id,
        "plan_id": plan_id,
        "member_id": member_id,
        "mix_version": view.version,
        "mix_content_hash": view.content_hash,
        "created_at": created_at,
        "currency": currency,
        "preference": dict(preference_document),
        "risky_fraction": y,
        "unconstrained_risky_fraction": choice.unconstrained_risky_fraction,
        "limited_by": choice.limited_by,
        "expected_return": line.expected_return(y),
        "volatility": line.volatility(y),
        "amount_minor": account.total,
        "split_minor": [risky, account.total - risky],
        "by_asset_minor": [int(u) for u in split_units(risky, view.weights)],
        "disclosures_version": DISCLOSURES_VERSION,
    }
    if account.routed:
        assert account.risky_held is not None and account.safe_held is not None
        contribution = account.contribution or 0
        split = route_contribution(account.risky_held, contribution, risky)
        record["holdings_minor"] = [account.risky_held, account.safe_held]
        record["contribution_minor"] = contribution
        record["contribution_split_minor"] = [split.risky, split.safe]
    return record
