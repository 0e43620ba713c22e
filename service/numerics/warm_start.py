"""Warm-start active sets for the exact solvers: a guess at which assets end free."""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from service.numerics.inputs import MixInputs
from service.numerics.max_return import FIXED, FREE

__all__ = ["tangency_start", "min_variance_start"]

StateArray = npt.NDArray[np.int8]


def tangency_start(inputs: MixInputs, excess: npt.NDArray[np.float64]) -> StateArray:
    state = np.full(inputs.n, FREE, dtype=np.int8)
    state[inputs.lower == inputs.upper] = FIXED
    return state


def min_variance_start(inputs: MixInputs) -> StateArray:
    state = np.full(inputs.n, FREE, dtype=np.int8)
    state[inputs.lower == inputs.upper] = FIXED
    return state
