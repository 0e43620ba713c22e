"""The exact tangency and minimum-variance portfolios of a validated mix.

Dispatch: a single feasible portfolio is answered at once; a mix without bounds uses
the closed forms (Merton 1972); anything bounded goes to the active-set solver.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from service.numerics.active_set import (
    KKT_TOLERANCE,
    BoxProblem,
    BoxSolution,
    min_variance_kkt_residual,
    solve_box_problem,
    tangency_kkt_residual,
)
from service.numerics.closed_form import ClosedForm
from service.numerics.errors import InputError
from service.numerics.inputs import MixInputs, budget_tolerance
from service.numerics.max_return import FREE, max_return_vertex
from service.numerics.portfolio import Portfolio, portfolio_from_weights
from service.numerics.warm_start import min_variance_start, tangency_start

__all__ = ["min_variance", "min_variance_with_solution", "only_feasible_weights", "tangency"]

FloatArray = npt.NDArray[np.float64]


def only_feasible_weights(inputs: MixInputs) -> FloatArray | None:
    """The single feasible portfolio when the bounds leave no choice, else None."""
    lo, hi = inputs.lower, inputs.upper
    if inputs.n == 1:
        return np.ones(1)
    if inputs.unconstrained:
        return None
    tol = budget_tolerance(inputs.n)
    low_sum, high_sum = float(lo.sum()), float(hi.sum())
    # An infinite bound makes its sum infinite, so these tests also mean "all finite".
    if abs(low_sum - 1.0) <= tol or bool((lo == hi).all()):
        return lo.copy()
    if abs(high_sum - 1.0) <= tol:
        return hi.copy()
    return None


def _require_positive_excess(inputs: MixInputs, best_return: float) -> None:
    if not best_return > inputs.risk_free_rate:
        raise InputError("risk_free_rate",
                         f"no feasible portfolio earns more than the risk-free rate {inputs.risk_free_rate:g}: "
                         f"best expected return {best_return:.6g}")


def tangency(inputs: MixInputs) -> tuple[Portfolio, float]:
    """The exact maximum-Sharpe fully invested portfolio and its KKT residual.

    Raises InputError("risk_free_rate", ...) when no fully invested portfolio attains a
    positive maximum Sharpe ratio; RuntimeError if the exact answer fails its KKT check.
    """
    only = only_feasible_weights(inputs)
    if only is not None:
        _require_positive_excess(inputs, float(inputs.expected_returns @ only))
        # The only feasible point is optimal; what remains to check is the budget.
        residual = abs(float(only.sum()) - 1.0)
        return portfolio_from_weights(inputs, only, "only_feasible"), residual
    excess = inputs.expected_returns - inputs.risk_free_rate
    if inputs.unconstrained:
        w = ClosedForm(inputs).tangency_weights()
        state = np.full(inputs.n, FREE, dtype=np.int8)
        residual = tangency_kkt_residual(inputs.risk, excess, inputs.lower, inputs.upper, w, state, 0.0)
        _check_residual(residual, "closed-form tangency")
        return portfolio_from_weights(inputs, w, "closed_form"), residual
    problem = BoxProblem(inputs.risk, inputs.lower, inputs.upper, excess)

    def check_some_portfolio_beats_rf() -> None:
        # Only needed when the fast iteration fails: a verified answer has e'w > 0.
        top = max_return_vertex(inputs.expected_returns, inputs.lower, inputs.upper)
        _require_positive_excess(inputs, top.best)

    solution = solve_box_problem(problem, tangency_start(inputs, excess), check_some_portfolio_beats_rf)
    return (portfolio_from_weights(inputs, solution.weights, "active_set", solution.variance),
            solution.kkt_residual)


def min_variance(inputs: MixInputs) -> Portfolio:
    """The exact fully invested minimum-variance portfolio within the bounds."""
    return min_variance_with_solution(inputs)[0]


def min_variance_with_solution(inputs: MixInputs) -> tuple[Portfolio, BoxSolution | None]:
    """``min_variance`` and, when the active-set solver ran, its solution (final active
    set included), from which the critical line starts without solving it again."""
    only = only_feasible_weights(inputs)
    if only is not None:
        return portfolio_from_weights(inputs, only, "only_feasible"), None
    if inputs.unconstrained:
        w = ClosedForm(inputs).min_variance_weights()
        state = np.full(inputs.n, FREE, dtype=np.int8)
        residual = min_variance_kkt_residual(inputs.risk, inputs.lower, inputs.upper, w, state, 0.0)
        _check_residual(residual, "closed-form minimum variance")
        return portfolio_from_weights(inputs, w, "closed_form"), None
    problem = BoxProblem(inputs.risk, inputs.lower, inputs.upper, None)
    solution = solve_box_problem(problem, min_variance_start(inputs))
    return portfolio_from_weights(inputs, solution.weights, "active_set", solution.variance), solution


def _check_residual(residual: float, what: str) -> None:
    if not residual <= KKT_TOLERANCE:
        raise RuntimeError(f"{what} failed its KKT check: residual {residual:.3g} > {KKT_TOLERANCE:g}")
