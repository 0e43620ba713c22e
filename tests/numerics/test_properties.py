"""Property: no feasible portfolio has a higher Sharpe ratio than the exact tangency
(definition of the tangency portfolio), on seeded random mixes and random feasible
portfolios; and the minimum-variance portfolio has the lowest variance among them."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from service.numerics import min_variance, tangency
from tests.numerics.scenarios import feasible_portfolios, scenario

PROPERTY_SETTINGS = settings(derandomize=True, max_examples=40, deadline=None, database=None)


@PROPERTY_SETTINGS
@given(n=st.integers(min_value=2, max_value=25), seed=st.integers(min_value=0, max_value=10_000),
       case=st.sampled_from(["long_only", "capped", "boxed", "unbounded"]))
def test_tangency_beats_random_feasible_portfolios(n: int, seed: int, case: str) -> None:
    inputs = scenario(n, seed, case=case)
    best, residual = tangency(inputs)
    assert residual <= 1e-10
    others = feasible_portfolios(inputs, 200, seed)
    assert np.all(np.abs(others.sum(axis=1) - 1.0) <= 1e-9)
    assert np.all(others >= inputs.lower - 1e-12) and np.all(others <= inputs.upper + 1e-12)
    excess = others @ inputs.expected_returns - inputs.risk_free_rate
    vol = np.sqrt(np.einsum("ki,ij,kj->k", others, inputs.covariance, others))
    assert np.all(excess / vol <= best.sharpe_ratio + 1e-12)
    low = min_variance(inputs)
    assert np.all(vol >= low.volatility - 1e-12)
