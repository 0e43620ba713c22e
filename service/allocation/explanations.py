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

from dataclasses import dataclass

import numpy as np
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
    asked: dict[int, str]  # by preference kind
    human: str
    human_empty: str
    over: str
    over_unlimited: str
    under: str
    under_unlimited: str
    split: str
    split_borrowing: str
    chance: str
    outcomes: str
    outcomes_empty: str
    riskless: str
    trades: str
    no_trades: str


_WORDING = {
    "2026-12": Wording(
        asked={
            RISK_AVERSION: "You asked for a risk aversion of {a}.",
            RISK_SCORE: "Your risk score {score} stands for a risk aversion of {a} in the plan's table.",
            GLIDE_PATH: "You stated no risk preference, so the plan's glide path set a risk aversion of {a} "
            "for {years} years to retirement.",
            TARGET_VOLATILITY: "You asked for a volatility of {target} % a year.",
            MAX_LOSS: "You asked that the chance of losing more than {loss} % of the account over {horizon} "
            "stay within {tail} %.",
        },
        human=" Your future earnings are valued at about {value} {cur}, {ratio} times this account, and {share} % "
        "of them count as equity-like; counted as wealth, they change how much of the account itself is risky.",
        human_empty=" Your future earnings are valued at about {value} {cur} beside an account that holds nothing "
        "yet; counted as wealth, they call for the plan's limit.",
        over=" That asks for {u} % of the account in the risky mix; the plan's maximum of {y} % applies.",
        over_unlimited=" That asks for as much risk as the plan allows: its maximum of {y} %.",
        under=" That asks for {u} % of the account in the risky mix; the plan's minimum of {y} % applies.",
        under_unlimited=" That asks for as little risk as the plan allows: its minimum of {y} %.",
        split=" So {y} % of the account ({risky} {cur}) goes to the risky mix and {s} % ({safe} {cur}) to the "
        "safe holding.",
        split_borrowing=" So {y} % of the account ({risky} {cur}) goes to the risky mix, {b} % of the account "
        "({borrowed} {cur}) borrowed at the plan's borrowing rate.",
        chance=" At this split the chance of losing more than {loss} % over {horizon} is {p} % under the model.",
        outcomes=" Under the model, one year from now the account would be worth between {lo} and {hi} {cur} in "
        "95 % of outcomes (a return between {rlo} % and {rhi} %).",
        outcomes_empty=" Under the model, the return over one year would lie between {rlo} % and {rhi} % in 95 % "
        "of outcomes.",
        riskless=" Under the model the account would earn {r} % over one year, without risk.",
        trades=" Trades selling {sold} {cur} and buying {bought} {cur} bring your holdings to this split.",
        no_trades=" Your holdings are {held} % risky, within the plan's rebalancing band of {band} percentage "
        "points of this split, so no trades are proposed.",
    ),
}


def _readable(values: NDArray[np.float64], digits: int) -> list[str]:
    """Rounded to `digits` decimals, without a trailing ".0" (and never "-0")."""
    texts = numbers(np.round(values, digits) + 0.0)
    return [t[:-2] if t.endswith(".0") else t for t in texts]


def _percent(values: NDArray[np.float64]) -> list[str]:
    return _readable(values * 100.0, 1)


def _whole(units: NDArray[np.int64] | NDArray[np.float64], currency: str) -> list[str]:
    """Money in whole units of the currency, with thousands separators."""
    whole = np.rint(np.asarray(units, dtype=np.float64) / 10 ** minor_exponent(currency)).astype(np.int64)
    return [f"{v:,}" for v in whole.tolist()]


def _years(values: NDArray[np.float64]) -> list[str]:
    return [t + (" year" if t == "1" else " years") for t in _readable(values, 1)]


def explanation_texts(ctx: Context, d: Decisions) -> list[str]:
    """The JSON text of every member's `explanation` ({"text", "version"}; null for a record
    made before explanations were given)."""
    n = d.size
    if ctx.explanation_version is None:
        return ["null"] * n
    w = _WORDING[ctx.explanation_version]
    cur = ctx.currency
    kind = d.kind.tolist()
    a = _readable(d.risk_aversion, 2)
    value = d.preference_value
    score = numbers(value.astype(np.int64))
    years = _readable(d.years, 1)
    target, loss, tail = _percent(value), _percent(value), _percent(1.0 - d.confidence)
    horizon = _years(d.horizon)
    y, s, u = _percent(d.risky_fraction), _percent(1.0 - d.risky_fraction), _percent(d.unconstrained)
    risky, safe = _whole(d.risky, cur), _whole(d.safe, cur)
    borrowed, b = _whole(-d.safe, cur), _percent(d.risky_fraction - 1.0)
    e, v = d.expected_return, d.volatility
    r_lo, r_hi = e - _Z * v, e + _Z * v
    rlo, rhi, r = _percent(r_lo), _percent(r_hi), _percent(e)
    lo, hi = _whole(d.amount * (1.0 + r_lo), cur), _whole(d.amount * (1.0 + r_hi), cur)
    chance = _percent(loss_chance(value, d.horizon, e, v)) if (d.kind == MAX_LOSS).any() else [""] * n
    counted = np.not_equal(d.human_capital, NOT_HELD)
    if counted.any():
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = _readable(d.human_capital / d.amount.astype(np.float64), 1)
        human, share = _whole(d.human_capital, cur), _percent(d.equity_like_share)
    else:
        ratio = human = share = [""] * n
    if d.trading.any() or d.itemised.any():
        sold = _whole(-np.minimum(d.trades, 0).sum(axis=1), cur)
        bought = _whole(np.maximum(d.trades, 0).sum(axis=1), cur)
        held_risky = d.held_assets[:, :-1].sum(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            held = _percent(held_risky / (held_risky + d.held_assets[:, -1]))
        band = _readable(d.rebalance_band * 100.0, 1)
    else:
        sold = bought = held = band = [""] * n
    asked = w.asked
    limited = d.limited.tolist()
    unlimited = np.isnan(d.unconstrained).tolist()
    borrowing = (d.risky_fraction > 1.0).tolist()
    riskless = (d.volatility == 0.0).tolist()
    empty = (d.amount == 0).tolist()
    counted_rows, itemised, trading = counted.tolist(), d.itemised.tolist(), d.trading.tolist()
    version = ctx.explanation_version
    out = []
    for i in range(n):
        k = kind[i]
        text = asked[k].format(a=a[i], score=score[i], years=years[i], target=target[i], loss=loss[i],
                               horizon=horizon[i], tail=tail[i])
        if counted_rows[i]:
            if empty[i]:
                text += w.human_empty.format(value=human[i], cur=cur)
            else:
                text += w.human.format(value=human[i], cur=cur, ratio=ratio[i], share=share[i])
        bound = limited[i]
        if bound == LIMIT_MAX:
            text += (w.over_unlimited if unlimited[i] else w.over).format(u=u[i], y=y[i])
        elif bound == LIMIT_MIN:
            text += (w.under_unlimited if unlimited[i] else w.under).format(u=u[i], y=y[i])
        if borrowing[i]:
            text += w.split_borrowing.format(y=y[i], risky=risky[i], cur=cur, b=b[i], borrowed=borrowed[i])
        else:
            text += w.split.format(y=y[i], risky=risky[i], cur=cur, s=s[i], safe=safe[i])
        if k == MAX_LOSS:
            text += w.chance.format(loss=loss[i], horizon=horizon[i], p=chance[i])
        if riskless[i]:
            text += w.riskless.format(r=r[i])
        elif empty[i]:
            text += w.outcomes_empty.format(rlo=rlo[i], rhi=rhi[i])
        else:
            text += w.outcomes.format(lo=lo[i], hi=hi[i], cur=cur, rlo=rlo[i], rhi=rhi[i])
        if trading[i]:
            text += w.trades.format(sold=sold[i], bought=bought[i], cur=cur)
        elif itemised[i]:
            text += w.no_trades.format(held=held[i], band=band[i])
        out.append(f'{{"text":"{text}","version":"{version}"}}')
    return out
