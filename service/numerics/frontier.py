"""The exact efficient frontier as corner portfolios, and the best Sharpe ratio on it.

Without bounds the frontier is the two-fund line through the minimum-variance and
tangency portfolios (Merton 1972). With bounds it is traced by the critical line
algorithm (Markowitz): minimise w'Sw/2 - lambda mu'w on {1'w = 1, lo <= w <= hi} for
lambda rising from 0 (minimum variance). On a fixed active set the weights are affine in
lambda; a corner is where a free weight reaches a bound or a bounded weight's multiplier
reaches zero. The inverse of the free block of S is carried from corner to corner by
bordering (add an asset) and Schur downdates (drop one), each one in-place rank-one BLAS
update of an n x n matrix that is zero outside the free set (no gathers, no repacking).
Each corner costs three BLAS products and a few dozen vector operations over all assets,
with the event search vectorised. Rounding drift of the updated inverse is measured at
every corner (the free entries of the reduced gradients must vanish); one step of
iterative refinement removes small drift, a fresh Cholesky factorisation large drift.

Between consecutive corners the weights are affine in the target return, so
``Frontier.weights_at`` interpolates exactly, and the Sharpe ratio on each segment has a
closed-form maximum (``best_sharpe_on_frontier``), an independent check of the tangency.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy.linalg.blas import dger as _ger
from scipy.linalg.lapack import dpotrf as _potrf
from scipy.linalg.lapack import dpotri as _potri

from service.numerics.active_set import BoxProblem, BoxSolution, solve_box_problem
from service.numerics.closed_form import ClosedForm
from service.numerics.errors import InputError
from service.numerics.exact import only_feasible_weights
from service.numerics.inputs import MixInputs
from service.numerics.max_return import FIXED, FREE, LOWER, UPPER
from service.numerics.portfolio import Portfolio, portfolio_from_weights
from service.numerics.warm_start import min_variance_start

__all__ = ["Frontier", "efficient_frontier", "frontier_from_min_variance", "best_sharpe_on_frontier",
           "UNBOUNDED_TOP_FACTOR", "SPACINGS"]

FloatArray = npt.NDArray[np.float64]

#: For a frontier without a top (no bounds), ``Frontier.sample`` runs from the
#: minimum-variance return m0 to m0 + UNBOUNDED_TOP_FACTOR * (max(tangency return,
#: max expected return) - m0).
UNBOUNDED_TOP_FACTOR = 1.5
#: How ``Frontier.sample`` may space its points.
SPACINGS = ("return", "volatility")

# Refactorise the free block after this many rank-one updates at the latest, and earlier
# when the free rows of the reduced gradient drift above _REFACTOR_RTOL of their scale;
# above _REFINE_RTOL one refinement step cleans the corner instead.
_REFRESH_EVERY = 256
_REFACTOR_RTOL = 1e-8
_REFINE_RTOL = 3e-11
_RETURN_RTOL = 1e-12


@dataclass(frozen=True, eq=False)
class Frontier:
    """The exact efficient frontier. Between consecutive corner portfolios the weights are
    affine in the target expected return, so any point is an exact interpolation - no re-solve.

    ``unbounded_above`` marks a frontier without a top (no bounds): the last two corners
    then span a ray and ``weights_at`` extrapolates along it above the last corner.
    """

    corner_returns: FloatArray      # (k,) increasing expected returns, first = min variance
    corner_weights: FloatArray      # (k, n)
    unbounded_above: bool = False

    def to_document(self) -> dict[str, Any]:
        """JSON-able form (floats as Python floats: their text round-trips bit for bit)."""
        return {
            "shape": "unbounded_above" if self.unbounded_above else "bounded",
            "corner_returns": [float(x) for x in self.corner_returns],
            "corner_weights": [[float(x) for x in row] for row in self.corner_weights],
        }

    @classmethod
    def from_document(cls, doc: dict[str, Any], n: int) -> Frontier:
        """Rebuild from ``to_document`` for a mix of ``n`` assets, without solving anything."""
        returns = np.array(doc["corner_returns"], dtype=np.float64)
        weights = np.array(doc["corner_weights"], dtype=np.float64)
        k = returns.shape[0]
        if returns.shape != (k,) or weights.shape != (k, n):
            raise ValueError(f"frontier corners have shapes {returns.shape} and {weights.shape}, expected ({k},) and ({k}, {n})")
        returns.setflags(write=False)
        weights.setflags(write=False)
        return cls(corner_returns=returns, corner_weights=weights, unbounded_above=doc["shape"] == "unbounded_above")

    def weights_at(self, target_return: float) -> FloatArray:
        """Weights of the frontier portfolio with expected return ``target_return``.

        Raises ValueError below the minimum-variance return or above the top of a bounded
        frontier (beyond a rounding slack).
        """
        m = self.corner_returns
        target = float(target_return)
        slack = _RETURN_RTOL * max(1.0, float(np.max(np.abs(m))))
        if m.size == 1:
            if abs(target - m[0]) <= slack:
                return np.array(self.corner_weights[0], dtype=np.float64)
            raise ValueError(f"the frontier is the single portfolio with expected return {m[0]:.6g}, "
                             f"not {target:.6g}")
        if target < m[0] - slack:
            raise ValueError(f"target return {target:.6g} is below the minimum-variance return {m[0]:.6g}")
        if target > m[-1] + slack and not self.unbounded_above:
            raise ValueError(f"target return {target:.6g} is above the top of the frontier {m[-1]:.6g}")
        if self.unbounded_above:
            k = min(max(int(np.searchsorted(m, target, side="right")) - 1, 0), m.size - 2)
        else:
            target = min(max(target, float(m[0])), float(m[-1]))
            k = min(int(np.searchsorted(m, target, side="right")) - 1, m.size - 2)
            k = max(k, 0)
        share = (target - m[k]) / (m[k + 1] - m[k])
        out: FloatArray = self.corner_weights[k] + share * (self.corner_weights[k + 1] - self.corner_weights[k])
        return out

    def top_return(self, inputs: MixInputs) -> float:
        """Highest return ``sample`` reaches (see UNBOUNDED_TOP_FACTOR)."""
        m = self.corner_returns
        if not self.unbounded_above:
            return float(m[-1])
        reach = max(float(m[-1]), float(np.max(inputs.expected_returns)))
        return float(m[0]) + UNBOUNDED_TOP_FACTOR * (reach - float(m[0]))

    def sample(self, points: int, inputs: MixInputs, spacing: str = "return") -> list[Portfolio]:
        """``points`` portfolios from minimum variance to the top (for a frontier without a top,
        see UNBOUNDED_TOP_FACTOR), evenly spaced in expected return (``spacing="return"``) or in
        volatility (``spacing="volatility"``)."""
        if points < 1:
            raise ValueError(f"points must be >= 1, got {points}")
        if spacing not in SPACINGS:
            raise ValueError(f"spacing is one of {', '.join(SPACINGS)}, got {spacing!r}")
        low = float(self.corner_returns[0])
        if points == 1:
            targets = np.array([low])
        elif spacing == "return":
            targets = np.linspace(low, self.top_return(inputs), points)
        else:
            targets = self._returns_at_volatilities(points, inputs)
        return [portfolio_from_weights(inputs, self.weights_at(float(m)), "frontier") for m in targets]

    def corners(self, inputs: MixInputs) -> list[Portfolio]:
        """The corner portfolios, minimum variance first. A frontier without a top ends in a ray
        whose far end is not a corner, so it is left out."""
        k = self.corner_returns.size - (1 if self.unbounded_above else 0)
        return [portfolio_from_weights(inputs, self.corner_weights[i].copy(), "corner") for i in range(max(k, 1))]

    def _returns_at_volatilities(self, points: int, inputs: MixInputs) -> FloatArray:
        # Between nodes the weights are affine in the return, so the variance is a quadratic in
        # the share t along the segment, A + 2 B t + C t^2, increasing on the efficient branch:
        # each volatility is reached at the larger root, in closed form.
        top = self.top_return(inputs)
        inner = self.corner_returns[(self.corner_returns > self.corner_returns[0]) & (self.corner_returns < top)]
        nodes = np.concatenate([self.corner_returns[:1], inner, [top]])
        s = inputs.covariance
        weights = np.vstack([self.weights_at(float(m)) for m in nodes])
        variances = np.einsum("ij,jk,ik->i", weights, s, weights)
        vols = np.sqrt(np.maximum(variances, 0.0))
        # Rounding can make the volatility dip by an ulp right after minimum variance.
        vols = np.maximum.accumulate(vols)
        targets = np.linspace(vols[0], vols[-1], points)
        out = np.empty(points)
        for i, sigma in enumerate(targets):
            k = min(max(int(np.searchsorted(vols, sigma, side="left")) - 1, 0), nodes.size - 2)
            a, d = weights[k], weights[k + 1] - weights[k]
            big_a, big_b, big_c = float(a @ s @ a), float(a @ s @ d), float(d @ s @ d)
            gap = sigma * sigma - big_a
            if big_c > 0.0:
                t = (-big_b + math.sqrt(max(big_b * big_b + big_c * gap, 0.0))) / big_c
            else:
                t = gap / (2.0 * big_b) if big_b > 0.0 else 0.0
            t = min(max(t, 0.0), 1.0)
            out[i] = nodes[k] + t * (nodes[k + 1] - nodes[k])
        return out


def _single(w: FloatArray, mu: FloatArray) -> Frontier:
    return Frontier(corner_returns=_frozen(np.array([float(mu @ w)])), corner_weights=_frozen(w[None, :]))


def _frozen(a: FloatArray) -> FloatArray:
    out = np.array(a, dtype=np.float64, copy=True)
    out.setflags(write=False)
    return out


def _two_fund(inputs: MixInputs) -> Frontier:
    form = ClosedForm(inputs)
    mu = inputs.expected_returns
    w_mv = form.min_variance_weights()
    # Frontier direction (sums to zero): S^-1 mu - (1'S^-1 mu / 1'S^-1 1) S^-1 1.
    s_inv_mu = form.s_inv_e + inputs.risk_free_rate * form.s_inv_1
    direction = s_inv_mu - (float(s_inv_mu.sum()) / form.one_s_inv_1) * form.s_inv_1
    slope = float(mu @ direction)
    m_mv = float(mu @ w_mv)
    if not slope > _RETURN_RTOL * max(1.0, float(np.max(np.abs(mu)))) * float(np.abs(direction).sum()):
        return _single(w_mv, mu)
    try:
        second = form.tangency_weights()
    except InputError:
        spread = float(np.max(mu) - np.min(mu))
        second = w_mv + (spread / slope) * direction
    if not float(mu @ second) > m_mv:
        second = w_mv + (max(float(np.max(mu) - np.min(mu)), 1.0) / slope) * direction
    weights = np.vstack([w_mv, second])
    return Frontier(corner_returns=_frozen(weights @ mu), corner_weights=_frozen(weights), unbounded_above=True)


class _PaddedInverse:
    """Inverse of the free block S_FF, embedded in an n x n matrix that is zero outside F.

    Padding keeps every asset at its own row and column, so no step gathers or repacks a
    block: adding or dropping an asset is one rank-one BLAS update in place (bordering
    and the Schur downdate both are), and P x reads only the free entries of x.
    """

    def __init__(self, s: FloatArray, free: npt.NDArray[np.bool_]) -> None:
        self.s = s
        self.free = free.copy()
        self.p: FloatArray = np.zeros((s.shape[0], s.shape[0]), order="F")
        self.updates = 0
        self.refresh()

    def refresh(self) -> None:
        """A fresh inverse from a Cholesky factor of the free block."""
        idx = np.flatnonzero(self.free)
        chol, info = _potrf(self.s[np.ix_(idx, idx)], lower=1, clean=1)
        if info != 0:
            raise RuntimeError(f"critical line met a singular free block (LAPACK info {info})")
        inv, info = _potri(chol, lower=1)
        if info != 0:
            raise RuntimeError(f"critical line could not invert the free block (LAPACK info {info})")
        self.p[:] = 0.0
        self.p[np.ix_(idx, idx)] = np.tril(inv) + np.tril(inv, -1).T
        self.updates = 0

    def add(self, j: int) -> None:
        row = self.s[j]
        z = self.p @ row
        d = float(row[j] - row @ z)
        self.free[j] = True
        self.updates += 1
        if not d > 1e-14 * float(row[j]) or self.updates >= _REFRESH_EVERY:
            self.refresh()
            return
        # Bordering: with z_j = -1 (z_j is 0, j not yet free) the new inverse is P + z z'/d.
        z[j] = -1.0
        # In place for a Fortran-ordered float64 matrix; the assignment keeps it right if not.
        self.p = _ger(1.0 / d, z, z, a=self.p, overwrite_a=1)

    def remove(self, j: int) -> None:
        col = self.p[:, j].copy()
        pivot = float(col[j])
        self.free[j] = False
        self.updates += 1
        if not pivot > 0.0 or self.updates >= _REFRESH_EVERY:
            self.refresh()
            return
        self.p = _ger(-1.0 / pivot, col, col, a=self.p, overwrite_a=1)
        # Row and column j are zero in exact arithmetic; make them so.
        self.p[j, :] = 0.0
        self.p[:, j] = 0.0


def _gradients(ab: FloatArray, s: FloatArray, mu: FloatArray, gamma0: float,
               gamma1: float) -> tuple[FloatArray, float, float]:
    """Reduced gradients (S a - gamma0, S b - mu - gamma1), whose combination g0 + lambda g1
    is the bound multipliers at lambda, and the largest |S a|, |S b| (their scale)."""
    grads: FloatArray = ab @ s
    big0, big1 = np.abs(grads).max(axis=1).tolist()
    grads[0] -= gamma0
    grads[1] -= mu
    grads[1] -= gamma1
    return grads, big0, big1


def _critical_line(inputs: MixInputs, start: BoxSolution | None = None) -> Frontier:
    """``start`` is the minimum-variance solution when the caller already has it."""
    s, mu, lo, hi = inputs.covariance, inputs.expected_returns, inputs.lower, inputs.upper
    n = inputs.n
    if start is None:
        start = solve_box_problem(BoxProblem(s, lo, hi, None), min_variance_start(inputs))
    state = start.state.copy()
    lo0 = np.where(np.isfinite(lo), lo, 0.0)
    hi0 = np.where(np.isfinite(hi), hi, 0.0)
    c = np.where(state == UPPER, hi0, np.where((state == LOWER) | (state == FIXED), lo0, 0.0))
    # Sign that makes a bound multiplier non-negative (+1 at a lower bound, -1 at an upper
    # one, 0 for free and fixed assets: a fixed asset never leaves its bound).
    side = np.where(state == LOWER, 1.0, np.where(state == UPPER, -1.0, 0.0))
    # Rows (1, mu, S c): times P (symmetric) they give (v, u, r) in one product. Vectors
    # are kept as rows of C-ordered arrays: reductions and slices along rows are cheap.
    rhs = np.empty((3, n))
    rhs[0] = 1.0
    rhs[1] = mu
    held = np.flatnonzero(c)
    rhs[2] = c[held] @ s[held] if held.size else 0.0
    s_c = rhs[2]
    inv = _PaddedInverse(s, state == FREE)
    f = int(np.count_nonzero(inv.free))
    mu_scale = float(np.max(np.abs(mu)))
    tiny = float(np.finfo(float).tiny)
    ab = np.empty((2, n))
    a_f, b_f = ab[0], ab[1]
    # (a, b) = coef @ (v, u, r) (+ c for a): a = gamma0 v - r, b = gamma1 v + u.
    coef = np.array([[0.0, 0.0, -1.0], [0.0, 1.0, 0.0]])
    c_sum = float(c.sum())

    lambdas: list[float] = [0.0]
    corners: list[FloatArray] = [start.weights.copy()]
    lam = 0.0
    last_moved = -1
    unbounded = False
    refreshed = True
    # The event search divides by slopes and gradients that may be zero (masked after).
    with np.errstate(divide="ignore", invalid="ignore"):
        for _ in range(12 * n + 100):
            vur = rhs @ inv.p
            one_v, u_sum, r_sum = vur.sum(axis=1).tolist()
            v, u, r = vur
            gamma0 = (1.0 - c_sum + r_sum) / one_v
            gamma1 = -u_sum / one_v
            # a (the weights at lambda = 0 on this face) and b (their slope in lambda): b is
            # zero off F, a holds the bound values there. One free asset cannot move.
            coef[0, 0] = gamma0
            coef[1, 0] = gamma1 if f > 1 else 0.0
            coef[1, 1] = 1.0 if f > 1 else 0.0
            np.dot(coef, vur, out=ab)
            a_f += c
            grads, big0, big1 = _gradients(ab, s, mu, gamma0, gamma1)
            if not refreshed:
                # The free entries of the gradients vanish in exact arithmetic; after rank-one
                # updates they show the drift of the inverse. Small drift is removed by one step
                # of iterative refinement, large drift by refactorising.
                drift0, drift1 = np.abs(grads[:, inv.free]).max(axis=1).tolist()
                drift0 /= max(abs(gamma0), big0, tiny)
                drift1 /= max(mu_scale + abs(gamma1), big1, tiny)
                if drift0 > _REFACTOR_RTOL or drift1 > _REFACTOR_RTOL:
                    inv.refresh()
                    refreshed = True
                    continue
                if drift0 > _REFINE_RTOL or drift1 > _REFINE_RTOL:
                    # P reads the gradients on F only. The correction shift * v - P grads keeps
                    # 1'a = budget and 1'b = 0.
                    corr = grads @ inv.p
                    shift0, shift1 = (corr.sum(axis=1) / one_v).tolist()
                    a_f -= corr[0]
                    a_f += shift0 * v
                    gamma0 += shift0
                    if f > 1:
                        b_f -= corr[1]
                        b_f += shift1 * v
                        gamma1 += shift1
                    grads, big0, big1 = _gradients(ab, s, mu, gamma0, gamma1)
            big_u, big_v = np.abs(vur[:2]).max(axis=1).tolist()
            # Rounding-level slopes are no motion: they must not make bound events.
            b_tol = 1e-12 * max(big_u, big_v * abs(gamma1), tiny)
            g0, g1 = grads
            g_tol = 1e-13 * max(mu_scale + abs(gamma1), big1, tiny)
            lam_tol = 1e-12 * max(1.0, lam)
            # b is exactly zero off the free set, so only free assets get a bound event; an
            # infinite bound gives +inf, never a finite event. Divisions by zero are masked.
            hit = (np.where(b_f > 0.0, hi, lo) - a_f) / b_f
            hit[np.abs(b_f) <= b_tol] = math.inf
            release = side * g1 < -g_tol
            candidates = np.where(release, -g0 / g1, hit)
            if last_moved >= 0 and candidates[last_moved] <= lam + lam_tol:
                candidates[last_moved] = math.inf
            candidates[candidates < lam - lam_tol] = math.inf
            j = int(np.argmin(candidates))
            lam_next = float(candidates[j])
            if not math.isfinite(lam_next):
                if f > 1 and bool((np.abs(b_f) > b_tol).any()):
                    # No bound ever stops the last segment: the frontier has no top.
                    lam_far = lam + max(1.0, lam)
                    lambdas.append(lam_far)
                    corners.append(a_f + lam_far * b_f)
                    unbounded = True
                break
            lam_next = max(lam_next, lam)
            w = a_f + lam_next * b_f
            if inv.free[j]:
                if b_f[j] > 0.0:
                    bound, state[j], side[j] = hi[j], UPPER, -1.0
                else:
                    bound, state[j], side[j] = lo[j], LOWER, 1.0
                w[j] = bound
                c[j] = bound
                c_sum += bound
                if bound != 0.0:
                    s_c += bound * s[j]
                inv.remove(j)
                f -= 1
            else:
                if c[j] != 0.0:
                    s_c -= c[j] * s[j]
                    c_sum -= c[j]
                c[j] = 0.0
                state[j] = FREE
                side[j] = 0.0
                inv.add(j)
                f += 1
            refreshed = inv.updates == 0
            lambdas.append(lam_next)
            corners.append(w)
            lam = lam_next
            last_moved = j
        else:
            raise RuntimeError(f"critical line did not finish in {12 * n + 100} steps")

    weights = np.vstack(corners)
    # Clip rounding spill over a bound; anything larger is a bug, not rounding.
    spill = max(float(np.max(np.where(np.isfinite(lo), lo - weights, 0.0))),
                float(np.max(np.where(np.isfinite(hi), weights - hi, 0.0))))
    if spill > 1e-9:
        raise RuntimeError(f"critical line left the bounds by {spill:.3g}")
    weights = np.clip(weights, lo, hi)
    returns = weights @ mu
    keep = [0]
    for k in range(1, returns.size):
        if returns[k] > returns[keep[-1]] + _RETURN_RTOL * max(1.0, abs(float(returns[k]))):
            keep.append(k)
        elif k == returns.size - 1 and unbounded:
            keep[-1] = k
    weights = weights[keep]
    return Frontier(corner_returns=_frozen(weights @ mu), corner_weights=_frozen(weights),
                    unbounded_above=unbounded and len(keep) > 1)


def efficient_frontier(inputs: MixInputs) -> Frontier:
    """The exact efficient frontier from minimum variance to its top."""
    return frontier_from_min_variance(inputs, None)


def frontier_from_min_variance(inputs: MixInputs, start: BoxSolution | None) -> Frontier:
    """``efficient_frontier``, with the critical line started from ``start`` (the
    active-set minimum-variance solution) when it is given."""
    only = only_feasible_weights(inputs)
    if only is not None:
        return _single(only, inputs.expected_returns)
    if inputs.unconstrained:
        return _two_fund(inputs)
    return _critical_line(inputs, start)


def best_sharpe_on_frontier(frontier: Frontier, inputs: MixInputs) -> FloatArray:
    """Weights of the highest-Sharpe point of the frontier, segment by segment in closed form.

    On a segment w(x) = a + x d, the Sharpe ratio p(x)/sqrt(q(x)) with p affine and q
    quadratic has one interior stationary point, x* = (p0 B - p1 A) / (p1 B - p0 C) with
    q = A + 2 B x + C x^2; the maximum is there or at an end.
    """
    s, mu, rf = inputs.covariance, inputs.expected_returns, inputs.risk_free_rate
    corners = frontier.corner_weights
    best_w = corners[0]
    best = -math.inf

    def sharpe(w: FloatArray) -> float:
        var = float(w @ s @ w)
        return (float(mu @ w) - rf) / math.sqrt(var) if var > 0 else -math.inf

    for w in corners:
        value = sharpe(w)
        if value > best:
            best, best_w = value, w
    for k in range(corners.shape[0] - 1):
        a = corners[k]
        d = corners[k + 1] - a
        last = k == corners.shape[0] - 2
        x_max = math.inf if (last and frontier.unbounded_above) else 1.0
        p0, p1 = float(mu @ a) - rf, float(mu @ d)
        sa, sd = s @ a, s @ d
        big_a, big_b, big_c = float(a @ sa), float(a @ sd), float(d @ sd)
        denom = p1 * big_b - p0 * big_c
        if denom == 0.0:
            continue
        x = (p0 * big_b - p1 * big_a) / denom
        if 0.0 < x < x_max:
            w = a + x * d
            value = sharpe(w)
            if value > best:
                best, best_w = value, w
    out: FloatArray = np.array(best_w, copy=True)
    return out
