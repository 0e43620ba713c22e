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
    kinds_present,
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


def _readable(digits: int, *columns: NDArray[np.float64]) -> list[list[str]]:
    """Each column rounded to `digits` decimals, without a trailing ".0" (and never "-0"); one
    text conversion for all the columns (they are of one length)."""
    if not columns[0].size:
        return [[] for _ in columns]
    both = np.round(np.array(columns), digits) + 0.0
    text: str = orjson.dumps(both, option=orjson.OPT_SERIALIZE_NUMPY).decode()
    return [row.split(",") for row in _TRAILING_ZERO.sub("", text)[2:-2].split("],[")]


def _percent(*columns: NDArray[np.float64]) -> list[list[str]]:
    return _readable(1, *(c * 100.0 for c in columns))


def _whole(currency: str, *columns: NDArray[Any]) -> list[list[str]]:
    """Money in whole units of the currency, with thousands separators."""
    scale = 10 ** minor_exponent(currency)
    whole = np.rint(np.array(columns, dtype=np.float64) / scale).astype(np.int64)
    return [[f"{v:,}" for v in row] for row in whole.tolist()]


def _years(values: NDArray[np.float64]) -> list[str]:
    return [t + (" year" if t == "1" else " years") for t in _readable(1, values)[0]]


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
    only, from figures computed for those rows only, each kind of figure converted to text in
    one call for all of them."""
    n = d.size
    if ctx.explanation_version is None:
        return ["null"] * n
    w = _WORDING[ctx.explanation_version]
    cur = ctx.currency
    asked, human, bound, split, risk, trades = (_Column(n) for _ in range(6))
    everyone = np.arange(n)

    def where(mask: NDArray[np.bool_]) -> NDArray[np.intp] | None:
        if not mask.any():
            return None
        return everyone if mask.all() else np.flatnonzero(mask)

    kind = d.kind
    present = kinds_present(kind).tolist()
    for k, say in w.asked.items():
        rows = where(kind == k) if present[k] else None
        if rows is None:
            continue
        value = d.preference_value[rows]
        if k == RISK_AVERSION:
            texts = [say(a) for a in _readable(2, d.risk_aversion[rows])[0]]
        elif k == RISK_SCORE:
            texts = [say(s, a) for s, a in zip(numbers(value.astype(np.int64)), _readable(2, d.risk_aversion[rows])[0], strict=True)]
        elif k == GLIDE_PATH:
            texts = [say(a, y) for a, y in zip(_readable(2, d.risk_aversion[rows])[0], _years(d.years[rows]), strict=True)]
        elif k == TARGET_VOLATILITY:
            texts = [say(t) for t in _percent(value)[0]]
        else:
            loss, tail = _percent(value, 1.0 - d.confidence[rows])
            texts = [say(a, h, t) for a, h, t in zip(loss, _years(d.horizon[rows]), tail, strict=True)]
        asked.fill(rows, texts)

    empty = d.amount == 0
    counted = np.not_equal(d.human_capital, NOT_HELD)
    if counted.any():
        rows = where(counted & ~empty)
        if rows is not None:
            (ratio,) = _readable(1, d.human_capital[rows] / d.amount[rows].astype(np.float64))
            (value_text,) = _whole(cur, d.human_capital[rows])
            (share,) = _percent(d.equity_like_share[rows])
            human.fill(rows, [w.human(v, cur, r, s) for v, r, s in zip(value_text, ratio, share, strict=True)])
        rows = where(counted & empty)
        if rows is not None:
            human.fill(rows, [w.human_empty(v, cur) for v in _whole(cur, d.human_capital[rows])[0]])

    limits = np.bincount(d.limited, minlength=3).tolist()
    if limits[LIMIT_MAX] or limits[LIMIT_MIN]:
        unlimited = np.isnan(d.unconstrained)
        for code, finite, infinite in ((LIMIT_MAX, w.over, w.over_unlimited), (LIMIT_MIN, w.under, w.under_unlimited)):
            if not limits[code]:
                continue
            rows = where((d.limited == code) & ~unlimited)
            if rows is not None:
                wanted, given = _percent(d.unconstrained[rows], d.risky_fraction[rows])
                bound.fill(rows, [finite(a, b) for a, b in zip(wanted, given, strict=True)])
            rows = where((d.limited == code) & unlimited)
            if rows is not None:
                bound.fill(rows, [infinite(t) for t in _percent(d.risky_fraction[rows])[0]])

    # The split and the one-year range concern (nearly) every row: their figures are converted for
    # all rows at once, and each row's sentence is chosen by its flags.
    y, e, v = d.risky_fraction, d.expected_return, d.volatility
    borrowing = y > 1.0
    low, high = e - _Z * v, e + _Z * v
    amount = d.amount.astype(np.float64)
    fractions, rests, rlo, rhi, r = _percent(y, np.where(borrowing, y - 1.0, 1.0 - y), low, high, e)
    risky, others, worth_low, worth_high = _whole(
        cur, d.risky, np.where(borrowing, -d.safe, d.safe), amount * (1.0 + low), amount * (1.0 + high)
    )
    split.texts = [
        (w.split_borrowing if b else w.split)(a, c, cur, f, g)
        for b, a, c, f, g in zip(borrowing.tolist(), fractions, risky, rests, others, strict=True)
    ]
    if present[MAX_LOSS]:
        rows = where(kind == MAX_LOSS)
        assert rows is not None
        loss_value = d.preference_value[rows]
        losses, chances = _percent(loss_value, loss_chance(loss_value, d.horizon[rows], e[rows], v[rows]))
        risk.fill(rows, [w.chance(a, h, p) for a, h, p in zip(losses, _years(d.horizon[rows]), chances, strict=True)])
    outcomes = [
        w.riskless(g) if none else w.outcomes_empty(c, f) if nothing else w.outcomes(a, b, cur, c, f)
        for none, nothing, a, b, c, f, g in zip(
            (v == 0.0).tolist(), empty.tolist(), worth_low, worth_high, rlo, rhi, r, strict=True)
    ]
    _append(risk, everyone, outcomes)

    if d.itemised.any():
        rows = where(d.trading)
        if rows is not None:
            moves = d.trades[rows]
            sold, bought = _whole(cur, -np.minimum(moves, 0).sum(axis=1), np.maximum(moves, 0).sum(axis=1))
            trades.fill(rows, [w.trades(a, b, cur) for a, b in zip(sold, bought, strict=True)])
        rows = where(d.itemised & ~d.trading)
        if rows is not None:
            held = d.held_assets[rows]
            held_risky = held[:, :-1].sum(axis=1)
            (fraction,) = _percent(held_risky / (held_risky + held[:, -1]))
            (band,) = _readable(1, d.rebalance_band[rows] * 100.0)
            trades.fill(rows, [w.no_trades(h, b) for h, b in zip(fraction, band, strict=True)])

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
