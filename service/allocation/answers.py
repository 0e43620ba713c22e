"""The answer a caller sees for each allocation: the one renderer, for POST and GET, single and batch.

Rendered from `Decisions` (records.py), which a stored record is read back into, so that the
answer given at the time and the answer read back later are the same text. A single answer
carries the disclosure texts inline; a batch gives them once at the top (`batch_head`) and each
result names their version.
"""

from __future__ import annotations

from collections.abc import Sequence
from functools import lru_cache

import numpy as np
import orjson
from numpy.typing import NDArray

from .disclosures import disclosures_for
from .explanations import explanation_texts
from .members import NOT_HELD, SAFE
from .money import money_columns, number_columns, numbers
from .preferences import GLIDE_PATH
from .records import LIMIT_TEXTS, SOURCE_TEXTS, Context, Decisions


def _pair_texts(a: list[str], b: list[str]) -> list[str]:
    return [f'{{"risky":"{x}","safe":"{y}"}}' for x, y in zip(a, b, strict=True)]


@lru_cache(maxsize=256)
def _by_asset_template(codes: tuple[str, ...]) -> str:
    # Codes are letters, digits and . _ - (the mix schema's pattern): no braces to escape.
    return "{{" + ",".join(f'{orjson.dumps(c).decode()}:"{{}}"' for c in codes) + "}}"


def _by_asset_texts(codes: Sequence[str], flat: list[str]) -> list[str]:
    k = len(codes)
    if k == 0:
        return []
    template = _by_asset_template(tuple(codes))
    return [template.format(*flat[i : i + k]) for i in range(0, len(flat), k)]


def _fill(out: list[str], rows: NDArray[np.intp], texts: list[str]) -> None:
    if len(texts) == len(out):  # every row
        out[:] = [a + b for a, b in zip(out, texts, strict=True)]
        return
    for i, text in zip(rows.tolist(), texts, strict=True):
        out[i] += text


def _circumstance_texts(ctx: Context, d: Decisions) -> list[str]:
    """What only some members sent or get: years to retirement, the human capital their income
    comes to (the income itself stays in the record), holdings by asset and the trades (null
    within the rebalancing band)."""
    n = d.size
    out = [""] * n
    given = ~np.isnan(d.years)
    if given.any():
        _fill(out, np.flatnonzero(given), [f',"years_to_retirement":{t}' for t in numbers(d.years[given])])
    counted = np.not_equal(d.human_capital, NOT_HELD)
    if counted.any():
        rows = np.flatnonzero(counted)
        (value,) = money_columns(ctx.currency, d.human_capital[rows])
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = d.human_capital[rows] / d.amount[rows].astype(np.float64)
        ratios = numbers(np.where(np.isfinite(ratio), ratio, np.nan))
        _fill(out, rows, [
            f',"human_capital":{{"value":"{v}","ratio_to_account":{r}}}' for v, r in zip(value, ratios, strict=True)
        ])
    if d.itemised.any():
        rows = np.flatnonzero(d.itemised)
        names = (*ctx.codes, SAFE)
        held = _by_asset_texts(names, money_columns(ctx.currency, d.held_assets[rows].reshape(-1))[0])
        flat = d.trades[rows].reshape(-1)
        # Signed: buys with "+", sales with "-", nothing to do as plain zero.
        signed = ["+" + t if buy else t for t, buy in zip(money_columns(ctx.currency, flat)[0], (flat > 0).tolist(), strict=True)]
        moves = _by_asset_texts(names, signed)
        trading = d.trading[rows].tolist()
        _fill(out, rows, [
            f',"holdings_by_asset":{h},"trades":{m if t else "null"}' for h, m, t in zip(held, moves, trading, strict=True)
        ])
    return out


def answer_texts(ctx: Context, d: Decisions, *, inline_disclosures: bool) -> list[str]:
    """The JSON object text of every member's answer."""
    n = d.size
    amount, risky, safe, by_asset = money_columns(ctx.currency, d.amount, d.risky, d.safe, d.by_asset.reshape(-1))
    amounts = _pair_texts(risky, safe)
    asset_texts = _by_asset_texts(ctx.codes, by_asset) if ctx.codes else ["{}"] * n
    routed = [""] * n
    if d.routed.any():
        rows = np.flatnonzero(d.routed)
        hr, hs, to_r, to_s = d.held_risky[rows], d.held_safe[rows], d.to_risky[rows], d.to_safe[rows]
        held_r, held_s, contribution, split_r, split_s, after_r, after_s = money_columns(
            ctx.currency, hr, hs, d.contribution[rows], to_r, to_s, hr + to_r, hs + to_s
        )
        held, split, after = _pair_texts(held_r, held_s), _pair_texts(split_r, split_s), _pair_texts(after_r, after_s)
        for j, i in enumerate(rows.tolist()):
            routed[i] = (
                f',"holdings":{held[j]},"contribution":"{contribution[j]}",'
                f'"contribution_split":{split[j]},"after_contribution":{after[j]}'
            )
    if inline_disclosures:
        texts = [orjson.dumps(disclosures_for(y, ctx.disclosures_version)).decode() for y in (0.0, 2.0)]
        notes = [f'"disclosures":{texts[int(b)]},' for b in (d.risky_fraction > 1.0).tolist()]
    else:
        notes = [""] * n
    head = f'"plan_id":{orjson.dumps(ctx.plan_id).decode()},'
    mix = (
        f'"mix_version":{orjson.dumps(ctx.mix_version).decode()},'
        f'"mix_content_hash":{orjson.dumps(ctx.mix_content_hash).decode()},'
    )
    money = f'"currency":{orjson.dumps(ctx.currency).decode()},'
    tail = (
        f'"disclosures_version":{orjson.dumps(ctx.disclosures_version).decode()},'
        f'"created_at":{orjson.dumps(ctx.created_at).decode()}'
    )
    limits, sources = LIMIT_TEXTS, SOURCE_TEXTS
    y, sf, u, e, v, ra = number_columns(
        d.risky_fraction, 1.0 - d.risky_fraction, d.unconstrained, d.expected_return, d.volatility, d.risk_aversion
    )
    circumstances = _circumstance_texts(ctx, d)
    explanations = explanation_texts(ctx, d)
    glide = (d.kind == GLIDE_PATH).tolist()
    return [
        f'{{"allocation_id":"{a}",{head}"member_id":"{m}",{mix}"preference":{p},"preference_source":{sources[g]},'
        f'"risk_aversion_used":{aa},"risky_fraction":{yy},'
        f'"safe_fraction":{ss},"unconstrained_risky_fraction":{uu},"limited_by":{limits[lb]},{money}'
        f'"amount":"{am}","amounts":{ams},"by_asset":{ba},"expected_return":{ee},"volatility":{vv},'
        f'"explanation":{ex},{note}{tail}{r}{c}}}'
        for a, m, p, g, aa, yy, ss, uu, lb, am, ams, ba, ee, vv, ex, note, r, c in zip(
            d.allocation_ids, d.member_ids, d.preference_texts, glide, ra, y, sf, u, d.limited.tolist(),
            amount, amounts, asset_texts, e, v, explanations, notes, routed, circumstances, strict=True,
        )
    ]


def batch_head(ctx: Context, count: int, highest_risky_fraction: float) -> bytes:
    """The batch answer's opening: what all results share, the disclosure texts once, the count."""
    head = orjson.dumps({
        "plan_id": ctx.plan_id,
        "mix_version": ctx.mix_version,
        "mix_content_hash": ctx.mix_content_hash,
        "created_at": ctx.created_at,
        "count": count,
        # Shown once for the whole batch; the borrowing text applies to results with y > 1.
        "disclosures_version": ctx.disclosures_version,
        "disclosures": disclosures_for(highest_risky_fraction, ctx.disclosures_version),
    })
    return head[:-1] + b',"results":['
