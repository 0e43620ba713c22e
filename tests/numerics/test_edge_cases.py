"""Degenerate sizes and shapes: one asset, no choice left by the bounds, fixed weights,
ties in expected return, a max-return vertex with no free asset, and the primal
active-set fallback agreeing with the primal-dual iteration."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

import service.numerics.active_set as active_set
from service.numerics import InputError, build_inputs, efficient_frontier, min_variance, solve_mix, tangency
from service.numerics.active_set import BoxProblem, tangency_kkt_residual
from service.numerics.frontier import best_sharpe_on_frontier
from service.numerics.max_return import FREE
from tests.numerics.scenarios import scenario


def test_one_asset() -> None:
    inputs = build_inputs(["ONLY"], [0.06], 0.02, volatilities=[0.1], correlation=[[1.0]])
    solved = solve_mix(inputs)
    assert solved.tangency.method == "only_feasible"
    assert_allclose(solved.tangency.weights, [1.0], rtol=0, atol=0)
    # Sharpe ratio of a single asset: (0.06 - 0.02) / 0.1 by definition.
    assert_allclose(solved.tangency.sharpe_ratio, 0.4, rtol=1e-15)
    assert solved.frontier.corner_returns.size == 1
    assert_allclose(solved.frontier.weights_at(0.06), [1.0], rtol=0, atol=0)
    with pytest.raises(ValueError, match="single portfolio"):
        solved.frontier.weights_at(0.07)
    assert len(solved.frontier.sample(3, inputs)) == 3
    assert all(abs(c.sharpe_gap) < 1e-12 for c in solved.cross_checks)
    with pytest.raises(InputError, match="risk-free rate 0.07: best expected return 0.06"):
        tangency(build_inputs(["ONLY"], [0.06], 0.07, volatilities=[0.1], correlation=[[1.0]]))


def test_all_bounds_tight() -> None:
    inputs = build_inputs(["A", "B", "C"], [0.05, 0.06, 0.07], 0.01, volatilities=[0.1, 0.12, 0.15],
                          correlation=np.eye(3).tolist(), bounds={"A": (0.2, 0.2), "B": (0.3, 0.3), "C": (0.5, 0.5)})
    best, residual = tangency(inputs)
    assert best.method == "only_feasible" and residual <= 1e-15
    assert_allclose(best.weights, [0.2, 0.3, 0.5], rtol=0, atol=0)
    assert min_variance(inputs).method == "only_feasible"
    assert efficient_frontier(inputs).corner_returns.size == 1


@pytest.mark.parametrize("side", ["lower", "upper"])
def test_bounds_that_sum_to_one(side: str) -> None:
    codes = ["A", "B", "C", "D"]
    pairs = [(0.1, 0.6), (0.2, 0.5), (0.3, 0.9), (0.4, 0.7)] if side == "lower" else \
            [(0.0, 0.1), (0.0, 0.2), (0.0, 0.3), (0.0, 0.4)]
    inputs = build_inputs(codes, [0.05, 0.06, 0.07, 0.08], 0.01, volatilities=[0.1, 0.12, 0.15, 0.2],
                          correlation=np.eye(4).tolist(), bounds=dict(zip(codes, pairs, strict=True)))
    best, _ = tangency(inputs)
    expected = [p[0] for p in pairs] if side == "lower" else [p[1] for p in pairs]
    assert best.method == "only_feasible"
    assert_allclose(best.weights, expected, rtol=0, atol=0)


def test_ties_in_expected_return_and_a_vertex_top() -> None:
    # Four assets, caps 0.5: the max-return portfolio fills the two best exactly (no free asset),
    # and two assets share an expected return.
    codes = ["A", "B", "C", "D"]
    rng = np.random.default_rng(5)
    x = rng.normal(size=(4, 6))
    cov = (x @ x.T) / 6 * 0.02 + np.eye(4) * 0.01
    inputs = build_inputs(codes, [0.09, 0.09, 0.05, 0.04], 0.01, covariance=cov.tolist(),
                          bounds={c: (0.0, 0.5) for c in codes})
    frontier = efficient_frontier(inputs)
    best, residual = tangency(inputs)
    assert residual <= 1e-10
    assert_allclose(frontier.corner_weights[-1], [0.5, 0.5, 0.0, 0.0], rtol=0, atol=1e-12)
    assert_allclose(best_sharpe_on_frontier(frontier, inputs), best.weights, rtol=0, atol=1e-9)
    assert np.all(np.diff(frontier.corner_returns) > 0)


@pytest.mark.parametrize(("n", "case", "seed"), [(8, "long_only", 1), (25, "capped", 2), (40, "boxed", 3),
                                                 (60, "capped", 4), (120, "long_only", 5)])
def test_primal_fallback_agrees_with_the_primal_dual_iteration(n: int, case: str, seed: int,
                                                               monkeypatch: pytest.MonkeyPatch) -> None:
    inputs = scenario(n, seed, case=case)
    fast, fast_residual = tangency(inputs)
    fast_low = min_variance(inputs)
    monkeypatch.setattr(active_set, "_pdas", lambda *args, **kwargs: None)
    slow, slow_residual = tangency(inputs)
    slow_low = min_variance(inputs)
    assert fast_residual <= 1e-10 and slow_residual <= 1e-10
    assert_allclose(slow.weights, fast.weights, rtol=0, atol=1e-10)
    assert_allclose(slow_low.weights, fast_low.weights, rtol=0, atol=1e-10)


def test_kkt_check_rejects_a_wrong_answer() -> None:
    inputs = scenario(15, 6, case="capped")
    best, residual = tangency(inputs)
    excess = inputs.expected_returns - inputs.risk_free_rate
    state = np.full(inputs.n, FREE, dtype=np.int8)
    state[best.weights <= inputs.lower] = -1
    state[best.weights >= inputs.upper] = 1
    exact = tangency_kkt_residual(inputs.covariance, excess, inputs.lower, inputs.upper, best.weights, state, 0.0)
    assert exact <= 1e-10
    nudged = best.weights.copy()
    free = np.flatnonzero(state == FREE)
    nudged[free[0]] += 1e-6
    nudged[free[1]] -= 1e-6
    assert tangency_kkt_residual(inputs.covariance, excess, inputs.lower, inputs.upper, nudged, state, 0.0) > 1e-10


def test_singular_face_is_reported_not_guessed() -> None:
    inputs = scenario(5, 2, case="long_only")
    problem = BoxProblem(inputs.covariance, inputs.lower, inputs.upper,
                         inputs.expected_returns - inputs.risk_free_rate)
    assert problem.solve_face(np.full(5, -1, dtype=np.int8)) is None  # no free asset: no face to solve


@pytest.mark.parametrize(("n", "case", "seed"), [(60, "capped", 7), (150, "boxed", 8), (200, "long_only", 9)])
def test_reported_residual_holds_against_a_dense_recomputation(n: int, case: str, seed: int) -> None:
    # The iteration carries S c incrementally; recompute S w densely (numpy) and re-check.
    inputs = scenario(n, seed, case=case)
    best, residual = tangency(inputs)
    w = best.weights
    state = np.full(n, FREE, dtype=np.int8)
    state[w == inputs.lower] = -1
    state[w == inputs.upper] = 1
    excess = inputs.expected_returns - inputs.risk_free_rate
    dense = tangency_kkt_residual(inputs.covariance, excess, inputs.lower, inputs.upper, w, state, 0.0)
    assert residual <= 1e-10 and dense <= 1e-10
    assert_allclose(best.volatility ** 2, w @ inputs.covariance @ w, rtol=1e-12)
