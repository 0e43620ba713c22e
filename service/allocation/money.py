"""Money in a currency's minor unit: parsing without silent rounding, and splits that add up exactly.

Amounts travel as decimal strings; inside they are integers of minor units (cents), so that
risky + safe == amount and the per-asset amounts add up to the risky amount to the last unit.
"""

from __future__ import annotations

from collections.abc import Sequence
import math
from decimal import Decimal, InvalidOperation

import numpy as np

from .errors import AllocationError

# ISO 4217 minor-unit exponents that differ from 2 (from the standard's list, common currencies).
_EXPONENTS = {
    "BHD": 3, "CLP": 0, "ISK": 0, "JOD": 3, "JPY": 0, "KRW": 0, "KWD": 3, "OMR": 3,
    "PYG": 0, "TND": 3, "UGX": 0, "VND": 0, "XAF": 0, "XOF": 0,
}
# Well above any account, below where float arithmetic on minor units stops being exact (2**53).
MAX_MINOR_UNITS = 10**15


def minor_exponent(currency: str) -> int:
    return _EXPONENTS.get(currency, 2)


def parse_amount(field: str, value: str | int | float, currency: str, *, allow_zero: bool = True) -> int:
    """A decimal string (or number) to integer minor units; refuses what it would have to round."""
    if isinstance(value, bool):
        raise AllocationError(field, "must be a decimal string or number, not a boolean")
    try:
        text = repr(value) if isinstance(value, float) else str(value)
        amount = Decimal(text.strip())
    except (InvalidOperation, ValueError):
        raise AllocationError(field, "is not a decimal number") from None
    if not amount.is_finite():
        raise AllocationError(field, "must be a finite amount")
    if amount < 0:
        raise AllocationError(field, "must not be negative")
    if amount == 0 and not allow_zero:
        raise AllocationError(field, "must be greater than zero")
    exponent = minor_exponent(currency)
    units = amount.scaleb(exponent)
    if units != units.to_integral_value():
        raise AllocationError(
            field, f"has more decimal places than {currency} allows ({exponent}); it is not rounded"
        )
    if units > MAX_MINOR_UNITS:
        raise AllocationError(field, "is larger than this service accepts")
    return int(units)


def format_units(units: int, currency: str) -> str:
    exponent = minor_exponent(currency)
    if exponent == 0:
        return str(units)
    sign = "-" if units < 0 else ""
    whole, frac = divmod(abs(units), 10**exponent)
    return f"{sign}{whole}.{frac:0{exponent}d}"


def split_units(total: int, weights: Sequence[float] | np.ndarray) -> np.ndarray:
    """Largest-remainder apportionment of `total` units by weights summing to 1.

    Floors every exact share, then hands the units still missing to the largest fractional parts
    (ties to the earlier asset), so the parts are integers that sum to `total` exactly.
    """
    if len(weights) <= 64:
        return np.array(_split_small(total, [float(x) for x in weights]), dtype=np.int64)
    w = np.asarray(weights, dtype=float)
    exact = w * total
    floors = np.floor(exact)
    parts = floors.astype(np.int64)
    missing = int(total - int(parts.sum()))
    if missing:
        order = np.argsort(-(exact - floors), kind="stable")
        if missing > 0:
            parts[order[:missing]] += 1
        else:
            parts[order[missing:]] -= 1
    return parts


def risky_units(total: int, risky_fraction: float) -> int:
    """The risky share of `total`, to the nearest unit (half to even); safe is the rest."""
    return int(round(risky_fraction * total))


def _split_small(total: int, weights: list[float]) -> list[int]:
    """The same apportionment in plain Python: for a handful of assets numpy's call overhead
    is most of the cost (this runs once per single allocation)."""
    exact = [w * total for w in weights]
    parts = [math.floor(x) for x in exact]
    missing = total - sum(parts)
    if missing:
        order = sorted(range(len(exact)), key=lambda i: -(exact[i] - parts[i]))  # stable: ties to the earlier
        if missing > 0:
            for i in order[:missing]:
                parts[i] += 1
        else:
            for i in order[missing:]:
                parts[i] -= 1
    return parts
