"""Glide path, human capital, rebalancing trades and explanations, through the pipeline's own entry
point (`allocate`), against references computed here.

The mix is given by its allocation terms directly (MixTerms: tangency return, volatility and
weights), so that every expected figure follows from numbers written in this file.
"""

from __future__ import annotations

import json
import math
import re
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import norm

from service.allocation import AllocationError, MemberErrors, MixTerms, Setting, allocate, batch_field, build_policy
from service.allocation.human_capital import present_value

# Invented terms for these tests: a two-asset risky mix with mu_T = 8 %, sigma_T = 20 %, rf = 3 %.
TERMS = MixTerms(
    version="t1", content_hash="0" * 64, codes=("EQ", "BD"), weights=np.array([0.6, 0.4]),
    tangency_return=0.08, tangency_volatility=0.20, risk_free_rate=0.03,
)
GLIDE = [
    {"years_to_retirement": 40, "risk_aversion": 2.5},
    {"years_to_retirement": 20, "risk_aversion": 4.0},
    {"years_to_retirement": 0, "risk_aversion": 9.0},
]


def setting(**policy: Any) -> Setting:
    return Setting("p", "USD", build_policy(**policy), TERMS, "2026-12-02T00:00:00Z")


def answers(members: list[dict[str, Any]], **policy: Any) -> list[dict[str, Any]]:
    done = allocate(members, setting(**policy), new_ids=lambda n: [f"a{i}" for i in range(n)], locate=batch_field)
    return [json.loads(t) for t in done.answers(inline_disclosures=False)]


def answer(member: dict[str, Any], **policy: Any) -> dict[str, Any]:
    return answers([{"member_id": "m", **member}], **policy)[0]


def refused(member: dict[str, Any], **policy: Any) -> list[tuple[str, str]]:
    with pytest.raises(MemberErrors) as caught:
        answers([{"member_id": "m", **member}], **policy)
    return caught.value.listed


def merton(a: float) -> float:
    """y = (mu_T - rf) / (A sigma_T^2), the closed form of mean-variance utility (Merton 1969)."""
    return (TERMS.tangency_return - TERMS.risk_free_rate) / (a * TERMS.tangency_volatility**2)


def interpolated(points: list[dict[str, float]], years: float) -> float:
    """Linear interpolation written out (not numpy's): flat beyond the ends."""
    pts = sorted((p["years_to_retirement"], p["risk_aversion"]) for p in points)
    if years <= pts[0][0]:
        return pts[0][1]
    if years >= pts[-1][0]:
        return pts[-1][1]
    for (x0, a0), (x1, a1) in zip(pts, pts[1:], strict=False):
        if x0 <= years <= x1:
            return a0 + (a1 - a0) * (years - x0) / (x1 - x0)
    raise AssertionError("unreachable")


# ---- glide path -----------------------------------------------------------------------------


@pytest.mark.parametrize("years", [0, 3, 12.5, 20, 27, 33.3, 40, 45, 60])
def test_glide_path_interpolates_linearly_and_is_flat_beyond_the_ends(years: float) -> None:
    a = answer({"amount": "10000.00", "years_to_retirement": years}, glide_path=GLIDE)
    expected = interpolated(GLIDE, years)
    assert a["preference_source"] == "glide_path" and a["preference"] is None
    assert a["risk_aversion_used"] == pytest.approx(expected, rel=1e-14, abs=1e-14)
    assert a["unconstrained_risky_fraction"] == pytest.approx(merton(expected), rel=1e-12)


def test_a_stated_preference_wins_over_the_glide_path_and_a_score_echoes_its_aversion() -> None:
    a = answer({"amount": "100.00", "preference": {"risk_aversion": 6}, "years_to_retirement": 30}, glide_path=GLIDE)
    assert (a["preference_source"], a["risk_aversion_used"]) == ("member", 6.0)
    s = answer({"amount": "100.00", "preference": {"risk_score": 2}}, risk_score_table={"1": 9.0, "2": 5.5})
    assert s["risk_aversion_used"] == 5.5
    v = answer({"amount": "100.00", "preference": {"target_volatility": 0.1}})
    assert v["risk_aversion_used"] is None


def test_no_preference_needs_a_glide_path_and_years() -> None:
    assert refused({"amount": "1.00"}) == [
        ("members[0].preference", "required: this plan's policy has no glide_path to default from")
    ]
    [(field, _)] = refused({"amount": "1.00"}, glide_path=GLIDE)
    assert field == "members[0].years_to_retirement"
    [(field, _)] = refused({"amount": "1.00", "years_to_retirement": 61}, glide_path=GLIDE)
    assert field == "members[0].years_to_retirement"
    [(field, reason)] = refused({"amount": "1.00", "years_to_retirement": "1990-04-01"}, glide_path=GLIDE)
    assert field == "members[0].years_to_retirement" and "birth date" in reason


@pytest.mark.parametrize(
    ("glide", "field"),
    [
        ([{"years_to_retirement": 10, "risk_aversion": 3}], "policy.glide_path"),
        ([{"years_to_retirement": 10, "risk_aversion": 3}, {"years_to_retirement": 10, "risk_aversion": 4}],
         "policy.glide_path[1].years_to_retirement"),
        ([{"years_to_retirement": -1, "risk_aversion": 3}, {"years_to_retirement": 10, "risk_aversion": 4}],
         "policy.glide_path[0].years_to_retirement"),
        ([{"years_to_retirement": 0, "risk_aversion": 3}, {"years_to_retirement": 10, "risk_aversion": 1001}],
         "policy.glide_path[1].risk_aversion"),
    ],
)
def test_a_glide_path_is_checked_when_the_plan_is_made(glide: list[dict[str, float]], field: str) -> None:
    with pytest.raises(AllocationError) as caught:
        build_policy(glide_path=glide)
    assert caught.value.field == field


# ---- human capital --------------------------------------------------------------------------


def discounted_payments(annual: float, growth: float, rate: float, years: int) -> float:
    """The definition: payment t (t = 1..n) is annual (1+g)^(t-1), paid at the end of year t."""
    return sum(annual * (1 + growth) ** (t - 1) / (1 + rate) ** t for t in range(1, years + 1))


def growing_annuity(annual: float, growth: float, rate: float, years: float) -> float:
    """The closed form the contract names (a growing annuity, as in Bodie, Merton and Samuelson 1992)."""
    if growth == rate:
        return annual * years / (1 + rate)
    return annual * (1 - ((1 + growth) / (1 + rate)) ** years) / (rate - growth)


@pytest.mark.parametrize(
    ("growth", "rate", "years"),
    [(0.0, 0.03, 25), (0.02, 0.03, 40), (0.05, 0.03, 30), (0.03, 0.03, 20), (-0.01, 0.0, 10),
     (0.2, 0.01, 60), (0.03, 0.0300000001, 35), (0.01, 0.02, 0)],
)
def test_human_capital_is_the_sum_of_the_discounted_payments(growth: float, rate: float, years: int) -> None:
    h = float(present_value(np.array([52_000.0]), np.array([growth]), rate, np.array([float(years)]))[0])
    assert h == pytest.approx(discounted_payments(52_000.0, growth, rate, years), rel=1e-11, abs=1e-9)
    if abs(rate - growth) > 1e-6:
        # Closer than that, the closed form as written cancels digits (the reason present_value
        # goes through expm1/log1p); the sum above is then the reference.
        assert h == pytest.approx(growing_annuity(52_000.0, growth, rate, years), rel=1e-9, abs=1e-9)


def test_worked_human_capital_example() -> None:
    # By hand: 50,000 a year for 2 years, no growth, discounted at 5 %:
    #   H = 50,000 / 1.05 + 50,000 / 1.05^2 = 47,619.0476 + 45,351.4739 = 92,970.5215 -> 92,970.52.
    # Account W = 100,000.00, equity-like share s = 0.2, risk aversion A = 2.5:
    #   y = (0.08 - 0.03) / (2.5 x 0.2^2) = 0.05 / 0.1 = 0.5 of total wealth;
    #   H/W = 92,970.52 / 100,000 = 0.9297052;
    #   y_account = y (1 + H/W) - s H/W = 0.5 + (0.5 - 0.2) x 0.9297052 = 0.5 + 0.27891156 = 0.77891156.
    a = answer(
        {"amount": "100000.00", "preference": {"risk_aversion": 2.5}, "years_to_retirement": 2,
         "income": {"annual": "50000.00", "growth": 0}},
        human_capital={"discount_rate": 0.05, "equity_like_share": 0.2},
    )
    assert a["human_capital"] == {"value": "92970.52", "ratio_to_account": pytest.approx(0.9297052, abs=1e-12)}
    assert a["risky_fraction"] == pytest.approx(0.77891156, abs=1e-12)
    assert a["limited_by"] is None
    assert a["amounts"] == {"risky": "77891.16", "safe": "22108.84"}


def test_the_discount_rate_defaults_to_the_mix_risk_free_rate() -> None:
    a = answer(
        {"amount": "20000.00", "preference": {"risk_aversion": 8}, "years_to_retirement": 10,
         "income": {"annual": "30000.00", "growth": 0.01}},
        human_capital={"discount_rate": None, "equity_like_share": 0.0}, max_risky_fraction=1.0,
    )
    h = growing_annuity(30_000.0, 0.01, TERMS.risk_free_rate, 10)
    assert float(a["human_capital"]["value"]) == pytest.approx(h, abs=0.005)
    y = merton(8) * (1 + round(h, 2) / 20_000)
    assert a["unconstrained_risky_fraction"] == pytest.approx(y, rel=1e-12)


def test_an_empty_account_beside_future_earnings_takes_the_band_maximum() -> None:
    a = answer(
        {"amount": "0.00", "preference": {"risk_aversion": 4}, "years_to_retirement": 30,
         "income": {"annual": "40000.00"}},
        human_capital={"equity_like_share": 0.0}, max_risky_fraction=0.9,
    )
    assert (a["risky_fraction"], a["limited_by"], a["unconstrained_risky_fraction"]) == (0.9, "max_risky_fraction", None)
    assert a["human_capital"]["ratio_to_account"] is None
    assert "maximum of 90 %" in a["explanation"]["text"]


@pytest.mark.parametrize(
    ("member", "policy", "field"),
    [
        ({"preference": {"risk_aversion": 3}, "years_to_retirement": 20, "income": {"annual": "1.00", "growth": 0.25}},
         {"human_capital": {}}, "members[0].income.growth"),
        ({"preference": {"risk_aversion": 3}, "years_to_retirement": 61, "income": {"annual": "1.00"}},
         {"human_capital": {}}, "members[0].years_to_retirement"),
        ({"preference": {"risk_aversion": 3}, "income": {"annual": "1.00"}},
         {"human_capital": {}}, "members[0].years_to_retirement"),
        ({"preference": {"risk_aversion": 3}, "years_to_retirement": 20, "income": {"annual": "1.00"}},
         {}, "members[0].income"),
        ({"preference": {"target_volatility": 0.1}, "years_to_retirement": 20, "income": {"annual": "1.00"}},
         {"human_capital": {}}, "members[0].income"),
        ({"preference": {"risk_aversion": 3}, "years_to_retirement": 20, "income": {"annual": "-5"}},
         {"human_capital": {}}, "members[0].income.annual"),
        ({"preference": {"risk_aversion": 3}, "years_to_retirement": 20, "income": {"growth": 0.01}},
         {"human_capital": {}}, "members[0].income"),
    ],
)
def test_implausible_or_unusable_income_is_refused(member: dict[str, Any], policy: dict[str, Any], field: str) -> None:
    member = {"amount": "1000.00", **member}
    assert [f for f, _ in refused(member, **policy)] == [field]


# ---- rebalancing ----------------------------------------------------------------------------

money = st.integers(0, 10**9).map(lambda u: f"{u // 100}.{u % 100:02d}")


@settings(max_examples=200, deadline=None, derandomize=True)
@given(eq=money, bd=money, safe=money, contribution=st.one_of(st.none(), money), a=st.floats(0.5, 30.0),
       band=st.sampled_from([0.0, 0.02, 0.1]))
def test_trades_reach_the_target_exactly_and_sum_to_the_contribution(
    eq: str, bd: str, safe: str, contribution: str | None, a: float, band: float
) -> None:
    member: dict[str, Any] = {"preference": {"risk_aversion": a}, "holdings_by_asset": {"EQ": eq, "BD": bd, "safe": safe}}
    if contribution is not None:
        member["contribution"] = contribution
    r = answer(member, rebalance_band=band)

    def cents(text: str) -> int:
        return round(float(text) * 100)  # at most 12 digits: exact in a double

    held = {k: cents(v) for k, v in member["holdings_by_asset"].items()}
    target = {"EQ": cents(r["by_asset"]["EQ"]), "BD": cents(r["by_asset"]["BD"]), "safe": cents(r["amounts"]["safe"])}
    total = sum(held.values()) + (cents(contribution) if contribution else 0)
    assert cents(r["amount"]) == total == sum(target.values())
    held_risky = held["EQ"] + held["BD"]
    drift = abs(held_risky / (held_risky + held["safe"]) - r["risky_fraction"]) if held_risky + held["safe"] else math.inf
    if drift <= band:
        assert r["trades"] is None
        assert "no trades" in r["explanation"]["text"]
    else:
        trades = {k: cents(v) for k, v in r["trades"].items()}
        assert sum(trades.values()) == total - sum(held.values())  # the contribution, or zero
        assert {k: held[k] + trades[k] for k in held} == target
        assert all(v.startswith(("+", "-")) or v == "0.00" for v in r["trades"].values())


def test_holdings_by_asset_must_name_every_asset_and_not_come_with_holdings() -> None:
    [(field, reason)] = refused({"preference": {"risk_aversion": 3}, "holdings_by_asset": {"EQ": "1.00", "safe": "1.00"}})
    assert field == "members[0].holdings_by_asset" and "EQ, BD, safe" in reason
    [(field, _)] = refused({
        "preference": {"risk_aversion": 3}, "holdings": {"risky": "1.00", "safe": "1.00"},
        "holdings_by_asset": {"EQ": "1.00", "BD": "0.00", "safe": "1.00"},
    })
    assert field == "members[0].holdings"
    [(field, _)] = refused({"preference": {"risk_aversion": 3}, "holdings_by_asset": {"EQ": "1.001", "BD": "0", "safe": "1"}})
    assert field == "members[0].holdings_by_asset.EQ"


# ---- explanations ---------------------------------------------------------------------------


def percent(x: float) -> str:
    """Rounded to 0.1 % for reading, without a trailing .0 (the explanation's stated rounding)."""
    text = f"{round(x * 100, 1):.1f}"
    return text[:-2] if text.endswith(".0") else text


def whole(x: float) -> str:
    return f"{round(x):,}"


def test_the_explanation_carries_the_numbers_of_the_answer() -> None:
    a = answer({"amount": "25000.00", "preference": {"risk_aversion": 6}})
    text = a["explanation"]["text"]
    assert a["explanation"]["version"] == "2026-12"
    assert "risk aversion of 6" in text
    y = a["risky_fraction"]
    assert f"{percent(y)} %" in text and f"{percent(1 - y)} %" in text
    assert whole(float(a["amounts"]["risky"])) in text and whole(float(a["amounts"]["safe"])) in text
    # The one-year range at 95 % of a normal return with the split's mean and volatility.
    z = norm.ppf(0.975)
    e, v = a["expected_return"], a["volatility"]
    assert f"a return of {percent(e - z * v)} % to {percent(e + z * v)} %" in text
    assert f"worth {whole(25000 * (1 + e - z * v))} to {whole(25000 * (1 + e + z * v))} USD" in text


def test_the_explanation_of_a_loss_bound_gives_the_chance_of_that_loss() -> None:
    pref = {"max_loss": 0.1, "confidence": 0.95, "horizon_years": 3}
    a = answer({"amount": "10000.00", "preference": pref}, max_risky_fraction=0.3)
    text = a["explanation"]["text"]
    # P(R_3 < -10 %) for R_3 ~ N(3 E[r], 3 sigma^2) at the split actually given (scipy's normal).
    chance = norm.cdf((-0.1 - 3 * a["expected_return"]) / (math.sqrt(3) * a["volatility"]))
    assert f"losing more than 10 % over 3 years is {percent(chance)} %" in text
    assert "within 5 %" in text
    assert a["limited_by"] == "max_risky_fraction" and "maximum of 30 %" in text


def test_the_explanation_names_the_glide_path_default_and_the_bound() -> None:
    a = answer({"amount": "5000.00", "years_to_retirement": 30}, glide_path=GLIDE, min_risky_fraction=0.95)
    text = a["explanation"]["text"]
    assert "glide path" in text and "30 years" in text
    assert f"risk aversion of {interpolated(GLIDE, 30):g}" in text
    assert "minimum of 95 %" in text and f"asks for {percent(merton(interpolated(GLIDE, 30)))} %" in text


def test_explanation_texts_are_json_safe_and_rounded() -> None:
    a = answer({"amount": "1234567.89", "preference": {"target_volatility": 0.123456}})
    text = a["explanation"]["text"]
    assert "12.3 %" in text and '"' not in text and "\\" not in text
    assert not re.search(r"\d\.\d{2,} %", text)  # no percentage with more than one decimal
