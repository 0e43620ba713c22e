"""The allocation record the audit log keeps, and the answer document rendered from it.

A record holds what was decided in exact terms: money as integers of the currency's minor unit,
per-asset amounts in the mix's asset order, and the version of the disclosure texts shown. The
answer a caller sees (decimal strings, asset codes, disclosure texts) is rendered from the record
by `render`, both when the answer is first given and whenever it is read back, so the two can
never differ. Records are serialised as sorted-key compact JSON (`record_text`).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import orjson

from .disclosures import disclosures_for
from .money import format_units

RECORD_FORM = "mixline.allocation.v1"


def record_text(record: Mapping[str, Any]) -> bytes:
    return orjson.dumps(record, option=orjson.OPT_SORT_KEYS)


def _pair(units: Sequence[int], currency: str) -> dict[str, str]:
    return {"risky": format_units(int(units[0]), currency), "safe": format_units(int(units[1]), currency)}


def render(record: Mapping[str, Any], codes: Sequence[str]) -> dict[str, Any]:
    """The API answer for a stored record; `codes` are the asset codes of its mix, in order."""
    currency = record["currency"]
    y = record["risky_fraction"]
    doc: dict[str, Any] = {
        "allocation_id": record["allocation_id"],
        "plan_id": record["plan_id"],
        "member_id": record["member_id"],
        "mix_version": record["mix_version"],
        "mix_content_hash": record["mix_content_hash"],
        "preference": record["preference"],
        "risky_fraction": y,
        "safe_fraction": 1.0 - y,
        "unconstrained_risky_fraction": record["unconstrained_risky_fraction"],
        "limited_by": record["limited_by"],
        "currency": currency,
        "amount": format_units(record["amount_minor"], currency),
        "amounts": _pair(record["split_minor"], currency),
        "by_asset": {
            code: format_units(units, currency)
            for code, units in zip(codes, record["by_asset_minor"], strict=True)
        },
        "expected_return": record["expected_return"],
        "volatility": record["volatility"],
        "disclosures": disclosures_for(y, record["disclosures_version"]),
        "created_at": record["created_at"],
    }
    if "holdings_minor" in record:
        held = record["holdings_minor"]
        routed = record["contribution_split_minor"]
        doc["holdings"] = _pair(held, currency)
        doc["contribution"] = format_units(record["contribution_minor"], currency)
        doc["contribution_split"] = _pair(routed, currency)
        doc["after_contribution"] = _pair((held[0] + routed[0], held[1] + routed[1]), currency)
    return doc


def render_text(record_bytes: bytes | str, codes: Sequence[str]) -> dict[str, Any]:
    return render(orjson.loads(record_bytes), codes)
