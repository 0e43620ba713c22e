"""The allocation record the audit log keeps: what was decided, in exact terms, and its one serialiser.

A record holds money as integers of the currency's minor unit, per-asset amounts in the mix's
asset order, and the version of the disclosure texts shown. Records are canonical JSON: sorted
keys, compact separators, orjson's shortest round-trip numbers (a test holds `record_texts`
equal to orjson's own sorted-key dump of the parsed record). The text is written column by
column, so that 300,000 records cost one string format each; one record is a column of one.

`Decisions` are the columns both this serialiser and the answer renderer (answers.py) read;
`decisions_from_record` rebuilds them from a stored record, so that an answer read back later is
rendered by the same code as the answer given at the time.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, fields
from typing import Any

import numpy as np
import orjson
from numpy.typing import NDArray

from .members import NOT_HELD
from .money import Units, number_columns, numbers
from .preferences import (
    GLIDE_PATH,
    KIND_NAMES,
    LIMIT_NAMES,
    MAX_LOSS,
    RISK_AVERSION,
    RISK_SCORE,
    SOURCE_GLIDE_PATH,
    SOURCE_MEMBER,
    TARGET_VOLATILITY,
    PreferenceColumns,
    kinds_present,
)

RECORD_FORM = "mixline.allocation.v1"
LIMIT_TEXTS = tuple(orjson.dumps(name).decode() for name in LIMIT_NAMES)
SOURCE_TEXTS = (orjson.dumps(SOURCE_MEMBER).decode(), orjson.dumps(SOURCE_GLIDE_PATH).decode())


@dataclass(frozen=True)
class Context:
    """What all records of one request share."""

    plan_id: str
    mix_version: str
    mix_content_hash: str
    created_at: str
    currency: str
    disclosures_version: str
    codes: tuple[str, ...]  # the mix's asset codes, in the order of by_asset
    explanation_version: str | None = None  # None: a record from before explanations were given


@dataclass(frozen=True)
class Decisions:
    """One entry per member. Holdings columns are NOT_HELD for members that gave none."""

    allocation_ids: Sequence[str]
    member_ids: Sequence[str]
    preference_texts: Sequence[str]  # canonical JSON of the preference as recorded
    risky_fraction: NDArray[np.float64]
    unconstrained: NDArray[np.float64]  # NaN: the preference asked for unlimited risk
    limited: NDArray[np.int8]  # LIMIT_* codes
    expected_return: NDArray[np.float64]
    volatility: NDArray[np.float64]
    amount: Units
    risky: Units
    safe: Units
    by_asset: Units  # (members, assets)
    held_risky: Units
    held_safe: Units
    contribution: Units
    to_risky: Units  # the contribution split, where holdings were given
    to_safe: Units
    # The preference as numbers (PreferenceColumns' meaning) and the risk aversion it came to (NaN: none).
    kind: NDArray[np.int8]
    preference_value: NDArray[np.float64]
    confidence: NDArray[np.float64]
    horizon: NDArray[np.float64]
    years: NDArray[np.float64]  # NaN: not given
    risk_aversion: NDArray[np.float64]
    income: Units  # NOT_HELD: not given
    income_growth: NDArray[np.float64]
    human_capital: Units  # NOT_HELD where future earnings were not counted
    discount_rate: NDArray[np.float64]
    equity_like_share: NDArray[np.float64]
    itemised: NDArray[np.bool_]  # holdings given by asset
    held_assets: Units  # (members, assets + 1), the safe holding last; meaningful where itemised
    trading: NDArray[np.bool_]  # itemised and outside the rebalancing band: trades given
    trades: Units  # (members, assets + 1)
    rebalance_band: NDArray[np.float64]

    @property
    def size(self) -> int:
        return len(self.allocation_ids)

    @property
    def routed(self) -> NDArray[np.bool_]:
        return np.not_equal(self.held_risky, NOT_HELD)

    def rows(self, selection: slice) -> Decisions:
        if selection == slice(None):
            return self
        return Decisions(*(getattr(self, f.name)[selection] for f in fields(self)))


def preference_texts(p: PreferenceColumns) -> list[str]:
    """Each member's preference as the record keeps it (sorted keys; max_loss with its horizon;
    null where the member stated none)."""
    value = numbers(p.value)
    out = ["null"] * p.kind.shape[0]
    for kind in np.flatnonzero(kinds_present(p.kind)).tolist():
        rows = np.flatnonzero(p.kind == kind).tolist()
        if kind == RISK_AVERSION:
            texts = ['{"risk_aversion":' + value[i] + "}" for i in rows]
        elif kind == TARGET_VOLATILITY:
            texts = ['{"target_volatility":' + value[i] + "}" for i in rows]
        elif kind == RISK_SCORE:
            scores = numbers(p.value[rows].astype(np.int64))
            texts = ['{"risk_score":' + s + "}" for s in scores]
        elif kind == MAX_LOSS:
            conf, horizon = numbers(p.confidence[rows]), numbers(p.horizon[rows])
            texts = [
                '{"confidence":' + c + ',"horizon_years":' + h + ',"max_loss":' + value[i] + "}"
                for i, c, h in zip(rows, conf, horizon, strict=True)
            ]
        elif kind == GLIDE_PATH:
            continue
        else:
            raise ValueError(f"unknown preference kind {kind}")
        for i, text in zip(rows, texts, strict=True):
            out[i] = text
    return out


def _json(value: str) -> str:
    return orjson.dumps(value).decode()


def number_rows(matrix: Units) -> list[str]:
    """The inside of each row's JSON array, e.g. "12,7,0"."""
    if matrix.shape[0] == 0:
        return []
    if matrix.shape[1] == 0:
        return [""] * matrix.shape[0]
    text: str = orjson.dumps(np.ascontiguousarray(matrix), option=orjson.OPT_SERIALIZE_NUMPY).decode()
    return text[2:-2].split("],[")


def _member_facts(d: Decisions) -> tuple[list[str], list[str], list[str]]:
    """The records' facts that only some members have, as text per member, for the places sorted
    keys put them: (holdings by asset, human capital and income, years to retirement)."""
    n = d.size
    itemised, earnings, years = [""] * n, [""] * n, [""] * n
    if d.itemised.any():
        rows = np.flatnonzero(d.itemised)
        held = number_rows(d.held_assets[rows])
        for j, i in enumerate(rows.tolist()):
            itemised[i] = f'"holdings_by_asset_minor":[{held[j]}],'
    earning = np.not_equal(d.income, NOT_HELD)
    if earning.any():
        rows = np.flatnonzero(earning)
        annual, value = number_columns(d.income[rows], d.human_capital[rows])
        growth, rate, share = number_columns(d.income_growth[rows], d.discount_rate[rows], d.equity_like_share[rows])
        counted = np.not_equal(d.human_capital[rows], NOT_HELD).tolist()
        texts = [
            (f'"human_capital":{{"discount_rate":{r},"equity_like_share":{s},"value_minor":{v}}},' if c else "")
            + f'"income":{{"annual_minor":{a},"growth":{g}}},'
            for a, v, g, r, s, c in zip(annual, value, growth, rate, share, counted, strict=True)
        ]
        earnings = _placed(n, rows, texts)
    given = ~np.isnan(d.years)
    if given.any():
        rows = np.flatnonzero(given)
        years = _placed(n, rows, [f',"years_to_retirement":{t}' for t in numbers(d.years[rows])])
    return itemised, earnings, years


def _placed(n: int, rows: NDArray[np.intp], texts: list[str]) -> list[str]:
    """n texts: `texts` at `rows`, "" elsewhere."""
    if len(texts) == n:
        return texts
    out = [""] * n
    for i, text in zip(rows.tolist(), texts, strict=True):
        out[i] = text
    return out


def _rebalancing(d: Decisions) -> tuple[list[str], list[str]]:
    """The rebalancing band and trades of members who itemised their holdings, as record text."""
    n = d.size
    bands, trades = [""] * n, [""] * n
    if d.itemised.any():
        rows = np.flatnonzero(d.itemised)
        moves = number_rows(d.trades[rows])
        for j, (i, band) in enumerate(zip(rows.tolist(), numbers(d.rebalance_band[rows]), strict=True)):
            bands[i] = f'"rebalance_band":{band},'
            trades[i] = f'"trades_minor":[{moves[j]}],' if d.trading[i] else '"trades_minor":null,'
    return bands, trades


def record_texts(ctx: Context, d: Decisions) -> list[str]:
    """The canonical JSON text of every record. Ids must need no JSON escaping (the reader's
    member id pattern and our allocation ids ensure it)."""
    n = d.size
    routed_a, routed_b = [""] * n, [""] * n
    if d.routed.any():
        rows = np.flatnonzero(d.routed)
        contribution, to_r, to_s, held_r, held_s = number_columns(
            d.contribution[rows], d.to_risky[rows], d.to_safe[rows], d.held_risky[rows], d.held_safe[rows]
        )
        for j, i in enumerate(rows.tolist()):
            routed_a[i] = f'"contribution_minor":{contribution[j]},"contribution_split_minor":[{to_r[j]},{to_s[j]}],'
            routed_b[i] = f'"holdings_minor":[{held_r[j]},{held_s[j]}],'
    itemised, earnings, years = _member_facts(d)
    bands, trades = _rebalancing(d)
    shared = (
        f'"created_at":{_json(ctx.created_at)},"currency":{_json(ctx.currency)},'
        f'"disclosures_version":{_json(ctx.disclosures_version)},'
    )
    explained = "" if ctx.explanation_version is None else f'"explanation_version":{_json(ctx.explanation_version)},'
    form = f'{explained}"form":{_json(RECORD_FORM)},'
    mix = (
        f'"mix_content_hash":{_json(ctx.mix_content_hash)},"mix_version":{_json(ctx.mix_version)},'
        f'"plan_id":{_json(ctx.plan_id)},'
    )
    limits = LIMIT_TEXTS
    sources = SOURCE_TEXTS
    amount, risky, safe = number_columns(d.amount, d.risky, d.safe)
    e, y, u, v, a = number_columns(d.expected_return, d.risky_fraction, d.unconstrained, d.volatility, d.risk_aversion)
    return [
        f'{{"allocation_id":"{aid}","amount_minor":{b},"by_asset_minor":[{c}],{ra}{shared}"expected_return":{ee},'
        f'{form}{it}{rb}{hc}"limited_by":{limits[lb]},"member_id":"{m}",{mix}"preference":{p},'
        f'"preference_source":{sources[k == GLIDE_PATH]},{bd}"risk_aversion_used":{aa},"risky_fraction":{yy},'
        f'"split_minor":[{r},{s}],{tr}"unconstrained_risky_fraction":{uu},"volatility":{vv}{yr}}}'
        for aid, b, c, ra, ee, it, rb, hc, lb, m, p, k, bd, aa, yy, r, s, tr, uu, vv, yr in zip(
            d.allocation_ids, amount, number_rows(d.by_asset), routed_a, e, itemised, routed_b, earnings,
            d.limited.tolist(), d.member_ids, d.preference_texts, d.kind.tolist(), bands, a, y, risky, safe,
            trades, u, v, years, strict=True,
        )
    ]


def preference_of_record(preference: Mapping[str, Any] | None) -> tuple[int, float, float, float]:
    """(kind, value, confidence, horizon) of a recorded preference (None: the glide path's)."""
    if preference is None:
        return GLIDE_PATH, 0.0, 0.0, 1.0
    if "max_loss" in preference:
        return MAX_LOSS, float(preference["max_loss"]), float(preference["confidence"]), float(preference["horizon_years"])
    (name, value), = preference.items()
    return KIND_NAMES.index(name), float(value), 0.0, 1.0


def decisions_from_record(record: Mapping[str, Any], codes: Sequence[str]) -> tuple[Context, Decisions]:
    """A stored record back as a context and decisions of one member. Fields a record made before
    they existed lacks read as not given."""
    routed = "holdings_minor" in record
    held = record["holdings_minor"] if routed else (NOT_HELD, NOT_HELD)
    split = record["contribution_split_minor"] if routed else (NOT_HELD, NOT_HELD)
    unconstrained = record["unconstrained_risky_fraction"]
    kind, value, confidence, horizon = preference_of_record(record["preference"])
    income = record.get("income")
    human = record.get("human_capital")
    itemised = "holdings_by_asset_minor" in record
    width = len(codes) + 1
    trades = record.get("trades_minor")

    def units(*values: int) -> Units:
        return np.array(values, dtype=np.int64)

    def reals(value: float | None) -> NDArray[np.float64]:
        return np.array([np.nan if value is None else value], dtype=np.float64)

    def matrix(values: Sequence[int] | None) -> Units:
        return np.array([values if values is not None else [0] * width], dtype=np.int64).reshape(1, width)

    ctx = Context(
        record["plan_id"], record["mix_version"], record["mix_content_hash"], record["created_at"],
        record["currency"], record["disclosures_version"], tuple(codes), record.get("explanation_version"),
    )
    decisions = Decisions(
        allocation_ids=[record["allocation_id"]],
        member_ids=[record["member_id"]],
        preference_texts=[orjson.dumps(record["preference"], option=orjson.OPT_SORT_KEYS).decode()],
        risky_fraction=reals(record["risky_fraction"]),
        unconstrained=reals(unconstrained),
        limited=np.array([LIMIT_NAMES.index(record["limited_by"])], dtype=np.int8),
        expected_return=reals(record["expected_return"]),
        volatility=reals(record["volatility"]),
        amount=units(record["amount_minor"]),
        risky=units(record["split_minor"][0]),
        safe=units(record["split_minor"][1]),
        by_asset=np.array([record["by_asset_minor"]], dtype=np.int64).reshape(1, len(codes)),
        held_risky=units(held[0]),
        held_safe=units(held[1]),
        contribution=units(record.get("contribution_minor", 0)),
        to_risky=units(split[0]),
        to_safe=units(split[1]),
        kind=np.array([kind], dtype=np.int8),
        preference_value=reals(value),
        confidence=reals(confidence),
        horizon=reals(horizon),
        years=reals(record.get("years_to_retirement")),
        risk_aversion=reals(record.get("risk_aversion_used")),
        income=units(NOT_HELD if income is None else income["annual_minor"]),
        income_growth=reals(0.0 if income is None else income["growth"]),
        human_capital=units(NOT_HELD if human is None else human["value_minor"]),
        discount_rate=reals(None if human is None else human["discount_rate"]),
        equity_like_share=reals(None if human is None else human["equity_like_share"]),
        itemised=np.array([itemised]),
        held_assets=matrix(record.get("holdings_by_asset_minor")),
        trading=np.array([trades is not None]),
        trades=matrix(trades),
        rebalance_band=reals(record.get("rebalance_band")),
    )
    return ctx, decisions
