"""The bounded efficient frontier from the critical line algorithm.

Checks: corners increase in return and volatility; every interpolated point is feasible;
the frontier at the tangency's return is the tangency; the first corner is the minimum-
variance portfolio; the best Sharpe ratio on the frontier (closed form per segment) is the
active-set tangency - two independent exact methods agreeing.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.numerics import efficient_frontier, min_variance, tangency
from service.numerics.frontier import best_sharpe_on_frontier
from tests.numerics.scenarios import scenario

CASES = [(n, case, seed) for n in (3, 8, 25, 60) for case in ("long_only", "capped", "boxed") for seed in (4, 9)]


@pytest.mark.parametrize(("n", "case", "seed"), CASES)
def test_corners_rise_in_return_and_risk(n: int, case: str, seed: int) -> None:
    inputs = scenario(n, seed * 100 + n, case=case)
    frontier = efficient_frontier(inputs)
    returns = frontier.corner_returns
    vols = np.sqrt(np.einsum("ki,ij,kj->k", frontier.corner_weights, inputs.covariance, frontier.corner_weights))
    assert not frontier.unbounded_above
    assert np.all(np.diff(returns) > 0)
    assert np.all(np.diff(vols) > 0)
    # The top corner is the highest-return feasible portfolio (greedy fill by return: an LP).
    assert_allclose(returns[-1], _max_return(inputs), rtol=0, atol=1e-12)


def _max_return(inputs) -> float:  # type: ignore[no-untyped-def]
    order = np.argsort(-inputs.expected_returns)
    w = inputs.lower.copy()
    budget = 1.0 - w.sum()
    for i in order:
        add = min(inputs.upper[i] - w[i], budget)
        w[i] += add
        budget -= add
    return float(inputs.expected_returns @ w)


@pytest.mark.parametrize(("n", "case", "seed"), CASES)
def test_interpolated_points_are_feasible(n: int, case: str, seed: int) -> None:
    inputs = scenario(n, seed * 100 + n, case=case)
    frontier = efficient_frontier(inputs)
    for point in frontier.sample(41, inputs):
        w = point.weights
        assert abs(w.sum() - 1.0) <= 1e-12
        assert np.all(w >= inputs.lower - 1e-12) and np.all(w <= inputs.upper + 1e-12)
    lo, hi = float(frontier.corner_returns[0]), float(frontier.corner_returns[-1])
    with pytest.raises(ValueError, match="below the minimum-variance return"):
        frontier.weights_at(lo - 1e-3)
    with pytest.raises(ValueError, match="above the top of the frontier"):
        frontier.weights_at(hi + 1e-3)


@pytest.mark.parametrize(("n", "case", "seed"), CASES)
def test_frontier_meets_tangency_and_min_variance(n: int, case: str, seed: int) -> None:
    inputs = scenario(n, seed * 100 + n, case=case)
    frontier = efficient_frontier(inputs)
    best, _ = tangency(inputs)
    low = min_variance(inputs)
    assert_allclose(frontier.corner_weights[0], low.weights, rtol=0, atol=1e-12)
    assert_allclose(frontier.corner_returns[0], low.expected_return, rtol=0, atol=1e-14)
    assert_allclose(frontier.weights_at(best.expected_return), best.weights, rtol=0, atol=1e-9)
    # Critical-line tangency (closed-form maximum per segment) == active-set tangency.
    assert_allclose(best_sharpe_on_frontier(frontier, inputs), best.weights, rtol=0, atol=1e-9)


def test_sample_spacing_and_sharpe() -> None:
    inputs = scenario(20, 5, case="capped")
    frontier = efficient_frontier(inputs)
    points = frontier.sample(9, inputs)
    returns = np.array([p.expected_return for p in points])
    assert_allclose(np.diff(returns), np.full(8, (returns[-1] - returns[0]) / 8), rtol=1e-9)
    best, _ = tangency(inputs)
    # No frontier point beats the tangency's Sharpe ratio (it is the maximum over the set).
    assert max(p.sharpe_ratio for p in points) <= best.sharpe_ratio + 1e-12
    assert all(p.method == "frontier" for p in points)
    with pytest.raises(ValueError):
        frontier.sample(0, inputs)
