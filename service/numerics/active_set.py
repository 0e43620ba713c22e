"""Exact active-set solution of the two bounded quadratic programs behind a risky mix.

* Tangency (maximum Sharpe ratio) through the Charnes-Cooper homogenisation: with
  e = mu - rf, minimise y'Sy subject to e'y = 1, 1'y = t, lo*t <= y <= hi*t, and
  read w = y / t. ``t`` is left free: for a bounded feasible set the bounds keep it
  positive, and if the optimum has t <= 0 the maximum Sharpe ratio is not attained by
  a fully invested portfolio (the set is rejected).
* Minimum variance: minimise w'Sw subject to 1'w = 1, lo <= w <= hi.

Each face (a partition of the assets into free / at lower / at upper / fixed) is one
equality-constrained KKT solve: a Cholesky factor of the free block and a 3x3 (or
scalar) system for the multipliers. A primal-dual active-set iteration moves every
violator at once; if it cycles or meets a singular face, a primal active-set method
(one change per step, Bland's rule after a degenerate step) finishes from a feasible
vertex. The answer is accepted only after a scale-free KKT check (stationarity,
primal feasibility, dual signs, complementarity) to 1e-10.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
import scipy.linalg

from service.numerics.errors import InputError
from service.numerics.max_return import FIXED, FREE, LOWER, UPPER, max_return_vertex

__all__ = ["Face", "BoxProblem", "solve_box_problem", "tangency_kkt_residual",
           "min_variance_kkt_residual", "KKT_TOLERANCE"]

FloatArray = npt.NDArray[np.float64]
StateArray = npt.NDArray[np.int8]
IndexArray = npt.NDArray[np.intp]

KKT_TOLERANCE = 1e-10
# Decision tolerances inside the iteration, relative to the scale of the numbers compared.
_PRIMAL_RTOL = 1e-13
_DUAL_RTOL = 1e-13
# t below this fraction of sum|y| counts as "not attained by a fully invested portfolio".
_T_RTOL = 1e-12


@dataclass(frozen=True, eq=False)
class Face:
    """Solution of the equality-constrained problem on one face.

    ``y``/``t`` are the homogenised weights (t == 1 for minimum variance); ``grad`` is the
    reduced gradient S y - alpha e - beta 1 on every asset, whose sign on a bounded asset
    is its bound multiplier (>= 0 at a lower bound, <= 0 at an upper bound).
    """

    y: FloatArray
    t: float
    alpha: float
    beta: float
    grad: FloatArray


class BoxProblem:
    """One of the two programs on fixed data; ``excess`` is None for minimum variance."""

    def __init__(self, covariance: FloatArray, lower: FloatArray, upper: FloatArray,
                 excess: FloatArray | None) -> None:
        self.s = np.ascontiguousarray(covariance)
        self.lo = lower
        self.hi = upper
        self.e = excess
        self.n = lower.shape[0]
        self.fixed = lower == upper
        self.finite_lo = np.isfinite(lower)
        self.finite_hi = np.isfinite(upper)
        self.lo0 = np.where(self.finite_lo, lower, 0.0)
        self.hi0 = np.where(self.finite_hi, upper, 0.0)

    @property
    def tangency(self) -> bool:
        return self.e is not None

    def bound_values(self, state: StateArray) -> FloatArray:
        """The weight (per unit t) each bounded asset is held at; 0 for free assets."""
        return np.where(state == UPPER, self.hi0, np.where((state == LOWER) | (state == FIXED), self.lo0, 0.0))

    def solve_face(self, state: StateArray) -> Face | None:
        """Exact KKT solution on the face ``state``; None when the face is singular."""
        free = np.flatnonzero(state == FREE)
        c = self.bound_values(state)
        held = np.flatnonzero(c)
        c_held = c[held]
        # Row gathers of a C-ordered matrix are cheap; S is symmetric, so rows = columns.
        s_c = c_held @ self.s[held] if held.size else np.zeros(self.n)
        rows_f = self.s[free]
        f = free.size
        if self.e is None:
            return self._solve_min_variance(free, held, c_held, s_c, rows_f, f)
        return self._solve_tangency(free, held, c_held, s_c, rows_f, f)

    def _factor_solve(self, rows_f: FloatArray, free: IndexArray, rhs: FloatArray) -> FloatArray | None:
        block = rows_f[:, free]
        try:
            factor = scipy.linalg.cho_factor(block, lower=False, check_finite=False, overwrite_a=True)
        except np.linalg.LinAlgError:
            return None
        out: FloatArray = scipy.linalg.cho_solve(factor, rhs, check_finite=False)
        return out

    def _solve_min_variance(self, free: IndexArray, held: IndexArray, c_held: FloatArray,
                            s_c: FloatArray, rows_f: FloatArray, f: int) -> Face | None:
        y = np.zeros(self.n)
        y[held] = c_held
        if f == 0:
            return None
        budget = 1.0 - float(c_held.sum())
        rhs = np.empty((f, 2))
        rhs[:, 0] = 1.0
        rhs[:, 1] = s_c[free]
        solved = self._factor_solve(rows_f, free, rhs)
        if solved is None:
            return None
        v, r = solved[:, 0], solved[:, 1]
        one_v = float(v.sum())
        if not one_v > 0.0:
            return None
        beta = (budget + float(r.sum())) / one_v
        y_f = beta * v - r
        y[free] = y_f
        grad = y_f @ rows_f + s_c - beta
        return Face(y=y, t=1.0, alpha=0.0, beta=beta, grad=grad)

    def _solve_tangency(self, free: IndexArray, held: IndexArray, c_held: FloatArray,
                        s_c: FloatArray, rows_f: FloatArray, f: int) -> Face | None:
        assert self.e is not None
        e = self.e
        e_b = float(e[held] @ c_held)
        s_b = float(c_held.sum()) - 1.0
        q = float(c_held @ s_c[held])
        if f == 0:
            return None
        e_f = e[free]
        h = s_c[free]
        rhs = np.empty((f, 3))
        rhs[:, 0] = e_f
        rhs[:, 1] = 1.0
        rhs[:, 2] = h
        solved = self._factor_solve(rows_f, free, rhs)
        if solved is None:
            return None
        u, v, r = solved[:, 0], solved[:, 1], solved[:, 2]
        eu, ev, er = float(e_f @ u), float(e_f @ v), float(e_f @ r)
        one_v, one_r = float(v.sum()), float(r.sum())
        # (alpha, beta, t) from the two constraints and stationarity in t.
        m = np.array([[eu, ev, e_b - er],
                      [ev, one_v, s_b - one_r],
                      [er - e_b, one_r - s_b, q - float(h @ r)]])
        try:
            alpha, beta, t = np.linalg.solve(m, np.array([1.0, 0.0, 0.0]))
        except np.linalg.LinAlgError:
            return None
        if not (math.isfinite(alpha) and math.isfinite(beta) and math.isfinite(t)):
            return None
        y_f = alpha * u + beta * v - t * r
        y = np.zeros(self.n)
        y[held] = c_held * t
        y[free] = y_f
        grad = y_f @ rows_f + t * s_c - alpha * e - beta
        return Face(y=y, t=float(t), alpha=float(alpha), beta=float(beta), grad=grad)

    # --- decisions on a face solution -------------------------------------------------

    def slacks(self, y: FloatArray, t: float) -> tuple[FloatArray, FloatArray]:
        """Homogenised slacks y - lo t and hi t - y (+inf where the bound is infinite)."""
        low = np.where(self.finite_lo, y - self.lo0 * t, math.inf)
        high = np.where(self.finite_hi, self.hi0 * t - y, math.inf)
        return low, high

    def tolerances(self, face: Face) -> tuple[float, float]:
        y_scale = max(float(np.max(np.abs(face.y))), abs(face.t))
        g_scale = float(np.max(np.abs(face.grad + face.beta + (0.0 if self.e is None else face.alpha * self.e))))
        g_scale = max(g_scale, abs(face.beta), 0.0 if self.e is None else abs(face.alpha) * float(np.max(np.abs(self.e))))
        return _PRIMAL_RTOL * y_scale, _DUAL_RTOL * max(g_scale, np.finfo(float).tiny)


def _pdas(problem: BoxProblem, state: StateArray, max_iter: int) -> tuple[Face, StateArray, int] | None:
    """Primal-dual active set: move every primal violator and wrong-signed multiplier."""
    seen: set[bytes] = set()
    for iteration in range(1, max_iter + 1):
        key = state.tobytes()
        if key in seen:
            return None
        seen.add(key)
        face = problem.solve_face(state)
        if face is None:
            return None
        tol_p, tol_d = problem.tolerances(face)
        low, high = problem.slacks(face.y, face.t)
        free = state == FREE
        to_lower = free & (low < -tol_p)
        to_upper = free & (high < -tol_p) & ~to_lower
        release = ((state == LOWER) & (face.grad < -tol_d)) | ((state == UPPER) & (face.grad > tol_d))
        if not (to_lower.any() or to_upper.any() or release.any()):
            return face, state, iteration
        state = state.copy()
        state[to_lower] = LOWER
        state[to_upper] = UPPER
        state[release] = FREE
        if not (state == FREE).any():
            return None
    return None


def _primal(problem: BoxProblem, max_iter: int) -> tuple[Face, StateArray, int]:
    """Primal active set from the max-return vertex: one working-set change per step."""
    score = problem.e if problem.e is not None else np.zeros(problem.n)
    start = max_return_vertex(score, problem.lo, problem.hi)
    state = start.state.copy()
    w0 = start.weights
    if problem.e is not None:
        gain = float(problem.e @ w0)
        if not gain > 0.0:
            raise InputError("risk_free_rate", f"no feasible portfolio earns more than the risk-free rate "
                                               f"(best excess return {gain:.6g})")
        t = 1.0 / gain
    else:
        t = 1.0
    y = w0 * t
    degenerate = False
    for iteration in range(1, max_iter + 1):
        face = problem.solve_face(state)
        if face is None:
            raise RuntimeError("active-set search reached a singular face")
        dy = face.y - y
        dt = face.t - t
        low, high = problem.slacks(y, t)
        d_low = np.where(problem.finite_lo, dy - problem.lo0 * dt, 0.0)
        d_high = np.where(problem.finite_hi, problem.hi0 * dt - dy, 0.0)
        free = state == FREE
        with np.errstate(divide="ignore", invalid="ignore"):
            r_low = np.where(free & (d_low < 0.0), np.maximum(low, 0.0) / -d_low, math.inf)
            r_high = np.where(free & (d_high < 0.0), np.maximum(high, 0.0) / -d_high, math.inf)
        step_low, step_high = float(r_low.min()), float(r_high.min())
        step = min(1.0, step_low, step_high)
        if step < 1.0:
            y = y + step * dy
            t = t + step * dt
            ties = np.flatnonzero(np.minimum(r_low, r_high) <= step)
            i = int(ties[0])  # Bland: the smallest index among the blocking constraints
            state = state.copy()
            if r_low[i] <= r_high[i]:
                state[i] = LOWER
                y[i] = problem.lo0[i] * t
            else:
                state[i] = UPPER
                y[i] = problem.hi0[i] * t
            degenerate = step == 0.0
            continue
        y, t = face.y, face.t
        _, tol_d = problem.tolerances(face)
        signed = np.where(state == LOWER, face.grad, np.where(state == UPPER, -face.grad, math.inf))
        wrong = np.flatnonzero(signed < -tol_d)
        if wrong.size == 0:
            return face, state, iteration
        i = int(wrong[0]) if degenerate else int(wrong[np.argmin(signed[wrong])])
        state = state.copy()
        state[i] = FREE
        degenerate = False
    raise RuntimeError(f"primal active-set search did not finish in {max_iter} steps")


def tangency_kkt_residual(s: FloatArray, excess: FloatArray, lo: FloatArray, hi: FloatArray,
                          w: FloatArray, state: StateArray, beta_hint: float) -> float:
    """Scale-free KKT residual of w as the maximum-Sharpe portfolio.

    Optimality of max (e'w)/sqrt(w'Sw) on {1'w = 1, lo <= w <= hi} reads
    S w - a e - b 1 = (bound multipliers) with a = w'Sw / e'w, multipliers >= 0 at lower
    bounds and <= 0 at upper bounds, zero on free assets.
    """
    sw = s @ w
    gain = float(excess @ w)
    if not gain > 0.0:
        return math.inf
    a = float(w @ sw) / gain
    partial = sw - a * excess
    return _box_residual(s, partial, lo, hi, w, state, beta_hint,
                         extra_scale=abs(a) * float(np.max(np.abs(excess))))


def min_variance_kkt_residual(s: FloatArray, lo: FloatArray, hi: FloatArray, w: FloatArray,
                              state: StateArray, beta_hint: float) -> float:
    """Scale-free KKT residual of w as the minimum-variance portfolio (S w - b 1 = multipliers)."""
    return _box_residual(s, s @ w, lo, hi, w, state, beta_hint, extra_scale=0.0)


def _box_residual(s: FloatArray, partial: FloatArray, lo: FloatArray, hi: FloatArray, w: FloatArray,
                  state: StateArray, beta_hint: float, extra_scale: float) -> float:
    free = state == FREE
    b = float(partial[free].mean()) if free.any() else beta_hint
    g = partial - b
    # Measured against the size of the terms summed in S w (|S_ij| <= max diag for PSD S),
    # so the residual is a relative backward error and does not grow with conditioning.
    scale = max(float(np.max(np.abs(partial))), float(np.max(np.diag(s))) * float(np.abs(w).sum()),
                abs(b), extra_scale, np.finfo(float).tiny)
    w_scale = max(1.0, float(np.max(np.abs(w))))
    stationarity = float(np.max(np.abs(g[free]), initial=0.0)) / scale
    below = np.where(np.isfinite(lo), lo - w, 0.0)
    above = np.where(np.isfinite(hi), w - hi, 0.0)
    primal = max(float(np.max(below, initial=0.0)), float(np.max(above, initial=0.0)), 0.0) / w_scale
    budget = abs(float(w.sum()) - 1.0) / w_scale
    at_lower, at_upper = state == LOWER, state == UPPER
    dual = max(float(np.max(-g[at_lower], initial=0.0)), float(np.max(g[at_upper], initial=0.0)), 0.0) / scale
    gap_lower = np.abs(np.where(at_lower, w - np.where(np.isfinite(lo), lo, w), 0.0))
    gap_upper = np.abs(np.where(at_upper, np.where(np.isfinite(hi), hi, w) - w, 0.0))
    complementarity = float(np.max((gap_lower + gap_upper) * np.abs(g), initial=0.0)) / (scale * w_scale)
    return max(stationarity, primal, budget, dual, complementarity)


@dataclass(frozen=True, eq=False)
class BoxSolution:
    weights: FloatArray
    state: StateArray
    kkt_residual: float
    iterations: int
    route: str  # "pdas" or "primal"


def _finish(problem: BoxProblem, face: Face, state: StateArray) -> tuple[FloatArray, float]:
    if problem.e is not None:
        if not face.t > _T_RTOL * float(np.sum(np.abs(face.y))):
            raise InputError(
                "risk_free_rate",
                "the maximum Sharpe ratio would sit on the inefficient branch: it is approached only "
                f"by portfolios that are not fully invested (t = {face.t:.3g}); the risk-free rate must "
                "lie below the return of the minimum-variance portfolio")
        w = face.y / face.t
        w[state == LOWER] = problem.lo[state == LOWER]
        w[state == UPPER] = problem.hi[state == UPPER]
        w[state == FIXED] = problem.lo[state == FIXED]
        res = tangency_kkt_residual(problem.s, problem.e, problem.lo, problem.hi, w, state, face.beta / face.t)
    else:
        w = face.y.copy()
        w[state == LOWER] = problem.lo[state == LOWER]
        w[state == UPPER] = problem.hi[state == UPPER]
        w[state == FIXED] = problem.lo[state == FIXED]
        res = min_variance_kkt_residual(problem.s, problem.lo, problem.hi, w, state, face.beta)
    return w, res


def solve_box_problem(problem: BoxProblem, start: StateArray) -> BoxSolution:
    """Solve from a warm-start active set; primal active set if the fast iteration fails."""
    start = start.copy()
    start[problem.fixed] = FIXED
    if not (start == FREE).any():
        movable = np.flatnonzero(~problem.fixed)
        start[movable[0]] = FREE
    quick = _pdas(problem, start, max_iter=min(4 * problem.n + 10, 200))
    if quick is not None:
        face, state, iterations = quick
        w, res = _finish(problem, face, state)
        if res <= KKT_TOLERANCE:
            return BoxSolution(w, state, res, iterations, "pdas")
    face, state, iterations = _primal(problem, max_iter=20 * problem.n + 100)
    w, res = _finish(problem, face, state)
    if res > KKT_TOLERANCE:
        raise RuntimeError(f"active-set solution failed its KKT check: residual {res:.3g} > {KKT_TOLERANCE:g}")
    return BoxSolution(w, state, res, iterations, "primal")
