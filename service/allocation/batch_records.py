"""Allocation records for a whole batch, written as text column by column.

The text of each record is byte for byte what `records.record_text` writes for the same record
dict (sorted keys, compact separators, orjson's number formatting), which a test checks; it is
built from per-column fragments that orjson renders from numpy arrays in one call each, so the
only per-member Python work is one string format.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import orjson

from .batch import LIMIT_NAMES, MAX_LOSS, RISK_AVERSION, RISK_SCORE, TARGET_VOLATILITY, BatchInput, BatchResult
from .disclosures import DISCLOSURES_VERSION
from .money import minor_exponent
from .records import RECORD_FORM


@dataclass(frozen=True)
class BatchContext:
    plan_id: str
    mix_version: str
    mix_content_hash: str
    created_at: str
    currency: str


def _json(value: str) -> str:
    # Escaped for %-formatting: the text becomes part of the row template.
    return orjson.dumps(value).decode().replace("%", "%%")


def numbers(column: np.ndarray) -> list[str]:
    """orjson's text for every number of a 1-d array (NaN becomes null, as None would)."""
    if column.size == 0:
        return []
    return orjson.dumps(column, option=orjson.OPT_SERIALIZE_NUMPY).decode()[1:-1].split(",")


def number_rows(matrix: np.ndarray) -> list[str]:
    """The inside of each row's JSON array, e.g. "12,7,0"."""
    if matrix.shape[0] == 0:
        return []
    text = orjson.dumps(np.ascontiguousarray(matrix), option=orjson.OPT_SERIALIZE_NUMPY).decode()
    return text[2:-2].split("],[")


def preference_texts(batch: BatchInput) -> list[str]:
    """Each member's preference as the single path echoes it (see api.allocating.preference_of)."""
    value, conf, horizon = numbers(batch.value), numbers(batch.confidence), numbers(batch.horizon)
    score = numbers(batch.value.astype(np.int64))
    out: list[str] = [""] * batch.size
    for kind in np.unique(batch.kind).tolist():
        rows = np.flatnonzero(batch.kind == kind).tolist()
        if kind == RISK_AVERSION:
            texts = ['{"risk_aversion":' + value[i] + "}" for i in rows]
        elif kind == TARGET_VOLATILITY:
            texts = ['{"target_volatility":' + value[i] + "}" for i in rows]
        elif kind == MAX_LOSS:
            texts = [
                '{"confidence":' + conf[i] + ',"horizon_years":' + horizon[i] + ',"max_loss":' + value[i] + "}"
                for i in rows
            ]
        elif kind == RISK_SCORE:
            texts = ['{"risk_score":' + score[i] + "}" for i in rows]
        else:  # pragma: no cover - kinds are set by the reader
            raise ValueError(f"unknown preference kind {kind}")
        for i, text in zip(rows, texts, strict=True):
            out[i] = text
    return out


def record_texts(
    ctx: BatchContext,
    allocation_ids: Sequence[str],
    member_ids: Sequence[str],
    batch: BatchInput,
    result: BatchResult,
) -> list[str]:
    """Member ids and allocation ids must need no JSON escaping (the readers' patterns ensure it)."""
    if batch.risky_held is not None and not (batch.risky_held >= 0).all():
        # Members with and without holdings in one batch: each kind with its own template.
        routed_rows = batch.risky_held >= 0
        texts: list[str] = [""] * batch.size
        for rows, held in ((np.flatnonzero(routed_rows), True), (np.flatnonzero(~routed_rows), False)):
            sub = batch.subset(rows)
            if not held:
                sub = BatchInput(sub.kind, sub.value, sub.confidence, sub.horizon, sub.total)
            part = record_texts(ctx, [allocation_ids[i] for i in rows], [member_ids[i] for i in rows],
                                sub, result.subset(rows))
            for i, text in zip(rows.tolist(), part, strict=True):
                texts[i] = text
        return texts
    constant = {
        "created_at": _json(ctx.created_at),
        "currency": _json(ctx.currency),
        "disclosures_version": _json(DISCLOSURES_VERSION),
        "form": _json(RECORD_FORM),
        "mix_content_hash": _json(ctx.mix_content_hash),
        "mix_version": _json(ctx.mix_version),
        "plan_id": _json(ctx.plan_id),
    }
    routed = batch.risky_held is not None
    limited = [orjson.dumps(name).decode() for name in LIMIT_NAMES]
    if not routed:
        return _plain_texts(ctx, allocation_ids, member_ids, batch, result, limited)
    parts = [
        '{"allocation_id":"%s","amount_minor":%s,"by_asset_minor":[%s],',
        '"contribution_minor":%s,"contribution_split_minor":[%s,%s],' if routed else "",
        f'"created_at":{constant["created_at"]},"currency":{constant["currency"]},'
        f'"disclosures_version":{constant["disclosures_version"]},"expected_return":%s,'
        f'"form":{constant["form"]},',
        '"holdings_minor":[%s,%s],' if routed else "",
        f'"limited_by":%s,"member_id":"%s","mix_content_hash":{constant["mix_content_hash"]},'
        f'"mix_version":{constant["mix_version"]},"plan_id":{constant["plan_id"]},"preference":%s,'
        '"risky_fraction":%s,"split_minor":[%s,%s],"unconstrained_risky_fraction":%s,"volatility":%s}',
    ]
    template = "".join(parts)
    columns: list[Sequence[str]] = [
        allocation_ids,
        numbers(batch.total),
        number_rows(result.by_asset),
    ]
    if routed:
        assert batch.contribution is not None and result.to_risky is not None and result.to_safe is not None
        assert batch.risky_held is not None
        columns += [numbers(batch.contribution), numbers(result.to_risky), numbers(result.to_safe)]
    columns.append(numbers(result.expected_return))
    if routed:
        assert batch.risky_held is not None
        safe_held = batch.total - batch.contribution - batch.risky_held  # type: ignore[operator]
        columns += [numbers(batch.risky_held), numbers(safe_held)]
    columns += _tail_columns(member_ids, batch, result, limited)
    return [template % row for row in zip(*columns, strict=True)]


def _tail_columns(
    member_ids: Sequence[str], batch: BatchInput, result: BatchResult, limited: list[str]
) -> list[Sequence[str]]:
    """The columns from limited_by to volatility, in the records' key order."""
    return [
        [limited[c] for c in result.limited.tolist()],
        member_ids,
        preference_texts(batch),
        numbers(result.risky_fraction),
        numbers(result.risky),
        numbers(result.safe),
        numbers(result.unconstrained),
        numbers(result.volatility),
    ]


def _plain_texts(
    ctx: BatchContext,
    allocation_ids: Sequence[str],
    member_ids: Sequence[str],
    batch: BatchInput,
    result: BatchResult,
    limited: list[str],
) -> list[str]:
    """Records of members without holdings: the same keys as the template above, written as one
    f-string (a third faster than %-formatting 280,000 rows, which is most of a batch's text)."""
    dump = lambda v: orjson.dumps(v).decode()  # noqa: E731
    created = (
        f'"created_at":{dump(ctx.created_at)},"currency":{dump(ctx.currency)},'
        f'"disclosures_version":{dump(DISCLOSURES_VERSION)},'
    )
    form = f'"form":{dump(RECORD_FORM)},'
    mix = f'"mix_content_hash":{dump(ctx.mix_content_hash)},"mix_version":{dump(ctx.mix_version)},"plan_id":{dump(ctx.plan_id)},'
    return [
        f'{{"allocation_id":"{a}","amount_minor":{b},"by_asset_minor":[{c}],{created}"expected_return":{d},'
        f'{form}"limited_by":{e},"member_id":"{f}",{mix}"preference":{g},"risky_fraction":{h},'
        f'"split_minor":[{i},{j}],"unconstrained_risky_fraction":{k},"volatility":{v}}}'
        for a, b, c, d, e, f, g, h, i, j, k, v in zip(
            allocation_ids,
            numbers(batch.total),
            number_rows(result.by_asset),
            numbers(result.expected_return),
            *_tail_columns(member_ids, batch, result, limited),
            strict=True,
        )
    ]


_FRACTIONS: dict[int, list[str]] = {}


def money_texts(units: np.ndarray, currency: str) -> list[str]:
    """Decimal strings of minor units, as money.format_units writes them, for a whole column."""
    exponent = minor_exponent(currency)
    if exponent == 0:
        return numbers(units)
    scale = 10**exponent
    if exponent not in _FRACTIONS:
        _FRACTIONS[exponent] = [f"{f:0{exponent}d}" for f in range(scale)]
    table = _FRACTIONS[exponent]
    negative = units < 0
    whole, frac = np.divmod(np.abs(units), scale)
    wholes = numbers(whole)
    return [
        ("-" if neg else "") + w + "." + table[f]
        for neg, w, f in zip(negative.tolist(), wholes, frac.tolist(), strict=True)
    ]
