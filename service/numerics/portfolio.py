"""The portfolio result type and the statistics every method reports the same way."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from service.numerics.inputs import MixInputs

__all__ = ["Portfolio", "portfolio_from_weights"]

FloatArray = npt.NDArray[np.float64]


@dataclass(frozen=True, eq=False)
class Portfolio:
    """A fully invested portfolio with its expected return, volatility and Sharpe ratio.

    ``method`` names how the weights were found (``"closed_form"``, ``"active_set"``,
    ``"only_feasible"``, ``"frontier"``, ...).
    """

    weights: FloatArray
    expected_return: float
    volatility: float
    sharpe_ratio: float
    method: str


def portfolio_from_weights(inputs: MixInputs, weights: FloatArray, method: str,
                           variance: float | None = None) -> Portfolio:
    """Statistics of ``weights``; ``variance`` may be passed when the solver already has w'Sw."""
    w = np.array(weights, dtype=np.float64, copy=True)
    w.setflags(write=False)
    mean = float(inputs.expected_returns @ w)
    if variance is None:
        variance = inputs.risk.variance(w)
    variance = max(variance, 0.0)
    vol = math.sqrt(variance)
    sharpe = (mean - inputs.risk_free_rate) / vol if vol > 0.0 else math.nan
    return Portfolio(weights=w, expected_return=mean, volatility=vol, sharpe_ratio=sharpe, method=method)
