"""Reading a batch body of up to 300,000 members into columns, with the single route's strictness.

The fast path checks every member with a handful of type tests and builds numpy columns; the
moment anything looks unusual it stops, and the strict `MemberIn` model validates that member to
say exactly what is wrong, as `members[i].field`. A member the model accepts but the fast path
did not (an amount written as a number, say) is read by the general path, member by member.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

import numpy as np
import orjson
from fastapi.exceptions import RequestValidationError
from pydantic import ValidationError

from service.allocation import AllocationError, account_from_request
from service.allocation.batch import MAX_LOSS, RISK_AVERSION, RISK_SCORE, TARGET_VOLATILITY, BatchInput
from service.allocation.money import MAX_MINOR_UNITS, minor_exponent

from .errors import PayloadTooLarge
from .schemas import IDENTIFIER_PATTERN, MEMBER_ID_PATTERN, BatchIn, MemberIn

_MEMBER_KEYS = frozenset({"member_id", "amount", "preference", "holdings", "contribution"})
_LOSS_KEYS = frozenset({"max_loss", "confidence", "horizon_years"})
_SINGLE_KINDS = {"risk_aversion": RISK_AVERSION, "target_volatility": TARGET_VOLATILITY, "risk_score": RISK_SCORE}
_IDS = re.compile(MEMBER_ID_PATTERN[1:-1].join(["(?:", "\n)*"]) + MEMBER_ID_PATTERN[1:-1])
_VERSION = re.compile(IDENTIFIER_PATTERN[1:-1])


@dataclass(frozen=True)
class BatchRequest:
    mix_version: str
    member_ids: list[str]
    columns: BatchInput


class _Unusual(Exception):
    def __init__(self, index: int) -> None:
        self.index = index


def _invalid(field: str, reason: str) -> RequestValidationError:
    return RequestValidationError([{"loc": ("body", *field.split(".")), "msg": reason, "type": "value_error"}])


def _explain(index: int, member: Any) -> None:
    """Raise the strict model's verdict on one member, located in the batch."""
    try:
        MemberIn.model_validate_json(orjson.dumps(member))
    except ValidationError as error:
        errors = [
            {**e, "loc": ("body", "members", index, *e["loc"])}
            for e in error.errors(include_url=False, include_input=False)
        ]
        raise RequestValidationError(errors) from None


def read_batch(raw: bytes, currency: str, limit: int) -> BatchRequest:
    try:
        doc = orjson.loads(raw)
    except orjson.JSONDecodeError as error:
        raise _invalid("body", f"invalid JSON: {error.msg} at character {error.pos}") from None
    if type(doc) is not dict:
        raise _invalid("body", "must be an object with mix_version and members")
    if not doc.keys() <= {"mix_version", "members"}:
        extra = sorted(doc.keys() - {"mix_version", "members"})[0]
        raise _invalid(str(extra), "Extra inputs are not permitted")
    version, members = doc.get("mix_version"), doc.get("members")
    if type(version) is not str or not _VERSION.fullmatch(version):
        raise _invalid("mix_version", "must be a published mix version (letters, digits, _ . -)")
    if type(members) is not list or not members:
        raise _invalid("members", "must be a non-empty list of members")
    if len(members) > limit:
        raise PayloadTooLarge(f"{len(members)} members in one batch; the limit is {limit}")
    try:
        ids, columns = _fast(members, currency)
    except _Unusual as unusual:
        _explain(unusual.index, members[unusual.index])
        ids, columns = _general(members, currency)
    return BatchRequest(version, ids, columns)


def _fast(members: list[Any], currency: str) -> tuple[list[str], BatchInput]:
    n = len(members)
    kind = [0] * n
    value = [0.0] * n
    confidence = [0.0] * n
    horizon = [1.0] * n
    ids: list[Any] = [None] * n
    amounts: list[Any] = [None] * n
    member_keys, loss_keys, single_kinds = _MEMBER_KEYS, _LOSS_KEYS, _SINGLE_KINDS
    # One pass, type tests only; anything unusual hands the member to the strict model.
    for i, m in enumerate(members):
        if type(m) is not dict or not m.keys() <= member_keys or "holdings" in m or "contribution" in m:
            raise _Unusual(i)
        ids[i] = m.get("member_id")
        amounts[i] = m.get("amount")
        p = m.get("preference")
        if type(p) is not dict:
            raise _Unusual(i)
        if len(p) == 1:
            ((key, v),) = p.items()
            k = single_kinds.get(key)
            if k is None or not (type(v) is int or (type(v) is float and k != RISK_SCORE)):
                raise _Unusual(i)
            kind[i] = k
            value[i] = v
        elif "max_loss" in p and "confidence" in p and p.keys() <= loss_keys:
            loss, conf, years = p["max_loss"], p["confidence"], p.get("horizon_years", 1.0)
            if not (type(loss) in (int, float) and type(conf) in (int, float) and type(years) in (int, float)):
                raise _Unusual(i)
            kind[i], value[i], confidence[i], horizon[i] = MAX_LOSS, loss, conf, years
        else:
            raise _Unusual(i)
    if not all(type(x) is str for x in ids) or not _IDS.fullmatch("\n".join(ids)):
        raise _Unusual(next((i for i, x in enumerate(ids) if type(x) is not str or not re.fullmatch(MEMBER_ID_PATTERN, x)), 0))
    columns = BatchInput(
        np.array(kind, dtype=np.int8),
        np.array(value, dtype=float),
        np.array(confidence, dtype=float),
        np.array(horizon, dtype=float),
        _amounts(amounts, currency),
    )
    return ids, columns


def _amounts(values: list[Any], currency: str) -> np.ndarray:
    """Plain decimal strings in one vectorised pass; anything else member by member.

    The pattern admits at most 15 significant digits (whole digits + the currency's decimals),
    which a double holds exactly, so parsing as float and scaling by 10^exponent gives the
    exact minor units.
    """
    exponent = minor_exponent(currency)
    whole = 15 - exponent
    digits = rf"\d{{1,{whole}}}" + (rf"(?:\.\d{{1,{exponent}}})?" if exponent else "")
    if all(type(v) is str for v in values) and re.fullmatch(f"(?:{digits}\n)*{digits}", "\n".join(values)):
        units = np.rint(np.array(values, dtype=np.float64) * 10**exponent).astype(np.int64)
        if (units > MAX_MINOR_UNITS).any():
            i = int(np.flatnonzero(units > MAX_MINOR_UNITS)[0])
            raise AllocationError(f"members[{i}].amount", "is larger than this service accepts")
        return units
    raise _Unusual(next((i for i, v in enumerate(values) if type(v) is not str), 0))


def _general(members: list[Any], currency: str) -> tuple[list[str], BatchInput]:
    """Every member through the strict model and account_from_request (slower, complete)."""
    try:
        batch = BatchIn.model_validate({"mix_version": "x", "members": members})
    except ValidationError as error:
        errors = [{**e, "loc": ("body", *e["loc"])} for e in error.errors(include_url=False, include_input=False)]
        raise RequestValidationError(errors) from None
    n = len(batch.members)
    kind = np.zeros(n, np.int8)
    value, confidence, horizon = np.zeros(n), np.zeros(n), np.ones(n)
    total = np.zeros(n, np.int64)
    held = np.full(n, -1, np.int64)
    contribution = np.zeros(n, np.int64)
    for i, m in enumerate(batch.members):
        p = m.preference
        if p.risk_aversion is not None:
            kind[i], value[i] = RISK_AVERSION, p.risk_aversion
        elif p.target_volatility is not None:
            kind[i], value[i] = TARGET_VOLATILITY, p.target_volatility
        elif p.max_loss is not None:
            kind[i], value[i] = MAX_LOSS, p.max_loss
            confidence[i] = p.confidence or 0.0
            horizon[i] = 1.0 if p.horizon_years is None else p.horizon_years
        else:
            kind[i], value[i] = RISK_SCORE, float(p.risk_score or 0)
        holdings = None if m.holdings is None else {"risky": m.holdings.risky, "safe": m.holdings.safe}
        try:
            account = account_from_request(currency, m.amount, holdings, m.contribution)
        except AllocationError as error:
            raise AllocationError(f"members[{i}].{error.field}", error.reason) from None
        total[i] = account.total
        if account.routed:
            held[i] = account.risky_held
            contribution[i] = account.contribution or 0
    routed = bool((held >= 0).any())
    columns = BatchInput(
        kind, value, confidence, horizon, total,
        np.where(held >= 0, held, -1) if routed else None,
        contribution if routed else None,
    )
    return [m.member_id for m in batch.members], columns
