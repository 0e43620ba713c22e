"""The three numerical routes land near the exact tangency and never above it."""

from __future__ import annotations

import pytest

from service.numerics import cross_checks, solve_mix, tangency
from service.numerics.numerical_routes import grid_points
from tests.numerics.scenarios import scenario


@pytest.mark.parametrize(("n", "case"), [(6, "long_only"), (12, "capped"), (12, "boxed"), (8, "unbounded")])
def test_routes_agree_with_the_exact_tangency(n: int, case: str) -> None:
    inputs = scenario(n, 40 + n, case=case)
    exact, _ = tangency(inputs)
    checks = cross_checks(inputs, exact)
    assert [c.method for c in checks] == ["direct_search", "risk_grid", "return_grid"]
    direct, risk, ret = checks
    # Direct search converges to the optimum itself (SLSQP at ftol 1e-12).
    assert direct.max_weight_gap <= 1e-4
    assert abs(direct.sharpe_gap) <= 1e-8
    # A grid's best point is within one grid step; none may beat the exact answer.
    for grid in (risk, ret):
        assert -1e-9 <= grid.sharpe_gap <= 0.05 * exact.sharpe_ratio
        assert grid.max_weight_gap <= 0.25
    for c in checks:
        assert c.seconds > 0.0
        assert c.sharpe_ratio == pytest.approx(exact.sharpe_ratio - c.sharpe_gap, rel=1e-12)
    assert grid_points(n) == 40 and grid_points(200) == 20


def test_solve_mix_carries_the_checks() -> None:
    solved = solve_mix(scenario(5, 1, case="capped"))
    assert len(solved.cross_checks) == 3
    assert all(c.sharpe_gap >= -1e-9 for c in solved.cross_checks)
