"""Frontier points spaced by return or by volatility, and the corner portfolios, checked against
cvxpy (the minimum-variance portfolio for each point's return, solved independently)."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.numerics import efficient_frontier
from service.numerics.frontier import SPACINGS
from tests.numerics.scenarios import scenario


def min_variance_at(inputs, target: float) -> float:  # type: ignore[no-untyped-def]
    import cvxpy as cp

    w = cp.Variable(inputs.n)
    lo, hi = inputs.lower, inputs.upper
    constraints = [cp.sum(w) == 1, inputs.expected_returns @ w == target]
    constraints += [w >= lo] if np.isfinite(lo).all() else []
    constraints += [w <= hi] if np.isfinite(hi).all() else []
    problem = cp.Problem(cp.Minimize(cp.quad_form(w, cp.psd_wrap(inputs.covariance))), constraints)
    problem.solve(solver=cp.CLARABEL)
    return float(np.sqrt(problem.value))


@pytest.mark.parametrize(("n", "case"), [(6, "long_only"), (12, "capped"), (8, "boxed")])
def test_volatility_spacing_is_even_and_on_the_frontier(n: int, case: str) -> None:
    inputs = scenario(n, 808 + n, case=case)
    frontier = efficient_frontier(inputs)
    points = frontier.sample(9, inputs, "volatility")
    vols = np.array([p.volatility for p in points])
    # Evenly spaced from the minimum-variance volatility to the top's (arithmetic).
    assert_allclose(np.diff(vols), np.full(8, (vols[-1] - vols[0]) / 8), rtol=1e-8)
    assert_allclose(vols[0], np.sqrt(frontier.corner_weights[0] @ inputs.covariance @ frontier.corner_weights[0]), rtol=1e-12)
    rets = [p.expected_return for p in points]
    assert rets == sorted(rets)
    for p in points[1:-1]:
        # Each point is the least-variance portfolio for its return (cvxpy + Clarabel, computed here).
        assert_allclose(p.volatility, min_variance_at(inputs, p.expected_return), rtol=1e-6)


def test_return_spacing_and_corners() -> None:
    inputs = scenario(10, 31, case="capped")
    frontier = efficient_frontier(inputs)
    points = frontier.sample(6, inputs, "return")
    rets = np.array([p.expected_return for p in points])
    assert_allclose(np.diff(rets), np.full(5, (rets[-1] - rets[0]) / 5), rtol=1e-10)
    corners = frontier.corners(inputs)
    assert len(corners) == frontier.corner_returns.size
    for corner, weights in zip(corners, frontier.corner_weights, strict=True):
        assert_allclose(corner.weights, weights, atol=0)
    assert SPACINGS == ("return", "volatility")
    with pytest.raises(ValueError, match="spacing"):
        frontier.sample(4, inputs, "sharpe")


def test_a_frontier_without_a_top_leaves_out_the_ray_end() -> None:
    inputs = scenario(5, 12, case="long_only")
    from service.numerics import build_inputs

    free = build_inputs(list(inputs.codes), list(inputs.expected_returns), inputs.risk_free_rate,
                        covariance=inputs.covariance.tolist(), long_only=False)
    frontier = efficient_frontier(free)
    assert frontier.unbounded_above
    assert len(frontier.corners(free)) == frontier.corner_returns.size - 1
    vols = [p.volatility for p in frontier.sample(5, free, "volatility")]
    assert_allclose(np.diff(vols), np.full(4, (vols[-1] - vols[0]) / 4), rtol=1e-8)
