"""Members read into columns: the one strict reader of allocation requests.

A single request and a batch come through here alike. `read_members` takes the members as JSON
values (parsed by the API layer, which refuses NaN and Infinity literals) and returns `Members`,
one column per field, with a `FieldIssue` for everything wrong with any member. Strict means: no
booleans or strings where numbers belong, no numbers where strings belong, no unknown fields;
an optional field given as null counts as left out.
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .human_capital import MAX_INCOME_GROWTH, MIN_INCOME_GROWTH
from .issues import FieldIssue
from .money import Units, format_units, parse_amounts
from .preferences import GLIDE_PATH, KIND_NAMES, MAX_LOSS, RISK_AVERSION, RISK_SCORE, PreferenceColumns

# Printable ASCII without space, quote or backslash: member ids go into log records unescaped.
MEMBER_ID_PATTERN = r"[!#-\[\]-~]{1,128}"
MEMBER_ID_RULE = "must be a string of 1 to 128 printable ASCII characters without spaces, quotes or backslashes"
MEMBER_FIELDS = frozenset({
    "member_id", "amount", "preference", "holdings", "contribution",
    "years_to_retirement", "income", "holdings_by_asset",
})
SAFE = "safe"  # the safe holding's key beside the asset codes in holdings_by_asset
_LOSS_FIELDS = frozenset({"max_loss", "confidence", "horizon_years"})
_PREFERENCE_FIELDS = frozenset(KIND_NAMES) | _LOSS_FIELDS
# A member with only these fields needs none of the per-member reading of the rest.
_BASIC_FIELDS = frozenset({"member_id", "amount", "preference", "holdings", "contribution"})
_ONE_KIND = {k: i for i, k in enumerate(KIND_NAMES) if i != MAX_LOSS}
_KINDS_RULE = "give exactly one of risk_aversion, target_volatility, max_loss (with confidence) or risk_score"
_IDS = re.compile(f"(?:{MEMBER_ID_PATTERN}\n)*{MEMBER_ID_PATTERN}")
_ID = re.compile(MEMBER_ID_PATTERN)
NOT_HELD = -1


@dataclass(frozen=True)
class Members:
    """n members as columns. `held_risky`/`held_safe` are NOT_HELD where no holdings were given;
    `contribution` is 0 where none was. `income` is NOT_HELD where none was given (its growth 0).
    `held_assets` (n x assets + 1, the safe holding last) is None when no member itemised
    holdings by asset, else NOT_HELD in the rows of members who did not."""

    member_ids: list[str]
    preferences: PreferenceColumns
    total: Units
    held_risky: Units
    held_safe: Units
    contribution: Units
    income: Units
    income_growth: NDArray[np.float64]
    held_assets: Units | None = None

    @property
    def size(self) -> int:
        return len(self.member_ids)

    @property
    def routed(self) -> NDArray[np.bool_]:
        return np.not_equal(self.held_risky, NOT_HELD)

    def rows(self, picked: list[int]) -> Members:
        """The members at these positions, in this order."""
        at = np.array(picked, dtype=np.intp)
        return Members(
            [self.member_ids[i] for i in picked],
            self.preferences.rows(at),
            self.total[at], self.held_risky[at], self.held_safe[at], self.contribution[at],
            self.income[at], self.income_growth[at],
            None if self.held_assets is None else self.held_assets[at],
        )


def _number(v: Any) -> bool:
    return type(v) is float or type(v) is int


def _preference(p: Any) -> tuple[int, float, float, float] | tuple[str, str]:
    """(kind, value, confidence, horizon), or (field, reason) for what is wrong. No preference at
    all is the glide path's kind (whether the plan has one is the range checks' business)."""
    if p is None:
        return GLIDE_PATH, 0.0, 0.0, 1.0
    if type(p) is not dict:
        return "preference", f"must be an object: {_KINDS_RULE}"
    unknown = sorted(p.keys() - _PREFERENCE_FIELDS)
    if unknown:
        return f"preference.{unknown[0]}", f"is not a preference field; {_KINDS_RULE}"
    kinds = [k for k in KIND_NAMES if p.get(k) is not None]
    if not kinds:
        return "preference", _KINDS_RULE
    if len(kinds) > 1:
        return "preference", f"{' and '.join(kinds)} given together; {_KINDS_RULE}"
    kind = kinds[0]
    value = p[kind]
    if kind == "risk_score":
        if type(value) is float and value.is_integer():
            value = int(value)  # 4.0 is the integer 4 (JSON Schema's integer too)
        if type(value) is not int:
            return "preference.risk_score", "must be an integer score of the plan's risk_score_table"
    elif not _number(value):
        return f"preference.{kind}", "must be a number"
    if kind != "max_loss":
        for extra in ("confidence", "horizon_years"):
            if p.get(extra) is not None:
                return f"preference.{extra}", "belongs to a max_loss preference only"
        return _ONE_KIND[kind], float(value), 0.0, 1.0
    confidence, horizon = p.get("confidence"), p.get("horizon_years")
    if confidence is None:
        return "preference.confidence", "required with max_loss: a probability in (0.5, 1)"
    if not _number(confidence):
        return "preference.confidence", "must be a number"
    if horizon is None:
        horizon = 1.0
    elif not _number(horizon):
        return "preference.horizon_years", "must be a number of years"
    return MAX_LOSS, float(value), float(confidence), float(horizon)


def read_members(items: Sequence[Any], currency: str, codes: Sequence[str] = ()) -> tuple[Members, list[FieldIssue]]:
    """Every member's fields into columns, and every problem found (none: all members readable).
    `codes` are the mix's asset codes, which holdings_by_asset must give (with "safe").

    Members with a problem keep harmless placeholder values in the columns; callers must not
    answer them (the pipeline refuses the whole request)."""
    n = len(items)
    issues: list[FieldIssue] = []
    ids: list[Any] = [""] * n
    kind = [RISK_AVERSION] * n
    value = [1.0] * n
    confidence = [0.0] * n
    horizon = [1.0] * n
    amounts: list[Any] = [None] * n
    contributions: list[Any] = [None] * n
    routed_rows: list[int] = []
    held_risky: list[Any] = []
    held_safe: list[Any] = []
    years = [math.nan] * n
    income_rows: list[int] = []
    incomes: list[Any] = []
    growth = [0.0] * n
    itemised_rows: list[int] = []
    itemised: list[Any] = []
    member_fields, one_kind, basic = MEMBER_FIELDS, _ONE_KIND, _BASIC_FIELDS
    itemised_keys = frozenset(codes) | {SAFE}
    for i, m in enumerate(items):
        if type(m) is not dict:
            issues.append(FieldIssue(i, "", "must be an object with member_id, preference and amount or holdings"))
            continue
        keys = m.keys()
        if not keys <= member_fields:
            issues.append(FieldIssue(i, sorted(keys - member_fields)[0], "is not a field of a member"))
        ids[i] = m.get("member_id")
        amounts[i] = m.get("amount")
        contributions[i] = m.get("contribution")
        if not keys <= basic:
            # The common shapes inline (a number of years, an income of annual and growth); the
            # rest, and every mistake, through _circumstances.
            y = m.get("years_to_retirement")
            income = m.get("income")
            if (type(y) is int or type(y) is float) and (
                income is None or (
                    type(income) is dict and len(income) == 2 and type(g := income.get("growth")) is float
                    and MIN_INCOME_GROWTH <= g <= MAX_INCOME_GROWTH and income.get("annual") is not None
                )
            ):
                years[i] = y
                if income is not None:
                    income_rows.append(i)
                    incomes.append(income["annual"])
                    growth[i] = income["growth"]
            else:
                _circumstances(i, m, years, income_rows, incomes, growth, issues)
            by_asset = m.get("holdings_by_asset")
            if by_asset is not None:
                if type(by_asset) is not dict or by_asset.keys() != itemised_keys:
                    listed = ", ".join([*codes, SAFE])
                    issues.append(FieldIssue(i, "holdings_by_asset", f"must be an object with exactly one amount for each of: {listed}"))
                    # Read as empty holdings from here on, so that the one mistake is reported once.
                    itemised_rows.append(i)
                    itemised.append(dict.fromkeys(itemised_keys, 0))
                elif m.get("holdings") is not None:
                    issues.append(FieldIssue(i, "holdings", "give holdings or holdings_by_asset, not both"))
                else:
                    itemised_rows.append(i)
                    itemised.append(by_asset)
        holdings = m.get("holdings")
        if holdings is not None:
            if type(holdings) is not dict or holdings.keys() != {"risky", "safe"}:
                issues.append(FieldIssue(i, "holdings", 'must be an object with exactly "risky" and "safe" amounts'))
            elif holdings["risky"] is None or holdings["safe"] is None:
                issues.append(FieldIssue(i, "holdings", "needs both risky and safe amounts"))
            else:
                routed_rows.append(i)
                held_risky.append(holdings["risky"])
                held_safe.append(holdings["safe"])
        p = m.get("preference")
        # The common shape first (one kind, a number); anything else is read by _preference.
        if type(p) is dict and len(p) == 1:
            ((key, v),) = p.items()
            k = one_kind.get(key)
            if k is not None and (type(v) is int or (type(v) is float and k != RISK_SCORE)):
                kind[i], value[i] = k, float(v)
                continue
        read = _preference(p)
        if len(read) == 2:
            issues.append(FieldIssue(i, read[0], read[1]))
        else:
            kind[i], value[i], confidence[i], horizon[i] = read
    joined = "\n".join(ids) if all(type(x) is str for x in ids) else None
    # One regex over the joined ids; the count of separators keeps an id holding one honest.
    if joined is None or joined.count("\n") != n - 1 or not _IDS.fullmatch(joined):
        for i, x in enumerate(ids):
            if type(items[i]) is not dict:
                continue
            if x is None:
                issues.append(FieldIssue(i, "member_id", "required"))
            elif type(x) is not str or not _ID.fullmatch(x):
                issues.append(FieldIssue(i, "member_id", MEMBER_ID_RULE))
    held_assets = None if not itemised_rows else _itemised(itemised_rows, itemised, codes, n, currency, issues)
    total, held_r, held_s, contribution = _accounts(
        amounts, contributions, routed_rows, held_risky, held_safe, currency, issues, itemised_rows, held_assets
    )
    income = np.full(n, NOT_HELD, dtype=np.int64)
    if income_rows:
        units, problems = parse_amounts(incomes, currency)
        income[income_rows] = units
        issues += [FieldIssue(income_rows[j], "income.annual", reason) for j, reason in problems]
    preferences = PreferenceColumns(
        np.array(kind, dtype=np.int8), np.array(value), np.array(confidence), np.array(horizon), np.array(years, dtype=np.float64)
    )
    members = Members(
        [str(x) for x in ids], preferences, total, held_r, held_s, contribution, income, np.array(growth, dtype=np.float64), held_assets
    )
    return members, issues


def _circumstances(
    i: int, m: dict[str, Any], years: list[float], income_rows: list[int], incomes: list[Any],
    growth: list[float], issues: list[FieldIssue],
) -> None:
    """years_to_retirement and income of member i (their ranges against the plan are checked later)."""
    y = m.get("years_to_retirement")
    if y is not None:
        if _number(y):
            years[i] = float(y)
        else:
            years[i] = 0.0  # a placeholder, so that "required" is not reported beside this
            issues.append(FieldIssue(i, "years_to_retirement", "must be a number of years (never a birth date)"))
    income = m.get("income")
    if income is None:
        return
    if type(income) is not dict or not income.keys() <= {"annual", "growth"} or income.get("annual") is None:
        issues.append(FieldIssue(i, "income", 'must be an object with "annual" (money a year) and optionally "growth"'))
        return
    g = income.get("growth")
    if g is not None:
        if not _number(g):
            issues.append(FieldIssue(i, "income.growth", "must be a number: the annual growth rate (0.02 = 2 %)"))
            return
        if not MIN_INCOME_GROWTH <= g <= MAX_INCOME_GROWTH:
            issues.append(FieldIssue(
                i, "income.growth",
                f"{g} is not a plausible annual growth for a working life: it must lie in "
                f"[{MIN_INCOME_GROWTH:g}, {MAX_INCOME_GROWTH:g}] (a decimal: 0.02 = 2 %)",
            ))
            return
        growth[i] = float(g)
    income_rows.append(i)
    incomes.append(income["annual"])


def _itemised(
    rows: list[int], given: list[dict[str, Any]], codes: Sequence[str], n: int, currency: str, issues: list[FieldIssue]
) -> Units:
    """holdings_by_asset as minor units, the mix's asset order and then the safe holding."""
    names = [*codes, SAFE]
    flat = [h[name] for h in given for name in names]
    units, problems = parse_amounts(flat, currency)
    width = len(names)
    for j, reason in problems:
        issues.append(FieldIssue(rows[j // width], f"holdings_by_asset.{names[j % width]}", reason))
    for j, value in enumerate(flat):
        if value is None:
            issues.append(FieldIssue(rows[j // width], f"holdings_by_asset.{names[j % width]}", "required: an amount"))
    held = np.full((n, width), NOT_HELD, dtype=np.int64)
    held[rows] = units.reshape(len(rows), width)
    return held


def duplicate_members(ids: Sequence[str]) -> list[FieldIssue]:
    """A member_id twice in one batch: the later position, naming the earlier."""
    first: dict[str, int] = {}
    found: list[FieldIssue] = []
    if len(set(ids)) == len(ids):
        return found
    for i, x in enumerate(ids):
        seen = first.setdefault(x, i)
        if seen != i:
            found.append(FieldIssue(i, "member_id", f"{x!r} is also members[{seen}]; each member once per batch"))
    return found


def _accounts(
    amounts: list[Any],
    contributions: list[Any],
    routed_rows: list[int],
    held_risky: list[Any],
    held_safe: list[Any],
    currency: str,
    issues: list[FieldIssue],
    itemised_rows: list[int],
    held_assets: Units | None,
) -> tuple[Units, Units, Units, Units]:
    """The money each member splits: its amount, or holdings plus contribution. Holdings by asset
    count as holdings {risky: their sum, safe}."""
    n = len(amounts)
    amount, problems = parse_amounts(amounts, currency)
    issues += [FieldIssue(i, "amount", reason) for i, reason in problems]
    if not routed_rows and not itemised_rows and all(c is None for c in contributions):
        # The usual request: amounts only.
        for i, a in enumerate(amounts):
            if a is None:
                issues.append(FieldIssue(i, "amount", "required unless holdings are given"))
        none = np.full(n, NOT_HELD, dtype=np.int64)
        return amount, none, none, np.zeros(n, dtype=np.int64)
    contribution = np.zeros(n, dtype=np.int64)
    given = [i for i, c in enumerate(contributions) if c is not None]
    if given:
        units, problems = parse_amounts([contributions[i] for i in given], currency)
        contribution[given] = units
        issues += [FieldIssue(given[j], "contribution", reason) for j, reason in problems]
    risky = np.full(n, NOT_HELD, dtype=np.int64)
    safe = np.full(n, NOT_HELD, dtype=np.int64)
    if routed_rows:
        for name, raw, column in (("holdings.risky", held_risky, risky), ("holdings.safe", held_safe, safe)):
            units, problems = parse_amounts(raw, currency)
            column[routed_rows] = units
            issues += [FieldIssue(routed_rows[j], name, reason) for j, reason in problems]
    if held_assets is not None:
        rows = held_assets[itemised_rows]
        risky[itemised_rows] = rows[:, :-1].sum(axis=1)
        safe[itemised_rows] = rows[:, -1]
    routed = risky != NOT_HELD
    stated = np.array([a is not None for a in amounts], dtype=bool)
    from_holdings = np.where(routed, risky + safe + contribution, 0)
    for i in np.flatnonzero(~routed & ~stated).tolist():
        issues.append(FieldIssue(i, "amount", "required unless holdings are given"))
    for i in np.flatnonzero(~routed & np.array([c is not None for c in contributions], dtype=bool)).tolist():
        issues.append(FieldIssue(i, "contribution", "needs holdings: the split of what is already held"))
    for i in np.flatnonzero(routed & stated & (amount != from_holdings)).tolist():
        issues.append(FieldIssue(
            i, "amount",
            f"{format_units(int(amount[i]), currency)} differs from holdings plus contribution "
            f"{format_units(int(from_holdings[i]), currency)}; leave amount out or make them agree",
        ))
    total = np.where(routed, from_holdings, amount)
    return total, risky, safe, contribution
