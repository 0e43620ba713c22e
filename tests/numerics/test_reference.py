"""The exact bounded solutions against a general-purpose conic solver (cvxpy + Clarabel).

Reference: the Charnes-Cooper homogenised QP min y'Sy s.t. (mu - rf)'y = 1, 1'y = t,
lo t <= y <= hi t, t >= 0, w = y / t, built and solved by cvxpy with Clarabel in the test.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.numerics import MixInputs, efficient_frontier, min_variance, tangency
from tests.numerics.scenarios import scenario

cp = pytest.importorskip("cvxpy")
pytest.importorskip("clarabel")

CLARABEL_TIGHT = {"tol_gap_abs": 1e-12, "tol_gap_rel": 1e-12, "tol_feas": 1e-12, "tol_ktratio": 1e-10,
                  "max_iter": 500}


def _box(inputs: MixInputs, var: object, scale: object) -> list[object]:
    lo, hi = inputs.lower, inputs.upper
    cons = []
    low_ok, high_ok = np.isfinite(lo), np.isfinite(hi)
    if low_ok.any():
        cons.append(var[low_ok] >= lo[low_ok] * scale)  # type: ignore[index]
    if high_ok.any():
        cons.append(var[high_ok] <= hi[high_ok] * scale)  # type: ignore[index]
    return cons


def reference_tangency(inputs: MixInputs) -> np.ndarray:
    y, t = cp.Variable(inputs.n), cp.Variable()
    excess = inputs.expected_returns - inputs.risk_free_rate
    cons = [excess @ y == 1, cp.sum(y) == t, t >= 0, *_box(inputs, y, t)]
    cp.Problem(cp.Minimize(cp.quad_form(y, cp.psd_wrap(inputs.covariance))), cons).solve(
        solver=cp.CLARABEL, **CLARABEL_TIGHT)
    return np.asarray(y.value) / float(t.value)


def reference_min_variance(inputs: MixInputs, target: float | None = None) -> np.ndarray:
    w = cp.Variable(inputs.n)
    cons = [cp.sum(w) == 1, *_box(inputs, w, 1.0)]
    if target is not None:
        cons.append(inputs.expected_returns @ w == target)
    cp.Problem(cp.Minimize(cp.quad_form(w, cp.psd_wrap(inputs.covariance))), cons).solve(
        solver=cp.CLARABEL, **CLARABEL_TIGHT)
    return np.asarray(w.value)


def sharpe(inputs: MixInputs, w: np.ndarray) -> float:
    return float((inputs.expected_returns @ w - inputs.risk_free_rate) / np.sqrt(w @ inputs.covariance @ w))


CASES = [(n, case, seed) for n in (2, 5, 10, 30, 60) for case in ("long_only", "capped", "boxed") for seed in (1, 2)]


@pytest.mark.parametrize(("n", "case", "seed"), CASES)
def test_tangency_matches_clarabel(n: int, case: str, seed: int) -> None:
    inputs = scenario(n, 1000 * n + seed, case=case)
    ours, residual = tangency(inputs)
    ref = reference_tangency(inputs)
    assert ours.method == "active_set"
    assert residual <= 1e-10
    assert_allclose(ours.weights, ref, atol=1e-6)
    assert_allclose(ours.sharpe_ratio, sharpe(inputs, ref), rtol=0, atol=1e-8)
    # The exact answer can only be at least as good as the interior-point one.
    assert ours.sharpe_ratio >= sharpe(inputs, ref) - 1e-9


@pytest.mark.parametrize(("n", "case", "seed"), CASES[::3])
def test_min_variance_matches_clarabel(n: int, case: str, seed: int) -> None:
    inputs = scenario(n, 1000 * n + seed, case=case)
    ours = min_variance(inputs)
    ref = reference_min_variance(inputs)
    assert_allclose(ours.weights, ref, atol=1e-6)
    assert ours.volatility <= np.sqrt(ref @ inputs.covariance @ ref) + 1e-12


@pytest.mark.parametrize(("n", "case"), [(10, "long_only"), (30, "capped"), (30, "boxed")])
def test_frontier_points_match_clarabel(n: int, case: str) -> None:
    inputs = scenario(n, 77 + n, case=case)
    frontier = efficient_frontier(inputs)
    lo, hi = float(frontier.corner_returns[0]), float(frontier.corner_returns[-1])
    for target in np.linspace(lo, hi, 6)[1:-1]:
        assert_allclose(frontier.weights_at(float(target)), reference_min_variance(inputs, float(target)), atol=1e-6)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_partly_unbounded_mix_matches_clarabel(seed: int) -> None:
    # long_only=False with bounds on a few assets only: the feasible set is unbounded.
    base = scenario(8, seed, case="unbounded")
    from service.numerics import build_inputs
    inputs = build_inputs(base.codes, base.expected_returns, base.risk_free_rate, covariance=base.covariance,
                          long_only=False, bounds={base.codes[0]: (-0.2, 0.3), base.codes[1]: (0.05, 0.4)})
    ours, residual = tangency(inputs)
    ref = reference_tangency(inputs)
    assert ours.method == "active_set" and residual <= 1e-10
    assert_allclose(ours.weights, ref, atol=1e-6)
    assert ours.sharpe_ratio >= sharpe(inputs, ref) - 1e-9
    assert_allclose(min_variance(inputs).weights, reference_min_variance(inputs), atol=1e-6)


@pytest.mark.parametrize("seed", [1, 2])
def test_some_fixed_weights_match_clarabel(seed: int) -> None:
    base = scenario(12, seed, case="long_only")
    from service.numerics import build_inputs
    bounds = {base.codes[0]: (0.1, 0.1), base.codes[5]: (0.05, 0.05), base.codes[7]: (0.0, 0.2)}
    inputs = build_inputs(base.codes, base.expected_returns, base.risk_free_rate, covariance=base.covariance,
                          bounds=bounds)
    ours, residual = tangency(inputs)
    ref = reference_tangency(inputs)
    assert residual <= 1e-10
    assert ours.weights[0] == 0.1 and ours.weights[5] == 0.05
    assert_allclose(ours.weights, ref, atol=1e-6)
    frontier = efficient_frontier(inputs)
    assert np.all(frontier.corner_weights[:, 0] == 0.1)
    assert_allclose(frontier.corner_weights[0], reference_min_variance(inputs), atol=1e-6)
