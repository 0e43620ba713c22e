"""Warm-start active sets for the exact solvers: a cheap guess at which assets end free,
at a lower bound or at an upper bound.

Tangency: fill the budget greedily by each asset's own Sharpe ratio e_i / sigma_i (the
vertex an uncorrelated market would favour): best assets at their caps, one free asset
taking the remainder, the rest at their floors; re-ranked when many caps bind. From
there the primal-dual iteration typically needs a handful of steps.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from service.numerics.inputs import MixInputs
from service.numerics.max_return import FIXED, FREE, UPPER, max_return_vertex

__all__ = ["tangency_start", "min_variance_start"]

StateArray = npt.NDArray[np.int8]


#: Re-rank at most this many times; stop early when a re-rank moves fewer assets than
#: _RERANK_MIN_MOVES (the guess has settled, or caps do not bind and it cannot help).
_RERANKS = 2
_RERANK_MIN_MOVES = 8


def tangency_start(inputs: MixInputs, excess: npt.NDArray[np.float64]) -> StateArray:
    """Greedy fill by own Sharpe ratio, then re-filled by the marginal value of each asset
    at that guess, a e_i - (S w)_i with a = w'Sw / e'w (the negative reduced gradient of
    the tangency conditions): where caps bind, the first guess often caps the wrong assets,
    and each re-rank costs one product over the held assets.

    A re-filled guess is kept only if its excess return stays positive. The score rewards
    assets that hedge the current guess whatever their return, so with tight caps it can
    fill the budget with hedges and land on a vertex with e'w < 0, where the homogenised
    face has t < 0 and the primal-dual iteration cannot start. (Keeping it only when its
    Sharpe ratio improves also avoids that, but costs a product per re-rank and rejects
    re-fills whose active set is better even though their vertex is not.)
    """
    lo, hi, risk = inputs.lower, inputs.upper, inputs.risk
    vertex = max_return_vertex(excess / inputs.volatilities, lo, hi)
    state, w = vertex.state, vertex.weights
    for _ in range(_RERANKS):
        if np.count_nonzero(state == UPPER) < _RERANK_MIN_MOVES:
            break
        held = np.flatnonzero(w)
        sw = risk.columns_times(held, w[held])
        gain = float(excess @ w)
        if not gain > 0.0:
            break
        again = max_return_vertex((float(w[held] @ sw[held]) / gain) * excess - sw, lo, hi)
        if not float(excess @ again.weights) > 0.0:
            break
        moved = int(np.count_nonzero(again.state != state))
        state, w = again.state, again.weights
        if moved < _RERANK_MIN_MOVES:
            break
    return state


def min_variance_start(inputs: MixInputs) -> StateArray:
    """Lowest-volatility assets first (the same greedy fill, scored by -sigma_i)."""
    vol = inputs.volatilities
    state = max_return_vertex(-vol, inputs.lower, inputs.upper).state
    state[inputs.lower == inputs.upper] = FIXED
    if not (state == FREE).any():
        state[int(np.argmin(np.where(inputs.lower == inputs.upper, np.inf, vol)))] = FREE
    return state
