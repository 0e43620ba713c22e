"""The plain-language explanation every answer carries, built from the answer's own numbers.

What was asked (or the glide path's default), what future earnings did to it, what that led to
and which bound of the plan limited it, for a loss bound the chance of that loss at the split, a
one-year range of outcomes at 95 % under the model, and for itemised holdings the trades.
Numbers are rounded for reading (percentages to 0.1, money to whole units, risk aversion to
0.01); the exact figures stay in their fields.

Like the disclosures, the wording is versioned: the log keeps the version a member was shown, a
version's texts never change in place, and a new wording is a new entry in `_WORDING` (the old
ones stay, so a record read back later is explained as it was). Texts hold no quote or
backslash and the numbers none either, so they go into JSON as they are.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import orjson
from numpy.typing import NDArray
from scipy.special import ndtri

from .members import NOT_HELD
from .money import minor_exponent, numbers
from .preferences import (
    GLIDE_PATH,
    LIMIT_MAX,
    LIMIT_MIN,
    MAX_LOSS,
    RISK_AVERSION,
    RISK_SCORE,
    TARGET_VOLATILITY,
    loss_chance,
)
from .records import Context, Decisions

EXPLANATION_VERSION = "2026-12"
# The one-year range covers the central 95 % of outcomes of the normal model.
RANGE_COVERAGE = 0.95
_Z = float(ndtri(0.5 + RANGE_COVERAGE / 2))


@dataclass(frozen=True)
class Wording:
    """One version's sentences, each a function of the (already rounded) figures it states."""

    asked: dict[int, Callable[..., str]]  # by preference kind
    human: Callable[[str, str, str, str], str]  # value, currency, ratio, equity-like share
    human_empty: Callable[[str, str], str]
    over: Callable[[str, str], str]  # unconstrained, bound
    over_unlimited: Callable[[str], str]
    under: Callable[[str, str], str]
    under_unlimited: Callable[[str], str]
    split: Callable[[str, str, str, str, str], str]  # y, risky, currency, safe fraction, safe
    split_borrowing: Callable[[str, str, str, str, str], str]  # y, risky, currency, borrowed fraction, borrowed
    chance: Callable[[str, str, str], str]  # loss, horizon, chance
    outcomes: Callable[[str, str, str, str, str], str]  # low, high, currency, low return, high return
    outcomes_empty: Callable[[str, str], str]
    riskless: Callable[[str], str]
    trades: Callable[[str, str, str], str]  # sold, bought, currency
    no_trades: Callable[[str, str], str]  # held risky fraction, band


_WORDING = {
    "2026-12": Wording(
        asked={
            RISK_AVERSION: lambda a: f"You asked for a risk aversion of {a}.",
            RISK_SCORE: lambda score, a: f"Your risk score {score} stands for a risk aversion of {a} in the plan's table.",
            GLIDE_PATH: lambda a, years: f"You stated no risk preference, so the plan's glide path set a risk aversion "
            f"of {a} for {years} to retirement.",
            TARGET_VOLATILITY: lambda target: f"You asked for a volatility of {target} % a year.",
            MAX_LOSS: lambda loss, horizon, tail: f"You asked that the chance of losing more than {loss} % of the "
            f"account over {horizon} stay within {tail} %.",
        },
        human=lambda value, cur, ratio, share: f" Your future earnings, about {value} {cur} ({ratio} times this "
        f"account, {share} % equity-like), count as wealth too.",
        human_empty=lambda value, cur: f" Your future earnings, about {value} {cur} beside an empty account, count "
        "as wealth too.",
        over=lambda u, y: f" That asks for {u} % of the account in the risky mix; the plan's maximum of {y} % applies.",
        over_unlimited=lambda y: f" That asks for as much risk as the plan allows: its maximum of {y} %.",
        under=lambda u, y: f" That asks for {u} % of the account in the risky mix; the plan's minimum of {y} % applies.",
        under_unlimited=lambda y: f" That asks for as little risk as the plan allows: its minimum of {y} %.",
        split=lambda y, risky, cur, s, safe: f" So {y} % of the account ({risky} {cur}) goes to the risky mix and "
        f"{s} % ({safe} {cur}) to the safe holding.",
        split_borrowing=lambda y, risky, cur, b, borrowed: f" So {y} % of the account ({risky} {cur}) goes to the "
        f"risky mix, {b} % of the account ({borrowed} {cur}) borrowed at the plan's borrowing rate.",
        chance=lambda loss, horizon, p: f" At this split the chance of losing more than {loss} % over {horizon} is "
        f"{p} % under the model.",
        outcomes=lambda lo, hi, cur, rlo, rhi: f" Under the model, in one year the account would be worth {lo} to "
        f"{hi} {cur} in 95 % of outcomes (a return of {rlo} % to {rhi} %).",
        outcomes_empty=lambda rlo, rhi: f" Under the model, the return over one year would be {rlo} % to {rhi} % in "
        "95 % of outcomes.",
        riskless=lambda r: f" Under the model the account would earn {r} % over one year, without risk.",
        trades=lambda sold, bought, cur: f" Trades selling {sold} {cur} and buying {bought} {cur} bring your "
        "holdings to this split.",
        no_trades=lambda held, band: f" Your holdings are {held} % risky, within the plan's rebalancing band of "
        f"{band} percentage points of this split, so no trades are proposed.",
    ),
}

_TRAILING_ZERO = re.compile(r"\.0(?=[,\]])")


def _readable(values: NDArray[np.float64], digits: int) -> list[str]:
    """Rounded to `digits` decimals, without a trailing ".0" (and never "-0")."""
    if not values.size:
        return []
    text: str = orjson.dumps(np.round(values, digits) + 0.0, option=orjson.OPT_SERIALIZE_NUMPY).decode()
    return _TRAILING_ZERO.sub("", text)[1:-1].split(",")


def _percent(values: NDArray[np.float64]) -> list[str]:
    return _readable(values * 100.0, 1)


def _whole(units: NDArray[Any], currency: str) -> list[str]:
    """Money in whole units of the currency, with thousands separators."""
    whole = np.rint(np.asarray(units, dtype=np.float64) / 10 ** minor_exponent(currency)).astype(np.int64)
    return [f"{v:,}" for v in whole.tolist()]


def _years(values: NDArray[np.float64]) -> list[str]:
    return [t + (" year" if t == "1" else " years") for t in _readable(values, 1)]


class _Column:
    """One sentence slot of every member's text: "" until a group of rows fills it."""

    def __init__(self, n: int) -> None:
        self.texts = [""] * n

    def fill(self, rows: NDArray[np.intp], texts: list[str]) -> None:
        if len(texts) == len(self.texts):  # every row: the usual case of a batch of one kind
            self.texts = texts
            return
        t = self.texts
        for i, text in zip(rows.tolist(), texts, strict=True):
            t[i] = text


def explanation_texts(ctx: Context, d: Decisions) -> list[str]:
    """The JSON text of every member's `explanation` ({"text", "version"}; null for a record
    made before explanations were given). Each sentence is written for the rows it concerns
    only, from figures computed for those rows only."""
    n = d.size
    if ctx.explanation_version is None:
        return ["null"] * n
    w = _WORDING[ctx.explanation_version]
    cur = ctx.currency
    asked, human, bound, split, risk, trades = (_Column(n) for _ in range(6))

    def where(mask: NDArray[np.bool_]) -> NDArray[np.intp] | None:
        return np.flatnonzero(mask) if mask.any() else None

    kind = d.kind
    for k, say in w.asked.items():
        rows = where(kind == k)
        if rows is None:
            continue
        value = d.preference_value[rows]
        if k == RISK_AVERSION:
            texts = [say(a) for a in _readable(d.risk_aversion[rows], 2)]
        elif k == RISK_SCORE:
            texts = [say(s, a) for s, a in zip(numbers(value.astype(np.int64)), _readable(d.risk_aversion[rows], 2), strict=True)]
        elif k == GLIDE_PATH:
            texts = [say(a, y) for a, y in zip(_readable(d.risk_aversion[rows], 2), _years(d.years[rows]), strict=True)]
        elif k == TARGET_VOLATILITY:
            texts = [say(t) for t in _percent(value)]
        else:
            texts = [say(loss, h, tail) for loss, h, tail in zip(
                _percent(value), _years(d.horizon[rows]), _percent(1.0 - d.confidence[rows]), strict=True)]
        asked.fill(rows, texts)

    empty = d.amount == 0
    counted = np.not_equal(d.human_capital, NOT_HELD)
    rows = where(counted & ~empty)
    if rows is not None:
        ratio = _readable(d.human_capital[rows] / d.amount[rows].astype(np.float64), 1)
        human.fill(rows, [w.human(v, cur, r, s) for v, r, s in zip(
            _whole(d.human_capital[rows], cur), ratio, _percent(d.equity_like_share[rows]), strict=True)])
    rows = where(counted & empty)
    if rows is not None:
        human.fill(rows, [w.human_empty(v, cur) for v in _whole(d.human_capital[rows], cur)])

    unlimited = np.isnan(d.unconstrained)
    for code, finite, infinite in ((LIMIT_MAX, w.over, w.over_unlimited), (LIMIT_MIN, w.under, w.under_unlimited)):
        rows = where((d.limited == code) & ~unlimited)
        if rows is not None:
            bound.fill(rows, [finite(u, y) for u, y in zip(
                _percent(d.unconstrained[rows]), _percent(d.risky_fraction[rows]), strict=True)])
        rows = where((d.limited == code) & unlimited)
        if rows is not None:
            bound.fill(rows, [infinite(y) for y in _percent(d.risky_fraction[rows])])

    borrowing = d.risky_fraction > 1.0
    for mask, say, other in ((~borrowing, w.split, d.safe), (borrowing, w.split_borrowing, -d.safe)):
        rows = where(mask)
        if rows is not None:
            y = d.risky_fraction[rows]
            rest = 1.0 - y if say is w.split else y - 1.0
            split.fill(rows, [say(a, b, cur, c, e) for a, b, c, e in zip(
                _percent(y), _whole(d.risky[rows], cur), _percent(rest), _whole(other[rows], cur), strict=True)])

    e, v = d.expected_return, d.volatility
    rows = where(kind == MAX_LOSS)
    if rows is not None:
        chance = loss_chance(d.preference_value[rows], d.horizon[rows], e[rows], v[rows])
        risk.fill(rows, [w.chance(loss, h, p) for loss, h, p in zip(
            _percent(d.preference_value[rows]), _years(d.horizon[rows]), _percent(chance), strict=True)])
    riskless = v == 0.0
    rows = where(~riskless & ~empty)
    if rows is not None:
        low, high = e[rows] - _Z * v[rows], e[rows] + _Z * v[rows]
        amount = d.amount[rows].astype(np.float64)
        outcomes = [w.outcomes(a, b, cur, c, f) for a, b, c, f in zip(
            _whole(amount * (1.0 + low), cur), _whole(amount * (1.0 + high), cur), _percent(low), _percent(high),
            strict=True)]
        _append(risk, rows, outcomes)
    rows = where(~riskless & empty)
    if rows is not None:
        low, high = e[rows] - _Z * v[rows], e[rows] + _Z * v[rows]
        _append(risk, rows, [w.outcomes_empty(a, b) for a, b in zip(_percent(low), _percent(high), strict=True)])
    rows = where(riskless)
    if rows is not None:
        _append(risk, rows, [w.riskless(r) for r in _percent(e[rows])])

    rows = where(d.trading)
    if rows is not None:
        moves = d.trades[rows]
        trades.fill(rows, [w.trades(s, b, cur) for s, b in zip(
            _whole(-np.minimum(moves, 0).sum(axis=1), cur), _whole(np.maximum(moves, 0).sum(axis=1), cur), strict=True)])
    rows = where(d.itemised & ~d.trading)
    if rows is not None:
        held = d.held_assets[rows]
        held_risky = held[:, :-1].sum(axis=1)
        trades.fill(rows, [w.no_trades(h, b) for h, b in zip(
            _percent(held_risky / (held_risky + held[:, -1])), _readable(d.rebalance_band[rows] * 100.0, 1), strict=True)])

    version = ctx.explanation_version
    return [
        f'{{"text":"{a}{h}{b}{s}{r}{t}","version":"{version}"}}'
        for a, h, b, s, r, t in zip(asked.texts, human.texts, bound.texts, split.texts, risk.texts, trades.texts, strict=True)
    ]


def _append(column: _Column, rows: NDArray[np.intp], texts: list[str]) -> None:
    if len(texts) == len(column.texts):
        column.texts = [a + b for a, b in zip(column.texts, texts, strict=True)]
        return
    t = column.texts
    for i, text in zip(rows.tolist(), texts, strict=True):
        t[i] += text
