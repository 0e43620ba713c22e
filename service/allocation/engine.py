"""The allocation pipeline: every member through the same rules, a single request as a batch of one.

    members (JSON values) --read_members--> Members (columns) --check_preferences--> (refuse all bad)
      --wanted_fractions--> y before the band --bound_by_policy--> y, limited_by
      --risky_units, split_rows, routing--> money in minor units --> Decisions
      --record_texts / answer_texts--> the logged record and the answer

`allocate` does everything up to Decisions and refuses the request with `MemberErrors` listing
every bad member before anything can be logged (a batch is all or nothing); `allocate_each`
runs the same steps on members of independent requests decided together, and sets each bad
one apart. The texts are written later, chunk by chunk, by `Allocations.records` and
`Allocations.answers`. Nothing here knows HTTP or databases.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .answers import answer_texts, batch_head
from .disclosures import DISCLOSURES_VERSION
from .explanations import EXPLANATION_VERSION
from .human_capital import account_fraction, check_income, present_value
from .issues import FieldIssue, MemberErrors, batch_field
from .line import AllocationLine
from .members import NOT_HELD, Members, duplicate_members, read_members
from .mixes import MixTerms
from .money import risky_units, split_rows
from .policy import Policy
from .preferences import bound_by_policy, check_preferences, wanted_fractions
from .rebalancing import rebalance
from .records import Context, Decisions, preference_texts, record_texts


def line_for(view: MixTerms, policy: Policy) -> AllocationLine:
    return AllocationLine(
        risk_free_rate=view.risk_free_rate,
        tangency_return=view.tangency_return,
        tangency_volatility=view.tangency_volatility,
        borrowing_rate=policy.borrowing_rate if policy.allows_borrowing else None,
    )


BATCH_TAIL = b"]}"


@dataclass(frozen=True)
class Allocations:
    """Every member of a request decided; texts are rendered on demand, a range of rows at a time."""

    context: Context
    decisions: Decisions

    @property
    def size(self) -> int:
        return self.decisions.size

    def records(self, rows: slice = slice(None)) -> list[str]:
        return record_texts(self.context, self.decisions.rows(rows))

    def answers(self, rows: slice = slice(None), *, inline_disclosures: bool) -> list[str]:
        return answer_texts(self.context, self.decisions.rows(rows), inline_disclosures=inline_disclosures)

    def batch_head(self) -> bytes:
        """The opening of a batch's answer, up to its results: what all results share. The
        answer is `batch_head() + b",".join(results of consecutive row ranges) + BATCH_TAIL`."""
        return batch_head(self.context, self.size, float(self.decisions.risky_fraction.max(initial=0.0)))


def decide(
    members: Members,
    view: MixTerms,
    policy: Policy,
    new_ids: Callable[[int], list[str]],
    locate: Callable[[int, str], str],
) -> Decisions:
    """The rules proper, on columns that were read and checked; refuses members no y satisfies."""
    line = line_for(view, policy)
    p = members.preferences
    n = members.size
    wanted, aversion, impossible = wanted_fractions(p, line, policy)
    if impossible:
        raise MemberErrors(impossible, locate)
    earning = np.not_equal(members.income, NOT_HELD)
    human = np.full(n, NOT_HELD, dtype=np.int64)
    discount = np.full(n, np.nan)
    share = np.full(n, np.nan)
    terms = policy.human_capital
    if terms is not None and earning.any():
        # Checked: every member with income has years and a preference by risk aversion.
        rate = view.risk_free_rate if terms.discount_rate is None else terms.discount_rate
        value = present_value(members.income.astype(np.float64), members.income_growth, rate, np.nan_to_num(p.years))
        human = np.where(earning, np.rint(value).astype(np.int64), NOT_HELD)
        discount = np.where(earning, rate, np.nan)
        share = np.where(earning, terms.equity_like_share, np.nan)
        # The rounded value in minor units, so that the record's numbers give the fraction again.
        counted = np.where(earning, human, 0).astype(np.float64)
        wanted = account_fraction(wanted, counted, members.total.astype(np.float64), terms.equity_like_share)
    fractions = bound_by_policy(wanted, policy)
    y = fractions.risky_fraction
    risky = risky_units(members.total, y)
    safe = members.total - risky
    routed = members.routed
    if routed.any():
        # Direct the new money to the side that lacks it, within [0, contribution]: no selling.
        lacking = np.minimum(np.maximum(risky - members.held_risky, 0), members.contribution)
        to_risky = np.where(routed, lacking, NOT_HELD)
        to_safe = np.where(routed, members.contribution - lacking, NOT_HELD)
    else:
        to_risky = to_safe = members.held_risky  # all NOT_HELD
    by_asset = split_rows(risky, view.weights)
    width = len(view.codes) + 1
    if members.held_assets is not None:
        itemised = members.held_assets[:, 0] != NOT_HELD
        moves = rebalance(itemised, members.held_assets, by_asset, safe, y, policy.rebalance_band)
        held_assets, trading, trades = members.held_assets, moves.trading, moves.trades
    else:
        itemised = trading = np.zeros(n, dtype=bool)
        held_assets = trades = np.zeros((n, width), dtype=np.int64)
    # Unlimited (NaN) and an empty account's infinite fraction alike have no finite value to record.
    unconstrained = np.where(np.isfinite(fractions.unconstrained), fractions.unconstrained, np.nan)
    return Decisions(
        allocation_ids=new_ids(n),
        member_ids=members.member_ids,
        preference_texts=preference_texts(p),
        risky_fraction=y,
        unconstrained=unconstrained,
        limited=fractions.limited,
        expected_return=line.expected_return(y),
        volatility=line.volatility(y),
        amount=members.total,
        risky=risky,
        safe=safe,
        by_asset=by_asset,
        held_risky=members.held_risky,
        held_safe=members.held_safe,
        contribution=members.contribution,
        to_risky=to_risky,
        to_safe=to_safe,
        kind=p.kind,
        preference_value=p.value,
        confidence=p.confidence,
        horizon=p.horizon,
        years=p.years,
        risk_aversion=aversion,
        income=members.income,
        income_growth=members.income_growth,
        human_capital=human,
        discount_rate=discount,
        equity_like_share=share,
        itemised=itemised,
        held_assets=held_assets,
        trading=trading,
        trades=trades,
        rebalance_band=np.full(n, policy.rebalance_band),
    )


@dataclass(frozen=True)
class Setting:
    """What every member of one call is decided against: the plan's terms, the mix, the time."""

    plan_id: str
    currency: str
    policy: Policy
    view: MixTerms
    created_at: str

    def context(self) -> Context:
        v = self.view
        return Context(
            self.plan_id, v.version, v.content_hash, self.created_at, self.currency, DISCLOSURES_VERSION, v.codes,
            EXPLANATION_VERSION,
        )


def _read_checked(items: Sequence[Any], on: Setting) -> tuple[Members, list[FieldIssue]]:
    members, issues = read_members(items, on.currency, on.view.codes)
    p = members.preferences
    issues += check_preferences(p, on.policy)
    issues += check_income(np.not_equal(members.income, NOT_HELD), p.kind, p.years, on.policy)
    return members, issues


def allocate(
    items: Sequence[Any], on: Setting, *, new_ids: Callable[[int], list[str]], locate: Callable[[int, str], str]
) -> Allocations:
    """Read, check and decide every member of one request; raises MemberErrors naming each bad
    one (via `locate`). A member_id may appear once per request."""
    members, issues = _read_checked(items, on)
    issues += duplicate_members(members.member_ids)
    if issues:
        raise MemberErrors(issues, locate)
    return Allocations(on.context(), decide(members, on.view, on.policy, new_ids, locate))


def allocate_each(
    items: Sequence[Any], on: Setting, *, new_ids: Callable[[int], list[str]]
) -> tuple[Allocations, list[int], dict[int, list[FieldIssue]]]:
    """Members of separate requests through the same steps: (the good ones decided, their
    positions in `items`, each bad one's issues by position)."""
    members, issues = _read_checked(items, on)
    refused: dict[int, list[FieldIssue]] = {}
    for issue in issues:
        refused.setdefault(issue.index, []).append(issue)
    decided, good = decide_apart(members, on, new_ids, refused)
    return Allocations(on.context(), decided), good, refused


def decide_apart(
    members: Members, on: Setting, new_ids: Callable[[int], list[str]], refused: dict[int, list[FieldIssue]]
) -> tuple[Decisions, list[int]]:
    """`decide` for the members not in `refused`, each independent of the others: a member no
    risky fraction satisfies is added to `refused` (by position) and the rest decided. Returns
    the decisions and the positions they are for."""
    while True:
        good = [i for i in range(members.size) if i not in refused]
        chosen = members if len(good) == members.size else members.rows(good)
        try:
            return decide(chosen, on.view, on.policy, new_ids, batch_field), good
        except MemberErrors as impossible:
            # Rare (a loss bound even the safe holding fails): set those apart and decide the rest.
            for issue in impossible.issues:
                refused.setdefault(good[issue.index], []).append(issue)
