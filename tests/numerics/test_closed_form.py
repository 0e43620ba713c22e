"""Closed-form identities of the unbounded mean-variance problem and a textbook example.

Identities: Merton 1972, "An analytic derivation of the efficient portfolio frontier"
(J. Financial and Quantitative Analysis 7(4)). With A = 1'S^-1 1, B = 1'S^-1 mu,
C = mu'S^-1 mu, D = AC - B^2, the minimum variance at return m is
sigma^2(m) = (A m^2 - 2 B m + C) / D.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.numerics import build_inputs, efficient_frontier, min_variance, solve_mix, tangency
from tests.numerics.scenarios import scenario

SEEDS = [3, 17, 29]


def merton_constants(s: np.ndarray, mu: np.ndarray) -> tuple[float, float, float, float]:
    ones = np.ones(mu.size)
    s_inv_1 = np.linalg.solve(s, ones)
    s_inv_mu = np.linalg.solve(s, mu)
    a, b, c = float(ones @ s_inv_1), float(ones @ s_inv_mu), float(mu @ s_inv_mu)
    return a, b, c, a * c - b * b


def min_variance_at(s: np.ndarray, mu: np.ndarray, m: float) -> np.ndarray:
    """Minimum-variance weights at return m from the bordered KKT system (numpy.linalg.solve)."""
    n = mu.size
    kkt = np.zeros((n + 2, n + 2))
    kkt[:n, :n] = 2.0 * s
    kkt[:n, n] = kkt[n, :n] = mu
    kkt[:n, n + 1] = kkt[n + 1, :n] = 1.0
    rhs = np.zeros(n + 2)
    rhs[n], rhs[n + 1] = m, 1.0
    return np.linalg.solve(kkt, rhs)[:n]


@pytest.mark.parametrize("seed", SEEDS)
def test_tangency_is_the_merton_formula(seed: int) -> None:
    inputs = scenario(12, seed, case="unbounded")
    portfolio, residual = tangency(inputs)
    excess = inputs.expected_returns - inputs.risk_free_rate
    # Merton 1972: w_T = S^-1 (mu - rf) / 1'S^-1 (mu - rf), here via numpy.linalg.solve.
    raw = np.linalg.solve(inputs.covariance, excess)
    assert portfolio.method == "closed_form"
    assert_allclose(portfolio.weights, raw / raw.sum(), rtol=1e-10, atol=1e-12)
    assert residual <= 1e-10


@pytest.mark.parametrize("seed", SEEDS)
def test_tangency_sharpe_squared_is_e_sinv_e(seed: int) -> None:
    inputs = scenario(12, seed, case="unbounded")
    portfolio, _ = tangency(inputs)
    excess = inputs.expected_returns - inputs.risk_free_rate
    # Identity: Sharpe_T^2 = (mu - rf)' S^-1 (mu - rf) for the unbounded tangency.
    assert_allclose(portfolio.sharpe_ratio ** 2, excess @ np.linalg.solve(inputs.covariance, excess), rtol=1e-10)


@pytest.mark.parametrize("seed", SEEDS)
def test_min_variance_is_the_merton_formula(seed: int) -> None:
    inputs = scenario(12, seed, case="unbounded")
    portfolio = min_variance(inputs)
    raw = np.linalg.solve(inputs.covariance, np.ones(inputs.n))
    # Merton 1972: w_mv = S^-1 1 / 1'S^-1 1; its variance is 1 / A and its return B / A.
    a, b, _, _ = merton_constants(inputs.covariance, inputs.expected_returns)
    assert portfolio.method == "closed_form"
    assert_allclose(portfolio.weights, raw / raw.sum(), rtol=1e-10, atol=1e-12)
    assert_allclose(portfolio.volatility ** 2, 1.0 / a, rtol=1e-10)
    assert_allclose(portfolio.expected_return, b / a, rtol=1e-10)


@pytest.mark.parametrize("seed", SEEDS)
def test_two_fund_theorem(seed: int) -> None:
    inputs = scenario(10, seed, case="unbounded")
    s, mu = inputs.covariance, inputs.expected_returns
    frontier = efficient_frontier(inputs)
    m_low = float(frontier.corner_returns[0])
    m1, m2, m = m_low + 0.01, m_low + 0.05, m_low + 0.13
    w1, w2, w = (min_variance_at(s, mu, x) for x in (m1, m2, m))
    # Two-fund theorem (Merton 1972): any frontier portfolio is an affine combination of two others.
    share = (m - m2) / (m1 - m2)
    assert_allclose(w, share * w1 + (1.0 - share) * w2, rtol=1e-9, atol=1e-11)
    # ... and the frontier object reproduces each independently solved point.
    for target, expected in ((m1, w1), (m2, w2), (m, w)):
        assert_allclose(frontier.weights_at(target), expected, rtol=1e-9, atol=1e-11)


@pytest.mark.parametrize("seed", SEEDS)
def test_frontier_variance_is_the_merton_hyperbola(seed: int) -> None:
    inputs = scenario(10, seed, case="unbounded")
    a, b, c, d = merton_constants(inputs.covariance, inputs.expected_returns)
    for point in efficient_frontier(inputs).sample(7, inputs):
        m = point.expected_return
        # Merton 1972: sigma^2(m) = (A m^2 - 2 B m + C) / D.
        assert_allclose(point.volatility ** 2, (a * m * m - 2 * b * m + c) / d, rtol=1e-9)


@pytest.mark.parametrize("seed", SEEDS)
def test_allocation_line_is_tangent_at_the_tangency(seed: int) -> None:
    inputs = scenario(10, seed, case="unbounded")
    a, b, _, d = merton_constants(inputs.covariance, inputs.expected_returns)
    best, _ = tangency(inputs)
    m, sigma = best.expected_return, best.volatility
    # On sigma^2 = (A m^2 - 2 B m + C)/D: d sigma / d m = (A m - B) / (D sigma). The capital
    # allocation line through (0, rf) has slope (m - rf)/sigma = Sharpe; tangency means it
    # equals the frontier slope d m / d sigma there.
    frontier_slope = d * sigma / (a * m - b)
    assert_allclose(best.sharpe_ratio, frontier_slope, rtol=1e-9)
    # and no frontier point lies above the line
    for point in efficient_frontier(inputs).sample(25, inputs):
        assert point.expected_return <= inputs.risk_free_rate + best.sharpe_ratio * point.volatility + 1e-12


def test_two_asset_textbook_example() -> None:
    # Bodie, Kane & Marcus, "Investments", ch. 7 (optimal risky portfolio of a bond fund D and
    # a stock fund E), from memory: E(r_D) = 8 %, sigma_D = 12 %, E(r_E) = 13 %, sigma_E = 20 %,
    # rho = 0.3, r_f = 5 %. Tangency: w_D = 0.40, w_E = 0.60, E(r_P) = 11 %, sigma_P = 14.2 %,
    # Sharpe 0.42. Minimum variance: w_D = 0.82, w_E = 0.18, E(r) = 8.90 %, sigma = 11.45 %.
    for long_only in (True, False):
        inputs = build_inputs(["BOND_FUND", "STOCK_FUND"], [0.08, 0.13], 0.05, volatilities=[0.12, 0.20],
                              correlation=[[1.0, 0.3], [0.3, 1.0]], long_only=long_only)
        best, _ = tangency(inputs)
        assert_allclose(best.weights, [0.40, 0.60], atol=1e-12)
        assert_allclose(best.expected_return, 0.11, atol=1e-12)
        assert_allclose(best.volatility, 0.142, atol=5e-4)      # the book rounds to 14.2 %
        assert_allclose(best.sharpe_ratio, 0.42, atol=5e-3)     # the book rounds to 0.42
        low = min_variance(inputs)
        assert_allclose(low.weights, [0.82, 0.18], atol=1e-12)
        assert_allclose(low.expected_return, 0.089, atol=1e-12)
        assert_allclose(low.volatility, 0.1145, atol=5e-5)      # the book rounds to 11.45 %


def test_two_asset_closed_form_weight() -> None:
    # Two-asset tangency weight (the textbook closed form, e.g. Bodie-Kane-Marcus ch. 7):
    # w_1 = [R1 s2^2 - R2 c] / [R1 s2^2 + R2 s1^2 - (R1 + R2) c], R = excess returns, c = covariance.
    rng = np.random.default_rng(11)
    for _ in range(5):
        s1, s2 = rng.uniform(0.05, 0.3, 2)
        rho = rng.uniform(-0.5, 0.8)
        r1, r2 = rng.uniform(0.01, 0.08, 2)
        rf = 0.02
        inputs = build_inputs(["X", "Y"], [rf + r1, rf + r2], rf, volatilities=[s1, s2],
                              correlation=[[1.0, rho], [rho, 1.0]], long_only=False)
        c = rho * s1 * s2
        w1 = (r1 * s2 ** 2 - r2 * c) / (r1 * s2 ** 2 + r2 * s1 ** 2 - (r1 + r2) * c)
        best, _ = tangency(inputs)
        assert_allclose(best.weights, [w1, 1.0 - w1], rtol=1e-10, atol=1e-12)


def test_unbounded_frontier_is_two_corners_and_extends_upwards() -> None:
    inputs = scenario(8, 5, case="unbounded")
    frontier = efficient_frontier(inputs)
    best, _ = tangency(inputs)
    low = min_variance(inputs)
    assert frontier.unbounded_above and frontier.corner_returns.size == 2
    assert_allclose(frontier.corner_weights[0], low.weights, rtol=1e-12, atol=1e-14)
    assert_allclose(frontier.corner_weights[1], best.weights, rtol=1e-12, atol=1e-14)
    far = float(frontier.corner_returns[1]) + 0.2
    assert_allclose(frontier.weights_at(far),
                    min_variance_at(inputs.covariance, inputs.expected_returns, far), rtol=1e-9, atol=1e-11)
    top = frontier.sample(3, inputs)[-1].expected_return
    # Documented top of an unbounded sample: m0 + 1.5 (max(tangency return, max mu) - m0).
    reach = max(best.expected_return, float(inputs.expected_returns.max()))
    assert math.isclose(top, low.expected_return + 1.5 * (reach - low.expected_return), rel_tol=1e-12)


def test_solve_mix_unbounded_reports_closed_form() -> None:
    solved = solve_mix(scenario(6, 2, case="unbounded"), cross_check=False)
    assert solved.tangency.method == "closed_form" and solved.min_variance.method == "closed_form"
    assert solved.kkt_residual <= 1e-10
    assert solved.cross_checks == ()
