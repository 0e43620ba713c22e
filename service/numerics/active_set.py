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
primal violator to its bound and releases the most wrong-signed bound multipliers (at
most max(6, free count) per step), restarted releasing them all and then from the
all-free face; if it still cycles or meets a singular face, a primal active-set method
(one change per step, Bland's rule after a degenerate step) finishes from a feasible
vertex. The answer is accepted only after a scale-free KKT check
(stationarity, primal feasibility, dual signs, complementarity) to 1e-10.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from service.numerics.errors import InputError
from service.numerics.max_return import FIXED, FREE, LOWER, UPPER, max_return_vertex
from service.numerics.risk import FreeBlock, Risk, as_risk

__all__ = [
    "KKT_TOLERANCE",
    "BoxProblem",
    "Face",
    "min_variance_kkt_residual",
    "solve_box_problem",
    "tangency_kkt_residual",
]

FloatArray = npt.NDArray[np.float64]
StateArray = npt.NDArray[np.int8]
IndexArray = npt.NDArray[np.intp]

KKT_TOLERANCE = 1e-10
# Decision tolerances inside the iteration, relative to the scale of the numbers compared.
_PRIMAL_RTOL = 1e-13
_DUAL_RTOL = 1e-14
# t below this fraction of sum|y| counts as "not attained by a fully invested portfolio".
_T_RTOL = 1e-12


@dataclass(frozen=True, eq=False)
class Face:
    """Solution of the equality-constrained problem on one face.

    ``y``/``t`` are the homogenised weights, w = y / t (t == 1 for minimum variance, and
    for the primal-dual iteration, which rescales to weight units); ``grad`` is the reduced
    gradient S y - alpha e - beta 1 on every asset, whose sign on a bounded asset is its
    bound multiplier (>= 0 at a lower bound, <= 0 at an upper bound).
    """

    y: FloatArray
    t: float
    alpha: float
    beta: float
    grad: FloatArray


class BoxProblem:
    """One of the two programs on fixed data; ``excess`` is None for minimum variance."""

    def __init__(self, covariance: FloatArray | Risk, lower: FloatArray, upper: FloatArray,
                 excess: FloatArray | None) -> None:
        # A dense matrix or a factor model: every product and free-block solve goes through it.
        self.risk = as_risk(covariance)
        self.lo = lower
        self.hi = upper
        self.e = excess
        self.n = lower.shape[0]
        low_min, high_max = float(lower.min()), float(upper.max())
        low_max, high_min = float(lower.max()), float(upper.min())
        all_finite = math.isfinite(low_min) and math.isfinite(high_max)
        if all_finite:
            # Finite bounds (the common case): no masking needed anywhere.
            self.finite_lo = self.finite_hi = np.ones(self.n, dtype=bool)
            self.lo0, self.hi0 = lower, upper
        else:
            self.finite_lo = np.isfinite(lower)
            self.finite_hi = np.isfinite(upper)
            self.lo0 = np.where(self.finite_lo, lower, 0.0)
            self.hi0 = np.where(self.finite_hi, upper, 0.0)
        self.fixed = lower == upper
        self.any_fixed = bool(self.fixed.any())
        self.e_scale = float(np.abs(excess).max()) if excess is not None else 0.0
        self.diag_max = float(self.risk.diagonal.max())
        # sum|w| <= 1 + 2 sum(max(-lo, 0)) on the budget and max|w| <= the largest bound, so
        # with finite bounds both tolerances are scaled without a pass over w.
        if all_finite:
            self.abs_sum_bound = 1.0 if low_min >= 0.0 else 1.0 + 2.0 * float(np.maximum(-lower, 0.0).sum())
            self.abs_max_bound = max(1.0, high_max, -low_min, abs(low_max), abs(high_min))
        else:
            self.abs_sum_bound = self.abs_max_bound = math.inf
        # Columns (e, 1, S c): S c starts at zero and is filled per solve.
        self.base = np.empty((self.n, 3))
        self.base[:, 0] = 0.0 if excess is None else excess
        self.base[:, 1] = 1.0
        self.base[:, 2] = 0.0

    @property
    def tangency(self) -> bool:
        return self.e is not None

    def bound_values(self, state: StateArray) -> FloatArray:
        """The weight (per unit t) each bounded asset is held at; 0 for free assets."""
        out: FloatArray = np.where(state == UPPER, self.hi0, self.lo0)
        out[state == FREE] = 0.0
        return out

    def solve_face(self, state: StateArray) -> Face | None:
        """Exact KKT solution on the face ``state``; None when the face is singular."""
        free = np.flatnonzero(state == FREE)
        c = self.bound_values(state)
        held = np.flatnonzero(c)
        c_held = c[held]
        s_c = self.risk.columns_times(held, c_held)
        f = free.size
        block = self.risk.block(free) if f else None
        if block is None:
            return None
        if self.e is None:
            return self._solve_min_variance(free, held, c_held, s_c, block, f)
        return self._solve_tangency(free, held, c_held, s_c, block, f)

    def _solve_min_variance(self, free: IndexArray, held: IndexArray, c_held: FloatArray,
                            s_c: FloatArray, block: FreeBlock, f: int) -> Face | None:
        y = np.zeros(self.n)
        y[held] = c_held
        if f == 0:
            return None
        budget = 1.0 - float(c_held.sum())
        rhs = np.empty((f, 2))
        rhs[:, 0] = 1.0
        rhs[:, 1] = s_c[free]
        solved = block.solve(rhs)
        v, r = solved[:, 0], solved[:, 1]
        one_v = float(v.sum())
        if not one_v > 0.0:
            return None
        beta = (budget + float(r.sum())) / one_v
        y_f = beta * v - r
        y[free] = y_f
        grad = block.spread(y_f) + s_c - beta
        return Face(y=y, t=1.0, alpha=0.0, beta=beta, grad=grad)

    def _solve_tangency(self, free: IndexArray, held: IndexArray, c_held: FloatArray,
                        s_c: FloatArray, block: FreeBlock, f: int) -> Face | None:
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
        solved = block.solve(rhs)
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
        grad = block.spread(y_f) + t * s_c - alpha * e - beta
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


# Maps state + 1 (LOWER=-1, FREE=0, UPPER=1, FIXED=2) to the sign that makes a bound
# multiplier non-negative: grad >= 0 at a lower bound, -grad >= 0 at an upper one.
_SIDE = np.array([1.0, 0.0, -1.0, 0.0])
# At most this many (or as many as are free, if more) bounded assets are released per
# iteration: releasing every wrong-signed multiplier at once overshoots badly when many
# assets start at a bound, and the next iterations then mostly undo it.
_RELEASE_FLOOR = 6


def _solve3(m00: float, m01: float, m02: float, m10: float, m11: float, m12: float,
            m20: float, m21: float, m22: float) -> tuple[float, float, float] | None:
    """Cramer's rule for M x = (1, 0, 0); None when M is numerically singular."""
    c00 = m11 * m22 - m12 * m21
    c10 = m12 * m20 - m10 * m22
    c20 = m10 * m21 - m11 * m20
    det = m00 * c00 + m01 * c10 + m02 * c20
    size = max(abs(m00 * c00), abs(m01 * c10), abs(m02 * c20))
    if not abs(det) > 1e-14 * size:
        return None
    return c00 / det, c10 / det, c20 / det


def _pdas(problem: BoxProblem, state: StateArray, max_iter: int,
          release_floor: int = _RELEASE_FLOOR) -> tuple[Face, StateArray, int] | None:
    """Primal-dual active set: move primal violators to their bound and release bounded
    assets whose multiplier has the wrong sign (at most max(release_floor, free count)).

    Works on index sets. ``base`` holds the columns (e, 1, S c) with c the held bound
    values, so one row gather gives the right-hand sides and one product all the bounded
    sums; S c is updated only for the assets that change. One Cholesky of the free block
    per iteration, through LAPACK directly (the block is small, so call overhead is what
    counts). The face is solved in homogenised form and rescaled to t = 1, so the returned
    Face is in weight units. Returns None on a cycle, a singular face or t <= 0, for the
    caller's primal fallback.
    """
    risk = problem.risk
    tangency = problem.e is not None
    lo, hi = problem.lo, problem.hi
    state = state.copy()
    c = problem.bound_values(state)
    base = problem.base.copy()
    held = np.flatnonzero(c)
    if held.size:
        base[:, 2] = risk.columns_times(held, c[held])
    side = _SIDE[state + 1]
    c_abs = float(np.abs(c).sum())
    e_scale, diag_max = problem.e_scale, problem.diag_max
    finite_box = math.isfinite(problem.abs_max_bound)
    tol_p_box = _PRIMAL_RTOL * problem.abs_max_bound
    abs_sum_bound = problem.abs_sum_bound
    seen: set[bytes] = set()
    for iteration in range(1, max_iter + 1):
        key = state.tobytes()
        if key in seen:
            return None
        seen.add(key)
        free = (state == FREE).nonzero()[0]
        f = free.size
        if f == 0:
            return None
        block = risk.block(free)
        if block is None:
            return None
        e_b, c_sum, q = (c @ base).tolist()
        rhs = base.take(free, axis=0)
        if tangency:
            sol = block.solve(rhs)
            (eu, ev, er), (_, one_v, one_r), (_, _, hr) = (rhs.T @ sol).tolist()
            s_b = c_sum - 1.0
            abt = _solve3(eu, ev, e_b - er, ev, one_v, s_b - one_r, er - e_b, one_r - s_b, q - hr)
            if abt is None or not abt[2] > 0.0:
                return None
            a, b = abt[0] / abt[2], abt[1] / abt[2]
            w_f = sol @ np.array([a, b, -1.0])
        else:
            sol = block.solve(rhs[:, 1:])
            one_v, one_r = sol.sum(axis=0).tolist()
            if not one_v > 0.0:
                return None
            a, b = 0.0, (1.0 - c_sum + one_r) / one_v
            w_f = sol @ np.array([b, -1.0])
        # Reduced gradient S w - a e - b 1 on every asset; base @ (-a, -b, 1) = S c - a e - b.
        grad = block.spread(w_f)
        grad += base @ np.array([-a, -b, 1.0])
        if finite_box:
            tol_p = tol_p_box
            w_abs_sum = abs_sum_bound
        else:
            abs_w = np.abs(w_f)
            tol_p = _PRIMAL_RTOL * max(1.0, float(abs_w.max()))
            w_abs_sum = float(abs_w.sum()) + c_abs
        tol_d = _DUAL_RTOL * (diag_max * w_abs_sum + abs(a) * e_scale + abs(b))
        to_lower = w_f < lo.take(free) - tol_p
        to_upper = (w_f > hi.take(free) + tol_p) & ~to_lower
        signed = grad * side
        release = (signed < -tol_d).nonzero()[0]
        some_lower, some_upper = bool(to_lower.any()), bool(to_upper.any())
        if not (release.size or some_lower or some_upper):
            w = c.copy()
            w[free] = w_f
            return Face(y=w, t=1.0, alpha=a, beta=b, grad=grad), state, iteration
        limit = max(release_floor, f)
        if release.size > limit:
            release = release[np.argpartition(signed[release], limit - 1)[:limit]]
        state = state.copy()
        c_old = c
        c = c.copy()
        side = side.copy()
        if some_lower:
            down = free[to_lower]
            state[down] = LOWER
            c[down] = lo[down]
            side[down] = 1.0
        if some_upper:
            up = free[to_upper]
            state[up] = UPPER
            c[up] = hi[up]
            side[up] = -1.0
        state[release] = FREE
        c[release] = 0.0
        side[release] = 0.0
        changed = (c != c_old).nonzero()[0]
        if changed.size:
            base[:, 2] += risk.columns_times(changed, c[changed] - c_old[changed])
            c_abs = float(np.abs(c).sum())
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
        free = state == FREE
        step = 1.0
        if np.count_nonzero(free) > 1:
            # With one free asset the face is a single point: nothing can block.
            low, high = problem.slacks(y, t)
            d_low = np.where(problem.finite_lo, dy - problem.lo0 * dt, 0.0)
            d_high = np.where(problem.finite_hi, problem.hi0 * dt - dy, 0.0)
            # Directions at rounding level are not moves towards a bound.
            d_tol = 1e-14 * max(float(np.max(np.abs(y))), abs(t), float(np.max(np.abs(face.y))), abs(face.t))
            with np.errstate(divide="ignore", invalid="ignore"):
                r_low = np.where(free & (d_low < -d_tol), np.maximum(low, 0.0) / -d_low, math.inf)
                r_high = np.where(free & (d_high < -d_tol), np.maximum(high, 0.0) / -d_high, math.inf)
            step = min(1.0, float(r_low.min()), float(r_high.min()))
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


def tangency_kkt_residual(s: FloatArray | Risk, excess: FloatArray, lo: FloatArray, hi: FloatArray,
                          w: FloatArray, state: StateArray, beta_hint: float,
                          sw: FloatArray | None = None) -> float:
    """Scale-free KKT residual of w as the maximum-Sharpe portfolio.

    Optimality of max (e'w)/sqrt(w'Sw) on {1'w = 1, lo <= w <= hi} reads
    S w - a e - b 1 = (bound multipliers) with a = w'Sw / e'w, multipliers >= 0 at lower
    bounds and <= 0 at upper bounds, zero on free assets. ``sw`` (= S w) is computed
    when not given (``s`` a dense matrix or a Risk).
    """
    risk = as_risk(s)
    if sw is None:
        sw = risk.times(w)
    gain = float(excess @ w)
    if not gain > 0.0:
        return math.inf
    a = float(w @ sw) / gain
    partial = sw - a * excess
    return _box_residual(float(np.max(risk.diagonal)), partial, lo, hi, w, state, beta_hint,
                         extra_scale=abs(a) * float(np.max(np.abs(excess))))


def min_variance_kkt_residual(s: FloatArray | Risk, lo: FloatArray, hi: FloatArray, w: FloatArray,
                              state: StateArray, beta_hint: float, sw: FloatArray | None = None) -> float:
    """Scale-free KKT residual of w as the minimum-variance portfolio (S w - b 1 = multipliers)."""
    risk = as_risk(s)
    return _box_residual(float(np.max(risk.diagonal)), risk.times(w) if sw is None else sw, lo, hi, w,
                         state, beta_hint, extra_scale=0.0)


def _box_residual(diag_max: float, partial: FloatArray, lo: FloatArray, hi: FloatArray, w: FloatArray,
                  state: StateArray, beta_hint: float, extra_scale: float) -> float:
    free = state == FREE
    side = _SIDE[state + 1]
    count = int(np.count_nonzero(free))
    b = float(partial[free].sum()) / count if count else beta_hint
    g = partial - b
    abs_g = np.abs(g)
    # Free assets: |g| must vanish; bounded ones: side * g (the multiplier) must be >= 0.
    worst_g = max(float(np.where(free, abs_g, -side * g).max()), 0.0)
    abs_w = np.abs(w)
    # Measured against the size of the terms summed in S w (|S_ij| <= max diag for PSD S),
    # so the residual is a relative backward error and does not grow with conditioning.
    scale = max(float(np.abs(partial).max()), diag_max * float(abs_w.sum()), abs(b), extra_scale,
                np.finfo(float).tiny)
    w_scale = max(1.0, float(abs_w.max()))
    # Infinite bounds give -inf here, never NaN, since w is finite.
    primal = max(float((lo - w).max()), float((w - hi).max()), abs(float(w.sum()) - 1.0), 0.0)
    # Complementarity: distance of a bounded asset from its bound times its multiplier.
    gap = np.abs(w - np.where(side > 0.0, lo, hi))
    complementarity = float((np.where(side != 0.0, gap, 0.0) * abs_g).max())
    return max(worst_g / scale, primal / w_scale, complementarity / (scale * w_scale))


@dataclass(frozen=True, eq=False)
class BoxSolution:
    weights: FloatArray
    state: StateArray
    kkt_residual: float
    iterations: int
    route: str  # "pdas" or "primal"
    variance: float


def _finish(problem: BoxProblem, face: Face, state: StateArray, sw: FloatArray | None) -> tuple[FloatArray, float, float]:
    """Weights with bounded assets exactly on their bounds, their KKT residual and w'Sw.

    ``sw`` is S w when the caller has it (the primal-dual iteration carries it in its
    reduced gradient); otherwise it is computed afresh over the non-zero weights.
    """
    if problem.e is not None:
        if not face.t > _T_RTOL * float(np.sum(np.abs(face.y))):
            raise InputError(
                "risk_free_rate",
                "the maximum Sharpe ratio would sit on the inefficient branch: it is approached only "
                f"by portfolios that are not fully invested (t = {face.t:.3g}); the risk-free rate must "
                "lie below the return of the minimum-variance portfolio")
        w = face.y / face.t
    else:
        w = face.y.copy()
    bounded = state != FREE
    w[bounded] = problem.bound_values(state)[bounded]
    if sw is None:
        support = np.flatnonzero(w)
        sw = problem.risk.columns_times(support, w[support])
    variance = float(w @ sw)
    if problem.e is not None:
        res = tangency_kkt_residual(problem.risk, problem.e, problem.lo, problem.hi, w, state,
                                    face.beta / face.t, sw=sw)
    else:
        res = min_variance_kkt_residual(problem.risk, problem.lo, problem.hi, w, state, face.beta, sw=sw)
    return w, res, variance


def solve_box_problem(problem: BoxProblem, start: StateArray,
                      before_fallback: Callable[[], None] | None = None) -> BoxSolution:
    """Solve from a warm-start active set; primal active set if the fast iteration fails
    (``before_fallback`` runs first: the place for input checks only failures need).

    The primal-dual iteration is tried up to three times. A greedy start with few free
    assets and many binding caps can make it swap a handful of assets back and forth (it
    releases at most max(6, f) per step) and end on a homogenised face with t <= 0; it is
    then restarted from ``start`` releasing every wrong-signed bound at once, and then from
    the face with every asset free (where it only moves assets onto bounds, but whose
    tangency face has t <= 0 when the risk-free rate is high). Each failed attempt costs a
    few Cholesky factorisations, far less than the primal search's one refactorisation per
    working-set change.
    """
    if problem.any_fixed:
        start = start.copy()
        start[problem.fixed] = FIXED
    if not (start == FREE).any():
        start = start.copy()
        start[int(np.flatnonzero(~problem.fixed)[0])] = FREE
    max_iter = min(4 * problem.n + 10, 200)
    all_free = np.where(problem.fixed, FIXED, FREE).astype(np.int8)
    for first, floor in ((start, _RELEASE_FLOOR), (start, problem.n), (all_free, _RELEASE_FLOOR)):
        quick = _pdas(problem, first, max_iter=max_iter, release_floor=floor)
        if quick is None:
            continue
        face, state, iterations = quick
        # The iteration's reduced gradient is S w - a e - b 1 in weight units.
        sw = face.grad + face.beta
        if problem.e is not None:
            sw += face.alpha * problem.e
        w, res, variance = _finish(problem, face, state, sw)
        if res <= KKT_TOLERANCE:
            return BoxSolution(w, state, res, iterations, "pdas", variance)
    if before_fallback is not None:
        before_fallback()
    face, state, iterations = _primal(problem, max_iter=20 * problem.n + 100)
    w, res, variance = _finish(problem, face, state, None)
    if res > KKT_TOLERANCE:
        raise RuntimeError(f"active-set solution failed its KKT check: residual {res:.3g} > {KKT_TOLERANCE:g}")
    return BoxSolution(w, state, res, iterations, "primal", variance)
