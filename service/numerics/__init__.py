"""Pure numpy/scipy numerics of a risky mix: validated inputs, exact tangency and
minimum-variance portfolios, the exact efficient frontier, numerical cross-checks.

Imports only numpy, scipy and the standard library; knows nothing of HTTP or databases.
Public surface is ``__all__``; the submodules are private.
"""

from service.numerics.errors import InputError
from service.numerics.estimation import (
    HistoryEstimate,
    estimate_from_history,
    history_matrix,
)
from service.numerics.exact import min_variance, tangency
from service.numerics.frontier import Frontier, efficient_frontier
from service.numerics.inputs import MixInputs, build_inputs
from service.numerics.nearest_correlation import NearestCorrelation, nearest_correlation
from service.numerics.numerical_routes import CrossCheck, cross_checks
from service.numerics.portfolio import Portfolio
from service.numerics.solved_mix import SolvedMix, solve_mix

__all__ = [
    "InputError",
    "MixInputs",
    "build_inputs",
    "Portfolio",
    "CrossCheck",
    "Frontier",
    "SolvedMix",
    "solve_mix",
    "tangency",
    "min_variance",
    "efficient_frontier",
    "cross_checks",
    "HistoryEstimate",
    "estimate_from_history",
    "history_matrix",
    "NearestCorrelation",
    "nearest_correlation",
]
