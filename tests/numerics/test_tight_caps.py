"""Large mixes with tight caps: the tangency needs no primal fallback, the critical line's
incremental inverse gives the corners a fresh factorisation gives, and solve_mix's shared
minimum-variance start changes nothing.

Problem family (seeded, invented): N asset classes on a 3-factor covariance, long only,
every weight capped at ``cap``. At N = 200, cap 0.05 the tangency holds about a hundred
assets with a few at the cap, and the greedy warm start used to land on a vertex with a
negative excess return (the primal-dual iteration then could not start); at N = 400,
cap 0.0075 two thirds of the budget sits at caps and the capped-release iteration stalls.

References: cvxpy + Clarabel (Charnes-Cooper QP, as in test_reference), scipy's LAPACK
Cholesky (refactorising the free block at every corner), the scale-free KKT residual.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

import service.numerics.active_set as active_set
import service.numerics.frontier as frontier_module
from service.numerics import MixInputs, build_inputs, efficient_frontier, min_variance, solve_mix, tangency
from service.numerics.active_set import BoxProblem, solve_box_problem
from service.numerics.exact import min_variance_with_solution
from service.numerics.frontier import best_sharpe_on_frontier, frontier_from_min_variance
from service.numerics.max_return import max_return_vertex
from service.numerics.warm_start import tangency_start

RISK_FREE_RATE = 0.02


def capped_mix(n: int, cap: float, seed: int) -> MixInputs:
    rng = np.random.default_rng(seed)
    loadings = rng.normal(size=(n, 3)) * np.array([0.15, 0.08, 0.05])
    cov = loadings @ loadings.T + np.diag(rng.uniform(0.01, 0.05, n) ** 2)
    mu = RISK_FREE_RATE + loadings @ np.array([0.06, 0.04, 0.02]) + rng.normal(0.0, 0.01, n)
    codes = [f"CLASS_{i:03d}" for i in range(n)]
    return build_inputs(codes, mu, RISK_FREE_RATE, covariance=cov, bounds={c: (0.0, cap) for c in codes})


def _no_primal(*args: object, **kwargs: object) -> None:
    raise AssertionError("the primal active-set fallback ran")


CASES = [(200, 0.05, 200), (200, 0.05, 201), (200, 0.02, 7), (400, 0.0075, 414), (400, 0.0075, 456)]


@pytest.mark.parametrize(("n", "cap", "seed"), CASES)
def test_tangency_needs_no_primal_fallback(n: int, cap: float, seed: int, monkeypatch: pytest.MonkeyPatch) -> None:
    inputs = capped_mix(n, cap, seed)
    excess = inputs.expected_returns - inputs.risk_free_rate
    monkeypatch.setattr(active_set, "_primal", _no_primal)
    solution = solve_box_problem(BoxProblem(inputs.covariance, inputs.lower, inputs.upper, excess),
                                 tangency_start(inputs, excess))
    assert solution.route == "pdas"
    # Each attempt stops at min(4 n + 10, 200) iterations; converging ones take about ten.
    assert solution.iterations <= 30
    assert solution.kkt_residual <= 1e-10
    best, residual = tangency(inputs)
    assert residual <= 1e-10
    assert_array_equal(best.weights, solution.weights)
    assert np.count_nonzero(best.weights == cap) >= 1  # the caps bind (the case this covers)


@pytest.mark.parametrize(("n", "cap", "seed"), CASES[:3])
def test_tight_cap_tangency_matches_clarabel(n: int, cap: float, seed: int) -> None:
    from tests.numerics.test_reference import reference_tangency, sharpe

    inputs = capped_mix(n, cap, seed)
    ours, residual = tangency(inputs)
    ref = reference_tangency(inputs)
    assert residual <= 1e-10
    assert_allclose(ours.weights, ref, rtol=0, atol=1e-6)
    # The exact answer can only be at least as good as the interior-point one.
    assert ours.sharpe_ratio >= sharpe(inputs, ref) - 1e-9


@pytest.mark.parametrize("seed", range(12))
def test_warm_start_keeps_a_positive_excess_return(seed: int) -> None:
    # The greedy own-Sharpe vertex earns more than the risk-free rate here; the re-ranked
    # guess must too (its homogenised face would otherwise have t < 0). Excess returns
    # and the vertex are recomputed here with numpy from the returned active set.
    inputs = capped_mix(200, [0.05, 0.02, 0.01][seed % 3], 1000 + seed)
    excess = inputs.expected_returns - inputs.risk_free_rate
    first = max_return_vertex(excess / inputs.volatilities, inputs.lower, inputs.upper).weights
    assert excess @ first > 0.0
    state = tangency_start(inputs, excess)
    w = np.where(state == 1, inputs.upper, inputs.lower)
    free = np.flatnonzero(state == 0)
    assert free.size == 1
    w[free] = 1.0 - (w.sum() - w[free])  # the one free asset absorbs the budget
    assert inputs.lower[free] - 1e-12 <= w[free] <= inputs.upper[free] + 1e-12  # a vertex of the box
    assert excess @ w > 0.0


@pytest.mark.parametrize(("n", "cap", "seed"), [(200, 0.05, 200), (120, 0.03, 5), (60, 0.05, 6)])
def test_incremental_corners_match_a_fresh_factorisation_at_every_corner(
        n: int, cap: float, seed: int, monkeypatch: pytest.MonkeyPatch) -> None:
    inputs = capped_mix(n, cap, seed)
    fast = efficient_frontier(inputs)
    monkeypatch.setattr(frontier_module, "_REFRESH_EVERY", 1)
    fresh = efficient_frontier(inputs)
    assert fast.corner_weights.shape == fresh.corner_weights.shape
    # Both are rounded solutions of the same corner systems; the previous code (refactorised
    # every 32 updates) differed from the fresh run by up to 7e-11 here too.
    assert_allclose(fast.corner_returns, fresh.corner_returns, rtol=0, atol=1e-10)
    assert_allclose(fast.corner_weights, fresh.corner_weights, rtol=0, atol=1e-9)


def test_refinement_and_refactorising_paths_give_the_same_corners(monkeypatch: pytest.MonkeyPatch) -> None:
    # Force one path at a time: refine at every corner (never refactorise), then
    # refactorise whenever any drift shows.
    inputs = capped_mix(150, 0.04, 11)
    base = efficient_frontier(inputs)
    monkeypatch.setattr(frontier_module, "_REFINE_RTOL", 0.0)
    monkeypatch.setattr(frontier_module, "_REFACTOR_RTOL", 1.0)
    refined = efficient_frontier(inputs)
    monkeypatch.setattr(frontier_module, "_REFACTOR_RTOL", 0.0)
    refactored = efficient_frontier(inputs)
    for other in (refined, refactored):
        assert other.corner_weights.shape == base.corner_weights.shape
        assert_allclose(other.corner_weights, base.corner_weights, rtol=0, atol=1e-9)


def test_tight_cap_frontier_agrees_with_the_tangency_and_clarabel() -> None:
    from tests.numerics.test_reference import reference_min_variance

    inputs = capped_mix(200, 0.05, 200)
    frontier = efficient_frontier(inputs)
    best, _ = tangency(inputs)
    # Two exact methods: the best point of the frontier (closed form per segment) is the tangency.
    assert_allclose(best_sharpe_on_frontier(frontier, inputs), best.weights, rtol=0, atol=1e-9)
    assert_allclose(frontier.corner_weights[0], min_variance(inputs).weights, rtol=0, atol=1e-12)
    low, high = float(frontier.corner_returns[0]), float(frontier.corner_returns[-1])
    for target in np.linspace(low, high, 5)[1:-1]:
        ours = frontier.weights_at(float(target))
        ref = reference_min_variance(inputs, float(target))
        # Near the minimum-variance end the objective is flat along some directions (small
        # idiosyncratic variances), so the interior-point weights are off by ~3e-6 while its
        # variance is off by ~4e-8 relative: compare the weights loosely and require the
        # exact point's variance to be no worse.
        assert_allclose(ours, ref, rtol=0, atol=1e-5)
        assert_allclose(inputs.expected_returns @ ours, target, rtol=0, atol=1e-12)
        assert ours @ inputs.covariance @ ours <= ref @ inputs.covariance @ ref * (1.0 + 1e-12)


def test_solve_mix_shares_the_minimum_variance_start() -> None:
    inputs = capped_mix(200, 0.05, 200)
    lowest, solution = min_variance_with_solution(inputs)
    assert solution is not None
    assert_array_equal(lowest.weights, min_variance(inputs).weights)
    shared = frontier_from_min_variance(inputs, solution)
    alone = efficient_frontier(inputs)
    assert_array_equal(shared.corner_weights, alone.corner_weights)
    mix = solve_mix(inputs, cross_check=False)
    assert_array_equal(mix.frontier.corner_weights, alone.corner_weights)
    assert_array_equal(mix.min_variance.weights, lowest.weights)
