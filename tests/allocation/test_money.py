"""Money: exact parsing, unit formatting, largest-remainder splits and contribution routing."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.allocation import AllocationError, format_units, parse_amount, route_contribution, split_units


@pytest.mark.parametrize(
    ("value", "currency", "units"),
    [("133333.33", "USD", 13333333), (1250, "USD", 125000), (12.5, "EUR", 1250), ("7", "JPY", 7), ("1.234", "KWD", 1234), ("0", "USD", 0)],
)
def test_parse_amount(value: str | int | float, currency: str, units: int) -> None:
    # ISO 4217 minor units (common-practice table): USD/EUR 2, JPY 0, KWD 3.
    assert parse_amount("amount", value, currency) == units


@pytest.mark.parametrize("value", ["1.005", "abc", "-1", "NaN", "Infinity", "1e400", True, "", " "])
def test_parse_amount_refuses_what_it_would_have_to_round(value: object) -> None:
    with pytest.raises(AllocationError) as info:
        parse_amount("amount", value, "USD")  # type: ignore[arg-type]
    assert info.value.field == "amount"


@pytest.mark.parametrize(("units", "currency", "text"), [(13333333, "USD", "133333.33"), (-505, "USD", "-5.05"), (7, "JPY", "7"), (1234, "KWD", "1.234"), (5, "USD", "0.05")])
def test_format_units(units: int, currency: str, text: str) -> None:
    assert format_units(units, currency) == text


def test_split_units_textbook_example() -> None:
    # Hamilton's largest-remainder method (common practice): 10 seats by shares 0.417/0.333/0.25:
    # quotas 4.17, 3.33, 2.5 -> floors 4, 3, 2 and the one left goes to the largest remainder (2.5).
    assert split_units(10, [0.417, 0.333, 0.25]).tolist() == [4, 3, 3]


@settings(max_examples=200, deadline=None, derandomize=True)
@given(total=st.integers(0, 10**12), seed=st.integers(0, 2**32 - 1), n=st.integers(1, 40))
def test_split_units_sums_exactly_and_stays_within_one_unit(total: int, seed: int, n: int) -> None:
    w = np.random.default_rng(seed).dirichlet(np.ones(n))
    parts = split_units(total, w)
    assert int(parts.sum()) == total  # identity the method guarantees
    assert np.all(np.abs(parts - w * total) < 1.0 + 1e-6 * max(total, 1))  # largest remainder: |part - quota| < 1


class TestRouting:
    def test_gap_larger_than_contribution_goes_all_to_one_side(self) -> None:
        split = route_contribution(risky_held=1000, contribution=100, risky_target=5000)
        assert (split.risky, split.safe) == (100, 0)
        split = route_contribution(risky_held=9000, contribution=100, risky_target=5000)
        assert (split.risky, split.safe) == (0, 100)

    def test_gap_within_contribution_reaches_the_target_exactly(self) -> None:
        split = route_contribution(risky_held=1000, contribution=500, risky_target=1300)
        assert (split.risky, split.safe) == (300, 200)

    def test_no_contribution(self) -> None:
        split = route_contribution(risky_held=1000, contribution=0, risky_target=3000)
        assert (split.risky, split.safe) == (0, 0)


def test_small_and_vector_apportionment_agree() -> None:
    # The plain-Python path (<= 64 assets) and the numpy path must apportion identically.
    from service.allocation.money import _split_small

    rng = np.random.default_rng(5)
    for n in (65, 120, 300):
        for total in (0, 1, 999, 10**9 + 7):
            w = rng.dirichlet(np.ones(n))
            assert split_units(total, w).tolist() == _split_small(total, w.tolist())
