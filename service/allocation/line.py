"""The capital allocation line a member chooses a point on, kinked at y = 1 where borrowing costs more.

For a risky fraction y of the account in the tangency mix T (return mu_T, volatility sigma_T):
    y <= 1:  E[r] = rf  + y (mu_T - rf)
    y >  1:  E[r] = mu_T + (y - 1)(mu_T - r_b)      (the extra is borrowed at r_b >= rf)
    sigma    = y sigma_T on both pieces.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray


@dataclass(frozen=True)
class AllocationLine:
    risk_free_rate: float
    tangency_return: float
    tangency_volatility: float
    borrowing_rate: float | None = None  # None: the plan does not lend beyond y = 1

    @property
    def slope(self) -> float:
        """Sharpe ratio of the tangency mix: the lending segment's slope in (sigma, E[r])."""
        return (self.tangency_return - self.risk_free_rate) / self.tangency_volatility

    def expected_return(self, y: NDArray[np.float64]) -> NDArray[np.float64]:
        lending = self.risk_free_rate + y * (self.tangency_return - self.risk_free_rate)
        if self.borrowing_rate is None:
            return lending
        borrowing = self.tangency_return + (y - 1.0) * (self.tangency_return - self.borrowing_rate)
        return np.where(y > 1.0, borrowing, lending)

    def volatility(self, y: NDArray[np.float64]) -> NDArray[np.float64]:
        return np.abs(y) * self.tangency_volatility
