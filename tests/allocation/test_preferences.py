"""Risky fraction from each preference (the pipeline's rules), checked against closed forms and scipy computed here."""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import optimize, stats

from service.allocation import AllocationError, AllocationLine, build_policy

from .one_member import aversion, choose, loss_tolerance, score, target

LINE = AllocationLine(risk_free_rate=0.03, tangency_return=0.08, tangency_volatility=0.16)
NO_LEVERAGE = build_policy()


def utility_argmax(line: AllocationLine, a: float, hi: float) -> float:
    """Reference: maximise U(y) = E[r](y) - A/2 sigma(y)^2 numerically over [0, hi] (scipy)."""
    res = optimize.minimize_scalar(
        lambda y: -(line.expected_return(y) - 0.5 * a * line.volatility(y) ** 2),
        bounds=(0.0, hi), method="bounded", options={"xatol": 1e-12},
    )
    return float(res.x)


def test_textbook_risk_aversion_example() -> None:
    # Bodie, Kane & Marcus, Investments, ch. 6 (from memory): E(r_P) = 15 %, sigma_P = 22 %,
    # rf = 7 %, A = 4 give y* = 0.08 / (4 x 0.22^2) = 0.41.
    line = AllocationLine(0.07, 0.15, 0.22)
    choice = choose(aversion(4.0), line, NO_LEVERAGE)
    assert_allclose(choice.risky_fraction, 0.41, atol=0.005)
    assert choice.limited_by is None


@pytest.mark.parametrize("a", [0.5, 1.0, 2.0, 4.0, 10.0, 50.0])
def test_risk_aversion_matches_closed_form_and_scipy(a: float) -> None:
    choice = choose(aversion(a), LINE, build_policy(max_risky_fraction=3.0, borrowing_rate=0.03))
    # Closed form: first-order condition of U = E - A/2 sigma^2 on a straight line (rf = r_b here).
    assert_allclose(choice.unconstrained_risky_fraction, 0.05 / (a * 0.16**2), rtol=1e-12)
    # scipy reference on the same utility.
    assert_allclose(choice.risky_fraction, utility_argmax(LINE, a, 3.0), atol=1e-6)


def test_risk_aversion_zero_takes_the_policy_maximum() -> None:
    choice = choose(aversion(0.0), LINE, NO_LEVERAGE)
    assert (choice.risky_fraction, choice.unconstrained_risky_fraction, choice.limited_by) == (
        1.0, None, "max_risky_fraction")


def test_policy_band_clips_and_names_the_bound() -> None:
    policy = build_policy(min_risky_fraction=0.2, max_risky_fraction=0.7)
    low = choose(aversion(100.0), LINE, policy)   # closed form 0.0195 < 0.2
    assert (low.risky_fraction, low.limited_by) == (0.2, "min_risky_fraction")
    assert_allclose(low.unconstrained_risky_fraction, 0.05 / (100 * 0.0256), rtol=1e-12)
    high = choose(aversion(1.0), LINE, policy)    # closed form 1.95 > 0.7
    assert (high.risky_fraction, high.limited_by) == (0.7, "max_risky_fraction")


class TestLeverageKink:
    # Borrowing at r_b > rf bends the line at y = 1 (closed form: y = max(1, (mu_T - r_b)/(A s^2))).
    BORROW = build_policy(max_risky_fraction=2.0, borrowing_rate=0.05)
    LINE_B = AllocationLine(0.03, 0.08, 0.16, borrowing_rate=0.05)

    @pytest.mark.parametrize("a", [0.6, 0.8, 1.0, 1.2, 1.5, 1.9, 2.5, 4.0])
    def test_kinked_line_matches_scipy(self, a: float) -> None:
        choice = choose(aversion(a), self.LINE_B, self.BORROW)
        assert_allclose(choice.risky_fraction, utility_argmax(self.LINE_B, a, 2.0), atol=1e-6)

    def test_thresholds(self) -> None:
        s2 = 0.16**2
        # Lending answer exactly 1 at A = (mu - rf)/s^2; borrowing answer 1 at A = (mu - r_b)/s^2.
        a_lend, a_borrow = 0.05 / s2, 0.03 / s2
        assert_allclose(choose(aversion(a_lend), self.LINE_B, self.BORROW).risky_fraction, 1.0, rtol=1e-12)
        # Between the two thresholds the member sits at the kink y = 1.
        mid = choose(aversion((a_lend + a_borrow) / 2), self.LINE_B, self.BORROW)
        assert mid.risky_fraction == 1.0 and mid.limited_by is None
        # Below a_borrow the borrowing piece's own optimum applies, until the policy cap binds.
        low = choose(aversion(a_borrow * 0.8), self.LINE_B, self.BORROW)
        assert_allclose(low.risky_fraction, 0.03 / (a_borrow * 0.8 * s2), rtol=1e-12)
        capped = choose(aversion(a_borrow * 0.3), self.LINE_B, self.BORROW)
        assert (capped.risky_fraction, capped.limited_by) == (2.0, "max_risky_fraction")

    def test_no_borrowing_policy_caps_at_one(self) -> None:
        choice = choose(aversion(0.5), LINE, NO_LEVERAGE)
        assert (choice.risky_fraction, choice.limited_by) == (1.0, "max_risky_fraction")
        assert_allclose(choice.unconstrained_risky_fraction, 0.05 / (0.5 * 0.0256), rtol=1e-12)

    def test_kinked_expected_return(self) -> None:
        # On the borrowing piece E = mu_T + (y - 1)(mu_T - r_b): at y = 1.5, 0.08 + 0.5 * 0.03.
        assert_allclose(self.LINE_B.expected_return(1.5), 0.095, rtol=1e-12)
        assert_allclose(self.LINE_B.expected_return(0.5), 0.055, rtol=1e-12)

    def test_target_volatility_above_one_is_capped(self) -> None:
        choice = choose(target(0.40), self.LINE_B, self.BORROW)  # 0.40/0.16 = 2.5
        assert (choice.risky_fraction, choice.limited_by) == (2.0, "max_risky_fraction")
        assert_allclose(choice.unconstrained_risky_fraction, 2.5, rtol=1e-12)


def test_target_volatility_closed_form() -> None:
    choice = choose(target(0.12), LINE, NO_LEVERAGE)
    assert_allclose(choice.risky_fraction, 0.12 / 0.16, rtol=1e-15)  # y = s / sigma_T
    assert_allclose(LINE.volatility(choice.risky_fraction), 0.12, rtol=1e-15)


class TestLossTolerance:
    @pytest.mark.parametrize(("loss", "conf", "horizon"), [(0.10, 0.95, 1.0), (0.05, 0.99, 1.0), (0.15, 0.9, 3.0), (0.2, 0.975, 0.5)])
    def test_binding_probability_equals_one_minus_confidence(self, loss: float, conf: float, horizon: float) -> None:
        choice = choose(loss_tolerance(loss, conf, horizon), LINE, build_policy(max_risky_fraction=3, borrowing_rate=0.03))
        y = choice.unconstrained_risky_fraction
        assert y is not None
        mean, sd = horizon * LINE.expected_return(y), math.sqrt(horizon) * LINE.volatility(y)
        # Reference: scipy's normal CDF; at the largest admissible y the criterion binds exactly.
        assert_allclose(stats.norm.cdf(-loss, loc=mean, scale=sd), 1 - conf, rtol=1e-9)
        worse = y * 1.001
        assert stats.norm.cdf(-loss, horizon * LINE.expected_return(worse), math.sqrt(horizon) * LINE.volatility(worse)) > 1 - conf

    def test_borrowing_piece(self) -> None:
        line = AllocationLine(0.03, 0.08, 0.16, borrowing_rate=0.05)
        policy = build_policy(max_risky_fraction=3.0, borrowing_rate=0.05)
        choice = choose(loss_tolerance(0.35, 0.95), line, policy)
        y = choice.risky_fraction
        assert y > 1.0
        # Reference: scipy's brentq on the kinked line's criterion P(R < -L) - (1 - c) = 0.
        f = lambda v: stats.norm.cdf(-0.35, line.expected_return(v), line.volatility(v)) - 0.05
        assert_allclose(y, optimize.brentq(f, 1.0, 3.0, xtol=1e-14), rtol=1e-9)

    def test_never_binding_takes_the_maximum(self) -> None:
        # z * sigma_T < mu_T - rf: a line so steep that more risk never raises the loss quantile.
        steep = AllocationLine(0.03, 0.50, 0.10)
        choice = choose(loss_tolerance(0.1, 0.9), steep, NO_LEVERAGE)
        assert (choice.risky_fraction, choice.unconstrained_risky_fraction, choice.limited_by) == (1.0, None, "max_risky_fraction")

    @pytest.mark.parametrize(("loss", "conf", "field"), [(0.0, 0.95, "preference.max_loss"), (-0.1, 0.95, "preference.max_loss"), (0.1, 0.5, "preference.confidence"), (0.1, 1.0, "preference.confidence"), (0.1, 0.3, "preference.confidence")])
    def test_refusals(self, loss: float, conf: float, field: str) -> None:
        with pytest.raises(AllocationError) as info:
            choose(loss_tolerance(loss, conf), LINE, NO_LEVERAGE)
        assert info.value.field == field


class TestRiskScore:
    POLICY = build_policy(risk_score_table={"1": 10.0, "2": 5.0, "3": 2.5})

    def test_table_maps_to_risk_aversion(self) -> None:
        by_score = choose(score(2), LINE, self.POLICY)
        by_a = choose(aversion(5.0), LINE, self.POLICY)
        assert by_score == by_a

    def test_unknown_score_names_the_table(self) -> None:
        with pytest.raises(AllocationError, match="is not a score of the plan's risk_score_table") as info:
            choose(score(7), LINE, self.POLICY)
        assert info.value.field == "preference.risk_score"

    def test_plan_without_table(self) -> None:
        with pytest.raises(AllocationError, match="no risk_score_table"):
            choose(score(1), LINE, NO_LEVERAGE)


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"max_risky_fraction": 1.5}, "policy.borrowing_rate"),
        ({"min_risky_fraction": -0.1}, "policy.min_risky_fraction"),
        ({"min_risky_fraction": 0.8, "max_risky_fraction": 0.5}, "policy.max_risky_fraction"),
        ({"max_risky_fraction": 10.0, "borrowing_rate": 0.05}, "policy.max_risky_fraction"),
        ({"risk_score_table": {"x": 3.0}}, "policy.risk_score_table.x"),
        ({"risk_score_table": {"1": -3.0}}, "policy.risk_score_table.1"),
        ({"borrowing_rate": float("nan")}, "policy.borrowing_rate"),
    ],
)
def test_policy_refusals(kwargs: dict[str, object], field: str) -> None:
    with pytest.raises(AllocationError) as info:
        build_policy(**kwargs)  # type: ignore[arg-type]
    assert info.value.field == field


def test_random_lines_agree_with_scipy() -> None:
    rng = np.random.default_rng(20261201)
    for _ in range(25):
        rf = rng.uniform(0.0, 0.04)
        mu = rf + rng.uniform(0.01, 0.08)
        vol = rng.uniform(0.05, 0.3)
        rb = rf + rng.uniform(0.0, 0.03)
        a = rng.uniform(0.3, 12.0)
        line = AllocationLine(rf, mu, vol, borrowing_rate=rb)
        choice = choose(aversion(a), line, build_policy(max_risky_fraction=2.5, borrowing_rate=rb))
        assert_allclose(choice.risky_fraction, utility_argmax(line, a, 2.5), atol=1e-6)
