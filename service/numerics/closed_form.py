"""Closed forms for a mix without bounds (Merton 1972, "An analytic derivation of the
efficient portfolio frontier"): tangency, minimum variance and the two-fund frontier.

All three solve against one factorisation of the covariance (Cholesky, or Woodbury for a
factor model); nothing here is iterative.
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt

from service.numerics.errors import InputError
from service.numerics.inputs import MixInputs

__all__ = ["closed_form_weights", "ClosedForm"]

FloatArray = npt.NDArray[np.float64]

# 1' S^-1 e is compared with the Cauchy-Schwarz bound sqrt(1'S^-1 1 * e'S^-1 e) on its size.
_BRANCH_RTOL = 1e-12


class ClosedForm:
    """Tangency and minimum-variance weights of an unbounded mix, from one factorisation."""

    def __init__(self, inputs: MixInputs) -> None:
        block = inputs.risk.block(np.arange(inputs.n))
        if block is None:
            raise RuntimeError("the validated covariance could not be factorised")
        excess = inputs.expected_returns - inputs.risk_free_rate
        ones = np.ones(inputs.n)
        solved = block.solve(np.column_stack([excess, ones]))
        self.s_inv_e: FloatArray = solved[:, 0]
        self.s_inv_1: FloatArray = solved[:, 1]
        self.one_s_inv_e = float(ones @ self.s_inv_e)
        self.one_s_inv_1 = float(ones @ self.s_inv_1)
        self.e_s_inv_e = float(excess @ self.s_inv_e)
        self.risk_free_rate = inputs.risk_free_rate

    def tangency_weights(self) -> FloatArray:
        scale = math.sqrt(max(self.one_s_inv_1 * self.e_s_inv_e, 0.0))
        if not self.one_s_inv_e > _BRANCH_RTOL * scale:
            raise InputError(
                "risk_free_rate",
                f"the maximum Sharpe ratio would sit on the inefficient branch: 1' S^-1 (mu - rf) = "
                f"{self.one_s_inv_e:.3g} <= 0 at risk-free rate {self.risk_free_rate:g}; the risk-free "
                "rate must lie below the return of the minimum-variance portfolio")
        return self.s_inv_e / self.one_s_inv_e

    def min_variance_weights(self) -> FloatArray:
        return self.s_inv_1 / self.one_s_inv_1


def closed_form_weights(inputs: MixInputs) -> tuple[FloatArray, FloatArray]:
    """(tangency, minimum variance) weights of an unbounded mix."""
    form = ClosedForm(inputs)
    return form.tangency_weights(), form.min_variance_weights()
