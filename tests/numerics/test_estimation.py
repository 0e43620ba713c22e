"""Estimating assumptions from a return history, against numpy, scikit-learn and cvxpy.

Data: the monthly returns of Ken French's 12 industry portfolios (NoDur ... Other) bundled with
the `linearmodels` package (`linearmodels.datasets.french`, 819 months from 1949), simple returns
as decimals.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from service.numerics import (
    InputError,
    build_inputs,
    estimate_from_history,
    history_matrix,
    nearest_correlation,
)
from service.numerics.estimation import (
    PERIODS_PER_YEAR,
    REPAIR_EIGENVALUE_FLOOR,
    ledoit_wolf,
    sample_covariance,
)

INDUSTRIES = ["NoDur", "Durbl", "Manuf", "Enrgy", "Chems", "BusEq", "Telcm", "Utils", "Shops", "Hlth", "Money", "Other"]


@pytest.fixture(scope="module")
def industries() -> np.ndarray:
    from linearmodels.datasets import french

    frame = french.load()
    x = frame[INDUSTRIES].to_numpy(dtype=np.float64)
    assert x.shape == (819, 12)
    return x


def test_sample_covariance_is_numpys_unbiased_cov(industries: np.ndarray) -> None:
    # Reference: numpy.cov with ddof=1 (the unbiased estimator), computed here.
    assert_allclose(sample_covariance(industries), np.cov(industries, rowvar=False, ddof=1), rtol=1e-12, atol=0)
    found = estimate_from_history(INDUSTRIES, industries, frequency="monthly", covariance_method="sample")
    assert found.observations == 819 and found.periods_per_year == 12
    # Annualised arithmetically: 12 x the monthly mean and covariance (common practice).
    assert_allclose(found.covariance, 12 * np.cov(industries, rowvar=False), rtol=1e-12)
    assert_allclose(found.expected_returns, 12 * industries.mean(axis=0), rtol=1e-12)
    assert_allclose(found.correlation, np.corrcoef(industries, rowvar=False), rtol=0, atol=1e-13)
    assert_allclose(found.volatilities, np.sqrt(12 * industries.var(axis=0, ddof=1)), rtol=1e-12)
    assert found.shrinkage_intensity is None and not found.repaired
    eig = np.linalg.eigvalsh(found.covariance)
    assert_allclose(found.condition_number, eig[-1] / eig[0], rtol=1e-10)  # definition


@pytest.mark.parametrize("months", [819, 60, 13])
def test_shrinkage_is_scikit_learns_ledoit_wolf(industries: np.ndarray, months: int) -> None:
    # Reference: sklearn.covariance.LedoitWolf (shrinks the maximum-likelihood covariance toward
    # the mean variance times I, as Ledoit and Wolf 2004 do), computed here on the same rows.
    from sklearn.covariance import LedoitWolf

    x = industries[-months:]
    reference = LedoitWolf().fit(x)
    cov, intensity = ledoit_wolf(x)
    assert_allclose(intensity, reference.shrinkage_, rtol=1e-10)
    assert_allclose(cov, reference.covariance_, rtol=1e-10, atol=1e-16)
    found = estimate_from_history(INDUSTRIES, x, frequency="monthly", covariance_method="shrinkage")
    assert_allclose(found.covariance, 12 * reference.covariance_, rtol=1e-10)
    assert found.shrinkage_intensity == pytest.approx(reference.shrinkage_, rel=1e-10)
    # Fewer months, more shrinkage (the estimator's design: the noisier S, the larger b^2/d^2).
    assert 0.0 < intensity < 1.0


def test_each_frequency_annualises_by_its_periods(industries: np.ndarray) -> None:
    x = industries[:100, :4]
    base = estimate_from_history(INDUSTRIES[:4], x, frequency="annual")
    for name, periods in PERIODS_PER_YEAR.items():
        found = estimate_from_history(INDUSTRIES[:4], x, frequency=name)
        # Closed-form identity: mean x P and covariance x P; the correlation does not change.
        assert found.periods_per_year == periods
        assert_allclose(found.covariance, periods * base.covariance, rtol=1e-12)
        assert_allclose(found.expected_returns, periods * base.expected_returns, rtol=1e-12)
        assert_allclose(found.correlation, base.correlation, atol=1e-14)
    assert (PERIODS_PER_YEAR["daily"], PERIODS_PER_YEAR["weekly"]) == (252, 52)  # common practice


def test_given_expected_returns_replace_the_means(industries: np.ndarray) -> None:
    given = [0.05, 0.06, 0.07]
    found = estimate_from_history(INDUSTRIES[:3], industries[:, :3], frequency="monthly", expected_returns=given)
    assert list(found.expected_returns) == given


def test_the_estimate_publishes(industries: np.ndarray) -> None:
    found = estimate_from_history(INDUSTRIES, industries, frequency="monthly", covariance_method="shrinkage")
    inputs = build_inputs(INDUSTRIES, list(found.expected_returns), 0.02, volatilities=list(found.volatilities),
                          correlation=found.correlation.tolist())
    assert_allclose(inputs.covariance, found.covariance, rtol=1e-12)


# ---- refusals: each names the field ----------------------------------------------------------------


def refused(field: str, **kwargs: object) -> InputError:
    with pytest.raises(InputError) as caught:
        codes = kwargs.pop("codes", ["A", "B"])
        estimate_from_history(codes, kwargs.pop("returns"), **{"frequency": "monthly", **kwargs})  # type: ignore[arg-type]
    assert caught.value.field == field, caught.value
    return caught.value


def test_refusals_name_the_field() -> None:
    rng = np.random.default_rng(8)
    x = rng.normal(0.005, 0.04, size=(24, 2))
    refused("frequency", returns=x, frequency="fortnightly")
    refused("covariance_method", returns=x, covariance_method="robust")
    gap = x.copy()
    gap[5, 1] = np.nan
    err = refused("returns.B[5]", returns=gap, row_labels=[f"2020-{m:02d}" for m in range(1, 25)])
    assert "2020-06" in err.reason and "missing" in err.reason
    constant = x.copy()
    constant[:, 0] = 0.01
    refused("returns.A", returns=constant)
    crash = x.copy()
    crash[3, 0] = -1.5
    refused("returns.A[3]", returns=crash)
    refused("dates", returns=x, row_labels=["2020-01"])
    refused("returns", returns=np.empty((0, 2)))
    huge = x.copy()
    huge[2, 1] = 1e300
    assert "percent" in refused("returns.B[2]", returns=huge).reason
    refused("expected_returns", returns=x, expected_returns=[0.05])


def test_at_least_n_plus_one_observations() -> None:
    rng = np.random.default_rng(9)
    codes = [f"C{i}" for i in range(5)]
    estimate_from_history(codes, rng.normal(0.0, 0.05, size=(6, 5)), frequency="monthly")  # N + 1: enough
    err = refused("returns", codes=codes, returns=rng.normal(0.0, 0.05, size=(5, 5)))
    assert "at least 6" in err.reason


def test_ragged_series_are_refused() -> None:
    with pytest.raises(InputError) as caught:
        history_matrix({"A": [0.01, 0.02, 0.03], "B": [0.01, 0.02]})
    assert caught.value.field == "returns.B"
    codes, x = history_matrix({"A": [0.01, None], "B": [0.0, 0.02]})
    assert codes == ("A", "B") and math.isnan(x[1, 0]) and x.shape == (2, 2)


# ---- not positive definite: refused, or repaired when asked ------------------------------------------


def collinear(industries: np.ndarray) -> tuple[list[str], np.ndarray]:
    # A thirteenth series that is an exact mix of two others: the sample covariance is singular.
    x = industries[-120:, :4]
    blend = 0.5 * x[:, 0] + 0.5 * x[:, 1]
    return INDUSTRIES[:4] + ["BLEND"], np.column_stack([x, blend])


def test_a_singular_estimate_is_refused_without_repair(industries: np.ndarray) -> None:
    codes, x = collinear(industries)
    with pytest.raises(InputError) as caught:
        estimate_from_history(codes, x, frequency="monthly")
    assert caught.value.field == "returns" and "repair" in caught.value.reason


def test_repair_takes_the_nearest_correlation_matrix(industries: np.ndarray) -> None:
    codes, x = collinear(industries)
    found = estimate_from_history(codes, x, frequency="monthly", repair=True)
    raw = np.corrcoef(x, rowvar=False)
    assert found.repaired and found.repair_distance is not None and found.repair_distance > 0
    assert_allclose(np.diag(found.correlation), 1.0, atol=0)
    # Floor to the iteration's tolerance (1e-12 relative to the matrix norm, about 5 here).
    assert np.linalg.eigvalsh(found.correlation)[0] >= REPAIR_EIGENVALUE_FLOOR - 1e-11
    # The repair moves the matrix by the least amount: about the floor (identity: the nearest
    # matrix with eigenvalues >= floor to a PSD matrix with one zero eigenvalue is that far).
    assert_allclose(found.repair_distance, np.linalg.norm(found.correlation - raw), rtol=1e-6)
    assert found.repair_distance < 1e-6
    build_inputs(codes, list(found.expected_returns), 0.02, volatilities=list(found.volatilities),
                 correlation=found.correlation.tolist())  # publishable


# ---- Higham (2002) ------------------------------------------------------------------------------------


def test_higham_published_example() -> None:
    # Higham (2002), IMA J. Numer. Anal. 22, section 4: the nearest correlation matrix to
    # [[1, 1, 0], [1, 1, 1], [0, 1, 1]] has off-diagonals 0.7607 and 0.1573 (to 4 places; from memory).
    near = nearest_correlation(np.array([[1.0, 1.0, 0.0], [1.0, 1.0, 1.0], [0.0, 1.0, 1.0]]))
    expected = np.array([[1.0, 0.7607, 0.1573], [0.7607, 1.0, 0.7607], [0.1573, 0.7607, 1.0]])
    assert_allclose(near.matrix, expected, atol=5e-5)


@pytest.mark.parametrize("floor", [0.0, 1e-3])
def test_higham_against_a_semidefinite_program(floor: float) -> None:
    # Independent computation: the nearest correlation matrix as a convex SDP solved by cvxpy,
    # minimise ||X - A||_F subject to X - floor I PSD and diag(X) = 1.
    import cvxpy as cp

    rng = np.random.default_rng(2002)
    n = 6
    a = np.clip(np.corrcoef(rng.normal(size=(n, 8))) + rng.normal(0, 0.25, size=(n, n)), -1, 1)
    a = 0.5 * (a + a.T)
    np.fill_diagonal(a, 1.0)
    assert np.linalg.eigvalsh(a)[0] < 0  # not a correlation matrix to begin with
    x = cp.Variable((n, n), symmetric=True)
    problem = cp.Problem(cp.Minimize(cp.norm(x - a, "fro")), [x - floor * np.eye(n) >> 0, cp.diag(x) == 1])
    # SCS at a tight tolerance agrees to about 1e-14 here; Clarabel's interior point to about 1e-7.
    problem.solve(solver=cp.SCS, eps=1e-12, max_iters=200_000)
    near = nearest_correlation(a, eigenvalue_floor=floor)
    assert_allclose(near.matrix, x.value, atol=1e-8)
    assert near.distance <= problem.value + 1e-9
    assert_allclose(np.diag(near.matrix), 1.0, atol=0)
    assert np.linalg.eigvalsh(near.matrix)[0] >= floor - 1e-9


# ---- random shapes ----------------------------------------------------------------------------------


@settings(max_examples=40, deadline=None)
@given(n=st.integers(1, 8), extra=st.integers(1, 40), seed=st.integers(0, 2**32 - 1))
def test_ledoit_wolf_matches_scikit_learn_on_random_shapes(n: int, extra: int, seed: int) -> None:
    from sklearn.covariance import LedoitWolf

    x = np.random.default_rng(seed).standard_t(5, size=(n + extra, n)) * 0.03
    reference = LedoitWolf().fit(x)  # scikit-learn, computed here
    cov, intensity = ledoit_wolf(x)
    assert_allclose(intensity, reference.shrinkage_, rtol=1e-9, atol=1e-15)
    assert_allclose(cov, reference.covariance_, rtol=1e-9, atol=1e-18)
    assert 0.0 <= intensity <= 1.0
    found = estimate_from_history([f"C{i}" for i in range(n)], x, frequency="weekly", covariance_method="shrinkage")
    assert np.linalg.eigvalsh(found.correlation)[0] > 0  # shrinkage toward m I keeps it positive definite
