"""Money in a currency's minor unit: parsing without silent rounding, and splits that add up exactly.

Amounts travel as decimal strings; inside they are integers of minor units (cents), so that
risky + safe == amount and the per-asset amounts add up to the risky amount to the last unit.
Every function takes whole columns: one member is a column of one.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from decimal import Decimal
from functools import cache
from typing import Any

import numpy as np
import orjson
from numpy.typing import NDArray

Units = NDArray[np.int64]

# ISO 4217 minor-unit exponents that differ from 2 (from the standard's list, common currencies).
_EXPONENTS = {
    "BHD": 3, "CLP": 0, "ISK": 0, "JOD": 3, "JPY": 0, "KRW": 0, "KWD": 3, "OMR": 3,
    "PYG": 0, "TND": 3, "UGX": 0, "VND": 0, "XAF": 0, "XOF": 0,
}
# Well above any account, below where float arithmetic on minor units stops being exact (2**53).
MAX_MINOR_UNITS = 10**15
# An amount given as text: digits, optionally a point and more digits (no sign, exponent, spaces
# or separators). The OpenAPI declares the same pattern.
AMOUNT_PATTERN = r"[0-9]+(?:\.[0-9]+)?"
_AMOUNT_TEXT = re.compile(AMOUNT_PATTERN)


def minor_exponent(currency: str) -> int:
    return _EXPONENTS.get(currency, 2)


def parse_amount(value: Any, currency: str) -> int:
    """A decimal string (or number) to integer minor units; refuses what it would have to round.

    Raises ValueError with the reason (the caller names the field)."""
    if isinstance(value, bool) or not isinstance(value, str | int | float):
        raise ValueError('must be a decimal string such as "1250.00" or a number')
    if isinstance(value, str) and not _AMOUNT_TEXT.fullmatch(value):
        if value.startswith("-") and _AMOUNT_TEXT.fullmatch(value[1:]):
            raise ValueError("must not be negative")
        raise ValueError('is not a decimal number such as "1250.00" (digits, optionally a point and decimals)')
    # Always a decimal now: a string matched the pattern, a float's repr and an int's text are.
    amount = Decimal(repr(value) if isinstance(value, float) else str(value))
    if not amount.is_finite():
        raise ValueError("must be a finite amount")
    if amount < 0:
        raise ValueError("must not be negative")
    exponent = minor_exponent(currency)
    units = amount.scaleb(exponent)
    if units != units.to_integral_value():
        raise ValueError(f"has more decimal places than {currency} allows ({exponent}); it is not rounded")
    if units > MAX_MINOR_UNITS:
        raise ValueError(f"is above {format_units(MAX_MINOR_UNITS, currency)}, the largest amount accepted")
    return int(units)


@cache
def _plain_amount(exponent: int) -> re.Pattern[str]:
    # At most 15 significant digits, which a double holds exactly: float(text) * 10^exponent,
    # rounded, is then exactly the integer parse_amount gives (a test holds them equal).
    digits = rf"\d{{1,{15 - exponent}}}" + (rf"(?:\.\d{{1,{exponent}}})?" if exponent else "")
    return re.compile(digits)


def parse_amounts(values: Sequence[Any], currency: str) -> tuple[Units, list[tuple[int, str]]]:
    """A column of amounts (None = not given, read as 0) to minor units, and (row, reason) for
    every value that is not an amount. Plain decimal strings are read in one vectorised pass;
    anything else goes through parse_amount, the rule itself."""
    exponent = minor_exponent(currency)
    plain = _plain_amount(exponent)
    joined = "\n".join(values) if all(type(v) is str for v in values) else None
    # One regex over the joined column; the count of separators keeps a value holding one honest.
    if joined is not None and joined.count("\n") == len(values) - 1 and re.fullmatch(
        f"(?:{plain.pattern}\n)*{plain.pattern}", joined
    ):
        return np.rint(np.array(values, dtype=np.float64) * 10**exponent).astype(np.int64), []
    units = np.zeros(len(values), dtype=np.int64)
    problems: list[tuple[int, str]] = []
    for i, v in enumerate(values):
        if v is None:
            continue
        if type(v) is str and plain.fullmatch(v):
            units[i] = round(float(v) * 10**exponent)
            continue
        try:
            units[i] = parse_amount(v, currency)
        except ValueError as error:
            problems.append((i, str(error)))
    return units, problems


def format_units(units: int, currency: str) -> str:
    return money_texts(np.array([units], dtype=np.int64), currency)[0]


@cache
def _fraction_texts(exponent: int) -> tuple[str, ...]:
    return tuple(f"{f:0{exponent}d}" for f in range(10**exponent))


def numbers(column: NDArray[Any]) -> list[str]:
    """orjson's text for every number of a 1-d array (NaN becomes null)."""
    if column.size == 0:
        return []
    text: str = orjson.dumps(column, option=orjson.OPT_SERIALIZE_NUMPY).decode()
    return text[1:-1].split(",")


def number_columns(*columns: NDArray[Any]) -> list[list[str]]:
    """numbers() of several same-length columns of one dtype, in one orjson call."""
    if not columns[0].size:
        return [[] for _ in columns]
    # np.array of the columns, not np.stack: the same 2-d array for a fraction of the call's cost
    # (one member's answer converts a dozen such groups).
    text: str = orjson.dumps(np.array(columns), option=orjson.OPT_SERIALIZE_NUMPY).decode()
    return [row.split(",") for row in text[2:-2].split("],[")]


def money_texts(units: Units, currency: str) -> list[str]:
    """Decimal strings ("1250.00", "-3.10") of a column of minor units."""
    exponent = minor_exponent(currency)
    if exponent == 0:
        return numbers(units)
    table = _fraction_texts(exponent)
    whole, frac = np.divmod(np.abs(units), 10**exponent)
    texts = [w + "." + table[f] for w, f in zip(numbers(whole), frac.tolist(), strict=True)]
    negative = units < 0
    if negative.any():
        for i in np.flatnonzero(negative).tolist():
            texts[i] = "-" + texts[i]
    return texts


def money_columns(currency: str, *columns: Units) -> list[list[str]]:
    """money_texts() of several columns in one pass (one member's answer has eight of them)."""
    flat = money_texts(np.concatenate(columns) if len(columns) > 1 else columns[0], currency)
    out, start = [], 0
    for c in columns:
        out.append(flat[start : start + c.size])
        start += c.size
    return out


def risky_units(total: Units, risky_fraction: NDArray[np.float64]) -> Units:
    """The risky share of each total, to the nearest unit (half to even); safe is the rest."""
    return np.rint(risky_fraction * total).astype(np.int64)


def split_rows(totals: Units, weights: NDArray[np.float64]) -> Units:
    """Largest-remainder apportionment of each row's total by weights summing to 1.

    Floors every exact share, then hands the units still missing to the largest fractional parts
    (ties to the earlier asset), so each row's parts are integers that sum to its total exactly.
    """
    exact = totals[:, None] * weights[None, :]
    floors = np.floor(exact)
    parts = floors.astype(np.int64)
    missing = totals - parts.sum(axis=1)
    # Rank each asset's remainder within its row (stable: ties go to the earlier asset).
    ranks = np.argsort(np.argsort(floors - exact, axis=1, kind="stable"), axis=1, kind="stable")
    parts += ranks < missing[:, None]
    if missing.min(initial=0) < 0:
        # A weight sum a hair above 1 can leave units too many: take them from the smallest remainders.
        parts -= ranks >= weights.size + missing[:, None]
    return parts
