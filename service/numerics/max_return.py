"""The highest-expected-return fully invested portfolio within the bounds (a small LP).

It answers three questions for the exact methods: can any feasible portfolio beat the
risk-free rate, where a primal active-set search may start (a vertex with one free
asset), and where the critical line starts (the top of the frontier).
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt
import scipy.optimize

__all__ = ["FREE", "LOWER", "UPPER", "FIXED", "MaxReturn", "max_return_vertex", "state_of"]

FloatArray = npt.NDArray[np.float64]
StateArray = npt.NDArray[np.int8]

# Where each asset sits in an active set.
FREE, LOWER, UPPER, FIXED = np.int8(0), np.int8(-1), np.int8(1), np.int8(2)


class MaxReturn:
    """Result of the LP: ``best`` may be +inf (unbounded), then ``weights`` is merely a
    feasible portfolio with a positive excess return."""

    def __init__(self, weights: FloatArray, state: StateArray, best: float, marginal: int) -> None:
        self.weights = weights
        self.state = state
        self.best = best
        self.marginal = marginal  # index of the asset that absorbs the budget, -1 if none


def state_of(w: FloatArray, lo: FloatArray, hi: FloatArray) -> StateArray:
    """Active set read off a feasible portfolio (exact equality with a bound)."""
    state = np.zeros(w.shape[0], dtype=np.int8)
    state[w == lo] = LOWER
    state[w == hi] = UPPER
    state[lo == hi] = FIXED
    return state


def _ensure_one_free(state: StateArray, order: npt.NDArray[np.intp]) -> int:
    free = np.flatnonzero(state == FREE)
    if free.size:
        return int(free[0])
    movable = order[state[order] != FIXED]
    if movable.size == 0:
        return -1
    state[movable[0]] = FREE
    return int(movable[0])


def max_return_vertex(score: FloatArray, lo: FloatArray, hi: FloatArray) -> MaxReturn:
    """Maximise ``score @ w`` subject to sum(w) = 1 and lo <= w <= hi."""
    n = score.shape[0]
    order = np.argsort(-score, kind="stable")
    if np.all(np.isfinite(lo)):
        # Fill from the lower bounds, best score first.
        budget = 1.0 - float(lo.sum())
        gaps = (hi - lo)[order]
        filled = np.cumsum(gaps)
        k = min(int(np.searchsorted(filled, budget, side="left")), n - 1)
        w = lo.copy()
        w[order[:k]] = hi[order[:k]]
        before = float(filled[k - 1]) if k > 0 else 0.0
        w[order[k]] = min(lo[order[k]] + max(budget - before, 0.0), hi[order[k]])
        state = np.full(n, LOWER, dtype=np.int8)
        state[order[:k]] = UPPER
        state[order[k]] = FREE
        state[lo == hi] = FIXED
        marginal = _ensure_one_free(state, order)
        return MaxReturn(w, state, float(score @ w), marginal)
    if np.all(np.isfinite(hi)):
        # Empty from the upper bounds, worst score first.
        excess = float(hi.sum()) - 1.0
        rev = order[::-1]
        gaps = (hi - lo)[rev]
        emptied = np.cumsum(gaps)
        k = min(int(np.searchsorted(emptied, excess, side="left")), n - 1)
        w = hi.copy()
        w[rev[:k]] = lo[rev[:k]]
        before = float(emptied[k - 1]) if k > 0 else 0.0
        w[rev[k]] = max(hi[rev[k]] - max(excess - before, 0.0), lo[rev[k]])
        state = np.full(n, UPPER, dtype=np.int8)
        state[rev[:k]] = LOWER
        state[rev[k]] = FREE
        state[lo == hi] = FIXED
        marginal = _ensure_one_free(state, order)
        return MaxReturn(w, state, float(score @ w), marginal)
    # Some weights can go to -inf and others to +inf: the feasible set is unbounded.
    up = np.flatnonzero(np.isposinf(hi))
    down = np.flatnonzero(np.isneginf(lo))
    i = int(up[np.argmax(score[up])])
    j = int(down[np.argmin(score[down])])
    if i == j:
        # The same asset carries both infinite bounds; try the runner-up on each side.
        up_alt = up[up != i]
        down_alt = down[down != j]
        gain_i = (score[i] - score[down_alt].min()) if down_alt.size else -math.inf
        gain_j = (score[up_alt].max() - score[j]) if up_alt.size else -math.inf
        if gain_i >= gain_j:
            j = int(down_alt[np.argmin(score[down_alt])]) if down_alt.size else j
        else:
            i = int(up_alt[np.argmax(score[up_alt])])
    if i != j and score[i] > score[j]:
        base = np.clip(0.0, lo, hi)
        base[i] = 0.0
        base[j] = 0.0
        base[i] = 1.0 - float(base.sum())
        needed = abs(float(score @ base)) + float(np.max(np.abs(score))) + 1.0
        step = needed / float(score[i] - score[j])
        w = base.copy()
        w[i] += step
        w[j] -= step
        state = state_of(w, lo, hi)
        marginal = _ensure_one_free(state, order)
        return MaxReturn(w, state, math.inf, marginal)
    # Rare: unbounded set but bounded LP. Solve it as an LP and read the vertex.
    bounds = [(None if math.isinf(a) else float(a), None if math.isinf(b) else float(b))
              for a, b in zip(lo, hi, strict=True)]
    res = scipy.optimize.linprog(-score, A_eq=np.ones((1, n)), b_eq=[1.0], bounds=bounds, method="highs")
    if res.status != 0:
        raise RuntimeError(f"max-return LP failed: {res.message}")
    w = np.asarray(res.x, dtype=np.float64)
    state = state_of(w, lo, hi)
    marginal = _ensure_one_free(state, order)
    return MaxReturn(w, state, float(score @ w), marginal)
