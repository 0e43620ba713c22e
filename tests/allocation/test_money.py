"""Money: exact parsing, unit formatting, largest-remainder splits and contribution routing."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.allocation import format_units, parse_amount, parse_amounts
from service.allocation.money import split_rows


@pytest.mark.parametrize(
    ("value", "currency", "units"),
    [("133333.33", "USD", 13333333), (1250, "USD", 125000), (12.5, "EUR", 1250), ("7", "JPY", 7), ("1.234", "KWD", 1234), ("0", "USD", 0)],
)
def test_parse_amount(value: str | int | float, currency: str, units: int) -> None:
    # ISO 4217 minor units (common-practice table): USD/EUR 2, JPY 0, KWD 3.
    assert parse_amount(value, currency) == units


@pytest.mark.parametrize("value", ["1.005", "abc", "-1", "NaN", "Infinity", "1e400", True, "", " ", None, [1]])
def test_parse_amount_refuses_what_it_would_have_to_round(value: object) -> None:
    with pytest.raises(ValueError):
        parse_amount(value, "USD")


@pytest.mark.parametrize(("units", "currency", "text"), [(13333333, "USD", "133333.33"), (-505, "USD", "-5.05"), (7, "JPY", "7"), (1234, "KWD", "1.234"), (5, "USD", "0.05"), (-7, "JPY", "-7")])
def test_format_units(units: int, currency: str, text: str) -> None:
    assert format_units(units, currency) == text


def split(total: int, weights: list[float] | np.ndarray) -> list[int]:
    return split_rows(np.array([total], dtype=np.int64), np.asarray(weights, dtype=float))[0].tolist()


def test_split_textbook_example() -> None:
    # Hamilton's largest-remainder method (common practice): 10 seats by shares 0.417/0.333/0.25:
    # quotas 4.17, 3.33, 2.5 -> floors 4, 3, 2 and the one left goes to the largest remainder (2.5).
    assert split(10, [0.417, 0.333, 0.25]) == [4, 3, 3]


def test_split_ties_go_to_the_earlier_asset() -> None:
    # Quotas 1.5, 1.5, 0: one unit left and two equal remainders: the first asset gets it.
    assert split(3, [0.5, 0.5, 0.0]) == [2, 1, 0]


@settings(max_examples=200, deadline=None, derandomize=True)
@given(total=st.integers(0, 10**12), seed=st.integers(0, 2**32 - 1), n=st.integers(1, 40))
def test_split_sums_exactly_and_stays_within_one_unit(total: int, seed: int, n: int) -> None:
    w = np.random.default_rng(seed).dirichlet(np.ones(n))
    parts = np.array(split(total, w))
    assert int(parts.sum()) == total  # identity the method guarantees
    assert np.all(np.abs(parts - w * total) < 1.0 + 1e-6 * max(total, 1))  # largest remainder: |part - quota| < 1


def test_rows_are_split_independently() -> None:
    # Each row of the column form is the one-row split of its own total (the same code either way).
    rng = np.random.default_rng(5)
    w = rng.dirichlet(np.ones(7))
    totals = rng.integers(0, 10**9, 50)
    rows = split_rows(totals, w)
    assert [r.tolist() for r in rows] == [split(int(t), w) for t in totals]


@pytest.mark.parametrize("currency", ["USD", "JPY", "KWD"])
def test_column_reading_is_exact(currency: str) -> None:
    # Reference: parse_amount, which reads through Decimal (exact); the column path reads plain
    # decimal strings through float, exact up to 15 significant digits.
    e = {"USD": 2, "JPY": 0, "KWD": 3}[currency]
    rng = np.random.default_rng(17)
    whole = rng.integers(0, 10 ** (15 - e), 2000)
    frac = rng.integers(0, 10**e, 2000) if e else np.zeros(2000, dtype=np.int64)
    amounts = [f"{w}.{f:0{e}d}" if e else str(w) for w, f in zip(whole.tolist(), frac.tolist(), strict=True)]
    amounts += ["0", "0.07" if e else "7", "1", str(10 ** (13 - e))]
    units, problems = parse_amounts(amounts, currency)
    assert problems == []
    assert units.tolist() == [parse_amount(a, currency) for a in amounts]
    # One value the fast pass cannot take sends the column through the rule, value by value.
    mixed, problems = parse_amounts([*amounts[:50], 12, "-1"], currency)
    assert mixed.tolist()[:51] == [parse_amount(a, currency) for a in [*amounts[:50], 12]]
    assert problems == [(51, "must not be negative")]
