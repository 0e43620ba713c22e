"""Factor-model risk (covariance B F B' + diag(d^2)) and the critical line on the free set.

References, computed in each test: numpy (dense products and solves with the n x n matrix
B F B' + D built here), cvxpy + Clarabel at tight tolerances on that dense equivalent (the
Charnes-Cooper QP for the tangency, the minimum-variance QP at a target return), the
critical line run on the dense matrix (the Woodbury path must give the same corners), and
the KKT conditions of every corner (``corner_kkt_residuals``: products with S only).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal

from service.numerics import (
    InputError,
    MixInputs,
    SolvedMix,
    build_inputs,
    efficient_frontier,
    min_variance,
    solve_mix,
    tangency,
)
from service.numerics.frontier import (
    Frontier,
    best_sharpe_on_frontier,
    corner_kkt_residuals,
)
from service.numerics.risk import FactorRisk

FloatArray = npt.NDArray[np.float64]
RISK_FREE_RATE = 0.02


def factor_parts(n: int, k: int, seed: int) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """(mu, B, F, d) of an invented security-level market: a market factor with positive
    loadings, k - 1 style factors, a correlated (not diagonal) factor covariance."""
    rng = np.random.default_rng(seed)
    b = rng.normal(size=(n, k)) * (0.15 / np.sqrt(np.arange(1, k + 1)))
    b[:, 0] = np.abs(b[:, 0]) + 0.05
    a = rng.normal(size=(k, k))
    f = 0.5 * np.eye(k) + 0.5 * (a @ a.T) / k
    d = rng.uniform(0.05, 0.25, n)
    premia = 0.3 * np.abs(rng.normal(size=k)) / np.sqrt(np.arange(1, k + 1))
    mu = RISK_FREE_RATE + b @ premia + rng.normal(0.0, 0.02, n)
    return mu, b, f, d


def pair(n: int, k: int, seed: int, cap: float | None) -> tuple[MixInputs, MixInputs]:
    """The same mix twice: as a factor model and as its dense covariance (numpy-built)."""
    mu, b, f, d = factor_parts(n, k, seed)
    codes = [f"SEC_{i:04d}" for i in range(n)]
    bounds = None if cap is None else {c: (0.0, cap) for c in codes}
    model = {"loadings": b.tolist(), "factor_covariance": f.tolist(), "specific_volatility": d.tolist()}
    factor = build_inputs(codes, mu, RISK_FREE_RATE, factor_model=model, bounds=bounds)
    dense = build_inputs(codes, mu, RISK_FREE_RATE, covariance=b @ f @ b.T + np.diag(d ** 2), bounds=bounds)
    return factor, dense


def test_factor_risk_products_and_woodbury_solves_match_the_dense_matrix() -> None:
    factor, dense = pair(120, 7, 3, None)
    risk = factor.risk
    assert isinstance(risk, FactorRisk)
    s = dense.covariance
    rng = np.random.default_rng(0)
    x = rng.normal(size=(4, 120))
    assert_allclose(risk.times(x), x @ s, rtol=1e-13, atol=1e-15)
    idx = np.sort(rng.choice(120, 37, replace=False))
    assert_allclose(risk.columns_times(idx, x[0, idx]), s[:, idx] @ x[0, idx], rtol=1e-13, atol=1e-15)
    assert_allclose(risk.row(5), s[5], rtol=1e-13, atol=1e-16)
    assert_allclose(risk.diagonal, np.diag(s), rtol=1e-14)
    block = risk.block(idx)
    assert block is not None
    rhs = rng.normal(size=(37, 3))
    # Reference: numpy's LU solve with the dense free block.
    assert_allclose(block.solve(rhs), np.linalg.solve(s[np.ix_(idx, idx)], rhs), rtol=1e-11, atol=1e-12)
    assert_allclose(block.spread(rhs[:, 0]), s[:, idx] @ rhs[:, 0], rtol=1e-13, atol=1e-15)
    assert_allclose(risk.dense(), s, rtol=1e-13, atol=1e-15)


@pytest.mark.parametrize(("n", "k", "seed", "cap"), [(40, 3, 1, None), (40, 3, 1, 0.1), (150, 10, 2, 2.5 / 150),
                                                     (300, 20, 3, 2.5 / 300), (300, 5, 4, 10 / 300)])
def test_woodbury_path_gives_the_dense_path_answers(n: int, k: int, seed: int, cap: float | None) -> None:
    factor, dense = pair(n, k, seed, cap)
    t_f, res_f = tangency(factor)
    t_d, res_d = tangency(dense)
    assert res_f <= 1e-10 and res_d <= 1e-10
    assert_allclose(t_f.weights, t_d.weights, rtol=0, atol=1e-10)
    assert_allclose(min_variance(factor).weights, min_variance(dense).weights, rtol=0, atol=1e-10)
    fr_f, fr_d = efficient_frontier(factor), efficient_frontier(dense)
    # Same corners from the Woodbury solves as from the kept dense inverse.
    assert fr_f.corner_weights.shape == fr_d.corner_weights.shape
    assert_allclose(fr_f.corner_weights, fr_d.corner_weights, rtol=0, atol=1e-9)
    assert_allclose(fr_f.corner_returns, fr_d.corner_returns, rtol=0, atol=1e-12)


def test_unbounded_factor_model_uses_the_closed_form() -> None:
    mu, b, f, d = factor_parts(50, 4, 9)
    codes = [f"SEC_{i:04d}" for i in range(50)]
    factor = build_inputs(codes, mu, RISK_FREE_RATE, long_only=False,
                          factor_model={"loadings": b, "factor_covariance": f, "specific_volatility": d})
    best, residual = tangency(factor)
    assert best.method == "closed_form" and residual <= 1e-10
    # Merton's closed form with numpy's dense solve: w = S^-1 e / 1'S^-1 e.
    s = b @ f @ b.T + np.diag(d ** 2)
    raw = np.linalg.solve(s, mu - RISK_FREE_RATE)
    assert_allclose(best.weights, raw / raw.sum(), rtol=0, atol=1e-11)


def _clarabel() -> Any:
    cp = pytest.importorskip("cvxpy")
    pytest.importorskip("clarabel")
    return cp


@pytest.mark.parametrize(("n", "k", "seed", "cap"), [(60, 4, 11, 0.05), (300, 20, 12, 2.5 / 300), (300, 8, 13, None)])
def test_factor_tangency_matches_clarabel_on_the_dense_equivalent(n: int, k: int, seed: int, cap: float | None) -> None:
    from tests.numerics.test_reference import reference_tangency, sharpe

    _clarabel()
    factor, dense = pair(n, k, seed, cap)
    ours, residual = tangency(factor)
    ref = reference_tangency(dense)
    assert residual <= 1e-10
    assert_allclose(ours.weights, ref, rtol=0, atol=1e-6)
    assert_allclose(ours.sharpe_ratio, sharpe(dense, ref), rtol=0, atol=1e-8)
    # The exact answer can only be at least as good as the interior-point one.
    assert ours.sharpe_ratio >= sharpe(dense, ref) - 1e-9


@pytest.mark.parametrize(("n", "k", "seed", "cap"), [(300, 20, 12, 2.5 / 300), (200, 6, 14, 0.02)])
def test_factor_frontier_points_match_clarabel_on_the_dense_equivalent(n: int, k: int, seed: int, cap: float) -> None:
    from tests.numerics.test_reference import reference_min_variance

    _clarabel()
    factor, dense = pair(n, k, seed, cap)
    frontier = efficient_frontier(factor)
    s = dense.covariance
    low, high = float(frontier.corner_returns[0]), float(frontier.corner_returns[-1])
    for target in np.linspace(low, high, 6)[1:-1]:
        ours = frontier.weights_at(float(target))
        ref = reference_min_variance(dense, float(target))
        # Clarabel at tight tolerances lands within ~1e-6 of the weights where the objective is
        # flat; the exact point's return is the target and its variance no worse.
        assert_allclose(ours, ref, rtol=0, atol=1e-5)
        assert_allclose(factor.expected_returns @ ours, target, rtol=0, atol=1e-12)
        assert ours @ s @ ours <= ref @ s @ ref * (1.0 + 1e-10)


@pytest.mark.parametrize(("n", "k", "seed", "cap"), [(300, 20, 1, 2.5 / 300), (300, 20, 1, 30 / 300),
                                                     (250, 3, 5, None), (120, 50, 6, 0.05)])
def test_every_corner_passes_the_kkt_check(n: int, k: int, seed: int, cap: float | None) -> None:
    factor, dense = pair(n, k, seed, cap)
    for inputs in (factor, dense):
        frontier = efficient_frontier(inputs)
        residuals = corner_kkt_residuals(frontier, inputs)
        assert residuals.shape == (frontier.corner_returns.size,)
        assert residuals.max() <= 1e-10
        # Two exact methods agree: the best Sharpe ratio on the frontier (closed form per
        # segment) is the active-set tangency.
        best, _ = tangency(inputs)
        assert_allclose(best_sharpe_on_frontier(frontier, inputs), best.weights, rtol=0, atol=1e-9)


def test_the_kkt_check_sees_a_wrong_corner() -> None:
    factor, _ = pair(80, 4, 2, 0.05)
    frontier = efficient_frontier(factor)
    k = frontier.corner_returns.size // 2
    bent = np.array(frontier.corner_weights)
    free = np.flatnonzero((bent[k] > 1e-9) & (bent[k] < 0.05 - 1e-9))
    assert free.size >= 2
    bent[k, free[0]] += 1e-4
    bent[k, free[1]] -= 1e-4
    wrong = Frontier.from_corners(frontier.corner_returns, bent)
    assert corner_kkt_residuals(wrong, factor)[k] > 1e-6


def test_degenerate_top_of_the_frontier() -> None:
    # 500 securities capped at 2.5/n: exactly 200 caps fill the budget, so near the top two
    # events fall at the same lambda (one weight reaches its cap as another reaches zero).
    # The previous critical line skipped the second event there and left the bounds.
    factor, _ = pair(500, 20, 1, 2.5 / 500)
    frontier = efficient_frontier(factor)
    assert corner_kkt_residuals(frontier, factor).max() <= 1e-10
    # The top is the vertex of the 200 highest returns at their caps (one of them free, at
    # its cap up to rounding of the budget).
    top = frontier.corner_weights[-1]
    assert np.count_nonzero(np.abs(top - 2.5 / 500) <= 1e-12) == 200
    best = np.argsort(factor.expected_returns)[-200:]
    assert_allclose(top[best], 2.5 / 500, rtol=0, atol=1e-12)


def test_frontier_document_round_trip_is_exact_and_small() -> None:
    factor, _ = pair(300, 20, 1, 2.5 / 300)
    frontier = efficient_frontier(factor)
    doc = frontier.to_document()
    again = Frontier.from_document(doc, 300)
    assert_array_equal(again.corner_weights, frontier.corner_weights)
    assert_array_equal(again.corner_returns, frontier.corner_returns)
    # Only changes are written: far fewer numbers than corners x assets.
    assert len(doc["changes"]["weights"]) < frontier.corner_weights.size / 10
    # The earlier layout (every corner in full) is still read.
    full = {"shape": "bounded", "corner_returns": frontier.corner_returns.tolist(),
            "corner_weights": frontier.corner_weights.tolist()}
    assert_array_equal(Frontier.from_document(full, 300).corner_weights, frontier.corner_weights)


def test_solved_factor_mix_document_keeps_the_factor_model() -> None:
    factor, _ = pair(60, 5, 21, 0.05)
    solved = solve_mix(factor, cross_check=False)
    doc = solved.to_document()
    assert "covariance" not in doc["inputs"] and set(doc["inputs"]["factor_model"]) == {
        "loadings", "factor_covariance", "specific_volatility"}
    again = SolvedMix.from_document(doc)
    assert again.to_document() == doc
    assert isinstance(again.inputs.risk, FactorRisk)
    assert_array_equal(again.inputs.covariance, factor.covariance)


# ---- validation -----------------------------------------------------------------------------


def _model(n: int = 6, k: int = 2, **changes: Any) -> dict[str, Any]:
    _, b, f, d = factor_parts(n, k, 5)
    body: dict[str, Any] = {"loadings": b.tolist(), "factor_covariance": f.tolist(), "specific_volatility": d.tolist()}
    body.update(changes)
    return body


def _refusal(model: dict[str, Any], **kwargs: Any) -> InputError:
    mu = factor_parts(6, 2, 5)[0]
    with pytest.raises(InputError) as caught:
        build_inputs([f"S{i}" for i in range(6)], mu, RISK_FREE_RATE, factor_model=model, **kwargs)
    return caught.value


def test_factor_model_shapes_are_refused_with_the_shape() -> None:
    err = _refusal(_model(loadings=[[0.1, 0.2]] * 5))
    assert err.field == "factor_model.loadings" and "(5, 2)" in err.reason
    err = _refusal(_model(loadings=[[0.1, 0.2]] * 5 + [[0.1]]))
    assert err.field == "factor_model.loadings[5]" and "1 entries" in err.reason
    err = _refusal(_model(loadings=(np.ones((6, 51)) * 0.01).tolist(), factor_covariance=np.eye(51).tolist()))
    assert err.field == "factor_model.loadings" and "k <= 50" in err.reason and "(6, 51)" in err.reason
    err = _refusal(_model(factor_covariance=np.eye(3).tolist()))
    assert err.field == "factor_model.factor_covariance" and "(3, 3)" in err.reason
    err = _refusal(_model(specific_volatility=[0.1] * 5))
    assert err.field == "factor_model.specific_volatility" and "(5,)" in err.reason


def test_factor_model_numbers_are_checked() -> None:
    err = _refusal(_model(factor_covariance=[[0.04, 0.01], [0.02, 0.04]]))
    assert err.field.startswith("factor_model.factor_covariance[") and "not symmetric" in err.reason
    # Eigenvalues of [[0.04, 0.05], [0.05, 0.04]] are 0.09 and -0.01 (closed form for 2 x 2).
    err = _refusal(_model(factor_covariance=[[0.04, 0.05], [0.05, 0.04]]))
    assert err.field == "factor_model.factor_covariance"
    assert "not positive semi-definite: smallest eigenvalue -0.01" in err.reason
    err = _refusal(_model(specific_volatility=[0.1, 0.1, 0.0, 0.1, 0.1, 0.1]))
    assert err.field == "factor_model.specific_volatility[2]" and "> 0" in err.reason
    loadings = _model()["loadings"]
    loadings[3][1] = float("nan")
    err = _refusal(_model(loadings=loadings))
    assert err.field == "factor_model.loadings[3][1]" and "finite" in err.reason


def test_factor_covariance_may_be_singular() -> None:
    # Positive semi-definite is enough for F: D > 0 keeps the covariance positive definite.
    model = _model(factor_covariance=[[0.04, 0.04], [0.04, 0.04]])
    mu = factor_parts(6, 2, 5)[0]
    inputs = build_inputs([f"S{i}" for i in range(6)], mu, RISK_FREE_RATE, factor_model=model)
    b, d = np.array(model["loadings"]), np.array(model["specific_volatility"])
    assert_allclose(inputs.covariance, b @ np.array(model["factor_covariance"]) @ b.T + np.diag(d ** 2), rtol=1e-13)


def test_asset_volatilities_must_agree_with_the_factor_model() -> None:
    model = _model()
    b, f, d = (np.array(model[key]) for key in ("loadings", "factor_covariance", "specific_volatility"))
    implied = np.sqrt(np.einsum("ij,jk,ik->i", b, f, b) + d ** 2)  # numpy: diag(B F B') + d^2
    mu = factor_parts(6, 2, 5)[0]
    codes = [f"S{i}" for i in range(6)]
    agreed = build_inputs(codes, mu, RISK_FREE_RATE, factor_model=model, volatilities=implied.tolist())
    assert_allclose(agreed.volatilities, implied, rtol=1e-12)
    off = implied.copy()
    off[4] *= 1.01
    with pytest.raises(InputError) as caught:
        build_inputs(codes, mu, RISK_FREE_RATE, factor_model=model, volatilities=off.tolist())
    assert caught.value.field == "assets[4].volatility"


def test_exactly_one_risk_form() -> None:
    mu = factor_parts(6, 2, 5)[0]
    with pytest.raises(InputError) as caught:
        build_inputs([f"S{i}" for i in range(6)], mu, RISK_FREE_RATE, factor_model=_model(), covariance=np.eye(6) * 0.04)
    assert "exactly one" in caught.value.reason


def test_condition_number_near_the_bound_is_decided_by_the_eigenvalues() -> None:
    # Eigenvalues 1e-3 .. 1e-3 * 5e11 by construction (Q from numpy's QR of a seeded matrix).
    rng = np.random.default_rng(4)
    q, _ = np.linalg.qr(rng.normal(size=(8, 8)))
    values = np.geomspace(1e-3, 1e-3 * 5e11, 8)
    cov = (q * values) @ q.T
    cov = 0.5 * (cov + cov.T)
    codes = [f"S{i}" for i in range(8)]
    mu = np.full(8, 0.05)
    build_inputs(codes, mu, RISK_FREE_RATE, covariance=cov, max_condition_number=1e12)
    with pytest.raises(InputError) as caught:
        build_inputs(codes, mu, RISK_FREE_RATE, covariance=cov, max_condition_number=1e11)
    assert "condition number 5e+11" in caught.value.reason


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 10_000), n=st.integers(1, 30), k=st.integers(1, 5),
       bounds_kind=st.sampled_from(["long_only", "capped", "signed", "fixed"]), singular_f=st.booleans())
def test_factor_and_dense_forms_agree_everywhere(seed: int, n: int, k: int, bounds_kind: str, singular_f: bool) -> None:
    # Differential: the same numbers as a factor model and as the dense matrix numpy builds
    # from them give the same tangency, the same corners, and corners passing their KKT check.
    rng = np.random.default_rng(seed)
    b = rng.normal(size=(n, k)) * 0.1
    a = rng.normal(size=(k, k))
    f = a @ a.T / k + (0.0 if singular_f else 0.1) * np.eye(k)
    d = rng.uniform(0.02, 0.3, n)
    mu = 0.03 + b @ rng.normal(size=k) * 0.5 + rng.normal(0.0, 0.02, n)
    codes = [f"A{i}" for i in range(n)]
    long_only = bounds_kind != "signed"
    bounds: dict[str, tuple[float, float]] | None = None
    if bounds_kind == "capped":
        bounds = {c: (0.0, float(rng.choice([1.5, 2.5, 4.0])) / n) for c in codes}
    elif bounds_kind == "signed":
        bounds = {c: (-float(rng.uniform(0.0, 0.3)), float(rng.uniform(0.1, 0.6))) for c in codes}
    elif bounds_kind == "fixed" and n > 2:
        bounds = {codes[0]: (0.05, 0.05)}
    model = {"loadings": b, "factor_covariance": f, "specific_volatility": d}
    try:
        factor = build_inputs(codes, mu, RISK_FREE_RATE, factor_model=model, bounds=bounds, long_only=long_only)
    except InputError:
        assume(False)
    dense = build_inputs(codes, mu, RISK_FREE_RATE, covariance=b @ f @ b.T + np.diag(d ** 2), bounds=bounds,
                         long_only=long_only)
    answers: list[tuple[FloatArray | str, Frontier]] = []
    for inputs in (factor, dense):
        best: FloatArray | str
        try:
            best = tangency(inputs)[0].weights
        except InputError as refused:  # both forms must refuse alike (e.g. rf above every return)
            best = refused.field
        frontier = efficient_frontier(inputs)
        assert corner_kkt_residuals(frontier, inputs).max() <= 1e-10
        answers.append((best, frontier))
    (best_f, frontier_f), (best_d, frontier_d) = answers
    if isinstance(best_f, str) or isinstance(best_d, str):
        assert best_f == best_d
    else:
        assert_allclose(best_f, best_d, rtol=0, atol=1e-9)
    assert frontier_f.corner_weights.shape == frontier_d.corner_weights.shape
    assert_allclose(frontier_f.corner_weights, frontier_d.corner_weights, rtol=0, atol=1e-8)


def test_a_factor_model_without_factor_risk_is_the_diagonal_covariance() -> None:
    # F = 0 leaves S = diag(d^2): the unbounded tangency is then (mu - rf) / d^2 normalised
    # (Merton's closed form with a diagonal matrix, worked out by hand).
    rng = np.random.default_rng(1)
    mu, d = 0.03 + rng.normal(0.0, 0.02, 20), rng.uniform(0.05, 0.2, 20)
    codes = [f"A{i}" for i in range(20)]
    inputs = build_inputs(codes, mu, RISK_FREE_RATE, long_only=False, factor_model={
        "loadings": np.ones((20, 2)), "factor_covariance": np.zeros((2, 2)), "specific_volatility": d})
    raw = (mu - RISK_FREE_RATE) / d ** 2
    assert_allclose(tangency(inputs)[0].weights, raw / raw.sum(), rtol=0, atol=1e-12)
    capped = build_inputs(codes, mu, RISK_FREE_RATE, bounds={c: (0.0, 0.2) for c in codes}, factor_model={
        "loadings": np.ones((20, 2)), "factor_covariance": np.zeros((2, 2)), "specific_volatility": d})
    assert corner_kkt_residuals(efficient_frontier(capped), capped).max() <= 1e-10
