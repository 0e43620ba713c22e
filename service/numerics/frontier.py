"""The exact efficient frontier as corner portfolios, and the best Sharpe ratio on it.

Without bounds the frontier is the two-fund line through the minimum-variance and
tangency portfolios (Merton 1972). With bounds it is traced by the critical line
algorithm (Markowitz): minimise w'Sw/2 - lambda mu'w on {1'w = 1, lo <= w <= hi} for
lambda rising from 0 (minimum variance). On a fixed active set the weights are affine in
lambda; a corner is where a free weight reaches a bound or a bounded weight's multiplier
reaches zero. Only the free set F (typically a few dozen assets, even at N = 2,000) is
factorised, in a compact order: for a dense covariance the inverse of S_FF is carried from
corner to corner by bordering (add an asset) and Schur downdates (drop one), O(f^2) each,
with the rows S[F] kept beside it; for a factor model G G' + D the k x k Woodbury
capacitance inverse is carried by Sherman-Morrison updates, O(k^2) each. Each corner then
costs one product with S[:, F] (O(n f) dense, O(n k) factor) and a dozen vector
operations over all assets for the event search; never O(n^2). Rounding drift of the
kept inverse is measured at every corner (the free entries of the reduced gradients must
vanish); one step of iterative refinement removes small drift, a fresh factorisation
large drift. ``corner_kkt_residuals`` checks every corner independently afterwards.

Between consecutive corners the weights are affine in the target return, so
``Frontier.weights_at`` interpolates exactly, and the Sharpe ratio on each segment has a
closed-form maximum (``best_sharpe_on_frontier``), an independent check of the tangency.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy.linalg.lapack import dpotrf as _potrf
from scipy.linalg.lapack import dpotri as _potri

from service.numerics.active_set import BoxProblem, BoxSolution, solve_box_problem
from service.numerics.closed_form import ClosedForm
from service.numerics.errors import InputError
from service.numerics.exact import only_feasible_weights
from service.numerics.inputs import MixInputs
from service.numerics.max_return import FIXED, FREE, LOWER, UPPER
from service.numerics.portfolio import Portfolio, portfolio_from_weights
from service.numerics.risk import FactorRisk, Risk
from service.numerics.warm_start import min_variance_start

__all__ = [
    "SPACINGS",
    "UNBOUNDED_TOP_FACTOR",
    "Frontier",
    "best_sharpe_on_frontier",
    "corner_kkt_residuals",
    "efficient_frontier",
    "frontier_from_min_variance",
]

FloatArray = npt.NDArray[np.float64]
IndexArray = npt.NDArray[np.intp]

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
# Frontier.corner keeps every this many corners in full and replays the changes after them.
_CHECKPOINT_EVERY = 32


@dataclass(frozen=True, eq=False)
class Frontier:
    """The exact efficient frontier. Between consecutive corner portfolios the weights are
    affine in the target expected return, so any point is an exact interpolation - no re-solve.

    Consecutive corners differ only in the assets that were free between them (a dozen of
    thousands, typically), so the corners after the first are held as those changes:
    ``change_counts[k]`` assets change from corner k to k + 1, listed in order in
    ``change_assets`` with their new ``change_weights``. A 2,000-asset frontier of ~4,000
    corners is then ~40,000 numbers instead of 8 million, both in memory and stored; the full
    corner matrix ``corner_weights`` is formed only when asked for.

    ``unbounded_above`` marks a frontier without a top (no bounds): the last two corners
    then span a ray and ``weights_at`` extrapolates along it above the last corner.
    """

    corner_returns: FloatArray      # (k,) increasing expected returns, first = min variance
    first_weights: FloatArray       # (n,) the minimum-variance corner
    change_counts: IndexArray       # (k - 1,)
    change_assets: IndexArray       # (sum of counts,)
    change_weights: FloatArray      # (sum of counts,)
    unbounded_above: bool = False

    def __post_init__(self) -> None:
        k, n = self.corner_returns.shape[0], self.first_weights.shape[0]
        counts, assets = self.change_counts, self.change_assets
        if self.corner_returns.ndim != 1 or self.first_weights.ndim != 1 or counts.shape != (max(k - 1, 0),) \
                or assets.shape != self.change_weights.shape or int(counts.sum()) != assets.shape[0] \
                or (assets.size and not 0 <= int(assets.min()) <= int(assets.max()) < n):
            raise ValueError("frontier changes do not fit the corners and assets they describe")
        for a in (self.corner_returns, self.first_weights, counts, assets, self.change_weights):
            a.setflags(write=False)
        object.__setattr__(self, "_ends", np.cumsum(counts))
        object.__setattr__(self, "_checkpoints", None)
        object.__setattr__(self, "_dense", None)

    @classmethod
    def from_corners(cls, corner_returns: FloatArray, corner_weights: FloatArray,
                     unbounded_above: bool = False) -> Frontier:
        """A frontier from its full (k, n) corner matrix."""
        w = np.asarray(corner_weights, dtype=np.float64)
        rows, assets = np.nonzero(w[1:] != w[:-1])
        counts = np.bincount(rows, minlength=max(w.shape[0] - 1, 0)).astype(np.intp)
        return cls(corner_returns=np.array(corner_returns, dtype=np.float64), first_weights=np.array(w[0]),
                   change_counts=counts, change_assets=assets.astype(np.intp), change_weights=w[1:][rows, assets],
                   unbounded_above=unbounded_above)

    @property
    def n(self) -> int:
        return int(self.first_weights.shape[0])

    @property
    def corner_weights(self) -> FloatArray:
        """The (k, n) matrix of every corner (formed on first use, then kept)."""
        dense: FloatArray | None = self._dense  # type: ignore[attr-defined]
        if dense is None:
            k = self.corner_returns.shape[0]
            dense = np.empty((k, self.n))
            dense[0] = self.first_weights
            for row in range(1, k):
                dense[row] = dense[row - 1]
                part = self._part(row)
                dense[row, self.change_assets[part]] = self.change_weights[part]
            dense.setflags(write=False)
            object.__setattr__(self, "_dense", dense)
        return dense

    def _part(self, row: int) -> slice:
        """Where the changes from corner row - 1 to corner row are listed."""
        end = int(self._ends[row - 1])  # type: ignore[attr-defined]
        return slice(end - int(self.change_counts[row - 1]), end)

    def corner(self, k: int) -> FloatArray:
        """Corner k (a fresh array), from the nearest kept corner at most _CHECKPOINT_EVERY back."""
        dense: FloatArray | None = self._dense  # type: ignore[attr-defined]
        if dense is not None:
            return np.array(dense[k])
        checkpoints: list[FloatArray] | None = self._checkpoints  # type: ignore[attr-defined]
        if checkpoints is None:
            checkpoints = []
            row_w = np.array(self.first_weights)
            for row in range(self.corner_returns.shape[0]):
                if row:
                    part = self._part(row)
                    row_w[self.change_assets[part]] = self.change_weights[part]
                if row % _CHECKPOINT_EVERY == 0:
                    checkpoints.append(row_w.copy())
            object.__setattr__(self, "_checkpoints", checkpoints)
        base = k - k % _CHECKPOINT_EVERY
        out = np.array(checkpoints[base // _CHECKPOINT_EVERY])
        for row in range(base + 1, k + 1):
            part = self._part(row)
            out[self.change_assets[part]] = self.change_weights[part]
        return out

    def to_document(self) -> dict[str, Any]:
        """JSON-able form (floats as Python floats: their text round-trips bit for bit)."""
        return {
            "shape": "unbounded_above" if self.unbounded_above else "bounded",
            "corner_returns": self.corner_returns.tolist(),
            "first_weights": self.first_weights.tolist(),
            "changes": {"counts": self.change_counts.tolist(), "assets": self.change_assets.tolist(),
                        "weights": self.change_weights.tolist()},
        }

    @classmethod
    def from_document(cls, doc: dict[str, Any], n: int) -> Frontier:
        """Rebuild from ``to_document`` for a mix of ``n`` assets, without solving anything
        (documents that list every corner in full, ``corner_weights``, are read too)."""
        returns = np.array(doc["corner_returns"], dtype=np.float64)
        unbounded = doc["shape"] == "unbounded_above"
        k = returns.shape[0]
        if "corner_weights" in doc:
            weights = np.array(doc["corner_weights"], dtype=np.float64)
            if returns.shape != (k,) or weights.shape != (k, n):
                raise ValueError(f"frontier corners have shapes {returns.shape} and {weights.shape}, "
                                 f"expected ({k},) and ({k}, {n})")
            return cls.from_corners(returns, weights, unbounded)
        changes = doc["changes"]
        first = np.array(doc["first_weights"], dtype=np.float64)
        if first.shape != (n,):
            raise ValueError(f"frontier's first corner has shape {first.shape}, expected ({n},)")
        return cls(corner_returns=returns, first_weights=first,
                   change_counts=np.array(changes["counts"], dtype=np.intp).reshape(-1),
                   change_assets=np.array(changes["assets"], dtype=np.intp).reshape(-1),
                   change_weights=np.array(changes["weights"], dtype=np.float64).reshape(-1),
                   unbounded_above=unbounded)

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
                return np.array(self.first_weights)
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
        low, high = self.corner(k), self.corner(k + 1)
        out: FloatArray = low + share * (high - low)
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
    return Frontier.from_corners(np.array([float(mu @ w)]), w[None, :])


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
    return Frontier.from_corners(weights @ mu, weights, unbounded_above=True)


class _FreeSet(ABC):
    """The free assets in a compact order, and solves with their block S_FF.

    Position p of the order holds asset ``order[p]``; dropping an asset moves the last one
    into its place, so every update touches O(f) entries of the compact arrays (never an
    n x n matrix). Subclasses keep what the solves need: the inverse of S_FF (dense) or the
    inverse of the k x k Woodbury capacitance matrix (factor model).
    """

    def __init__(self, risk: Risk, free: npt.NDArray[np.bool_]) -> None:
        n = risk.n
        self.risk = risk
        self.free = free.copy()
        self.order = np.zeros(n, dtype=np.intp)
        self.pos = np.full(n, -1, dtype=np.intp)
        idx = np.flatnonzero(free)
        self.f = int(idx.size)
        self.order[:self.f] = idx
        self.pos[idx] = np.arange(self.f)
        self.updates = 0

    @property
    def idx(self) -> IndexArray:
        return self.order[:self.f]

    def _append(self, j: int) -> None:
        self.free[j] = True
        self.order[self.f] = j
        self.pos[j] = self.f
        self.f += 1
        self.updates += 1

    def _drop(self, j: int) -> int:
        """Move asset j to the last position (returning it) and forget it."""
        p, last = int(self.pos[j]), self.f - 1
        if p != last:
            moved = int(self.order[last])
            self.order[p] = moved
            self.pos[moved] = p
            self._swap(p, last)
        self.order[last] = 0
        self.pos[j] = -1
        self.free[j] = False
        self.f -= 1
        self.updates += 1
        return last

    @abstractmethod
    def _swap(self, p: int, q: int) -> None:
        raise NotImplementedError

    @abstractmethod
    def refresh(self) -> None:
        raise NotImplementedError

    @abstractmethod
    def add(self, j: int) -> None:
        raise NotImplementedError

    @abstractmethod
    def remove(self, j: int) -> None:
        raise NotImplementedError

    @abstractmethod
    def solve(self, rhs: FloatArray) -> FloatArray:
        """S_FF^-1 applied to the rows of rhs (m, f), in the compact order."""
        raise NotImplementedError

    @abstractmethod
    def spread(self, x: FloatArray, out: FloatArray) -> None:
        """out = S[:, F] x' for the rows of x (2, f): out is (2, n)."""
        raise NotImplementedError


class _DenseFreeSet(_FreeSet):
    """Inverse of S_FF (top-left f x f of ``p``) and the rows S[F] (top f rows of ``rows``),
    carried by bordering (add) and Schur downdates (drop): O(f^2) per change; a product
    with S[:, F] is O(n f)."""

    def __init__(self, risk: Risk, matrix: FloatArray, free: npt.NDArray[np.bool_]) -> None:
        super().__init__(risk, free)
        n = risk.n
        self.s = matrix
        self.p: FloatArray = np.empty((n, n))
        self.rows: FloatArray = np.empty((n, n))
        self.rows[:self.f] = matrix.take(self.idx, axis=0)
        self.refresh()

    def _swap(self, p: int, q: int) -> None:
        self.rows[[p, q]] = self.rows[[q, p]]
        self.p[[p, q], :self.f] = self.p[[q, p], :self.f]
        self.p[:self.f, [p, q]] = self.p[:self.f, [q, p]]

    def refresh(self) -> None:
        """A fresh inverse from a Cholesky factorisation of the free block."""
        f, idx = self.f, self.idx
        chol, info = _potrf(self.rows[:f].take(idx, axis=1), lower=1, clean=1)
        if info != 0:
            raise RuntimeError(f"critical line met a singular free block (LAPACK info {info})")
        inv, info = _potri(chol, lower=1)
        if info != 0:
            raise RuntimeError(f"critical line could not invert the free block (LAPACK info {info})")
        self.p[:f, :f] = np.tril(inv) + np.tril(inv, -1).T
        self.updates = 0

    def add(self, j: int) -> None:
        f = self.f
        s_fj = self.s[j].take(self.idx)
        block = self.p[:f, :f]
        z = block @ s_fj
        d = float(self.s[j, j] - s_fj @ z)
        self._append(j)
        self.rows[f] = self.s[j]
        if not d > 1e-14 * float(self.s[j, j]) or self.updates >= _REFRESH_EVERY:
            self.refresh()
            return
        # Bordering: [[P + z z'/d, -z/d], [-z'/d, 1/d]].
        block += z[:, None] * (z / d)
        self.p[f, :f] = self.p[:f, f] = -z / d
        self.p[f, f] = 1.0 / d

    def remove(self, j: int) -> None:
        last = self._drop(j)
        pivot = float(self.p[last, last])
        if not pivot > 0.0 or self.updates >= _REFRESH_EVERY:
            self.refresh()
            return
        col = self.p[:last, last]
        self.p[:last, :last] -= col[:, None] * (col / pivot)

    def solve(self, rhs: FloatArray) -> FloatArray:
        out: FloatArray = rhs @ self.p[:self.f, :self.f]
        return out

    def spread(self, x: FloatArray, out: FloatArray) -> None:
        np.dot(x, self.rows[:self.f], out=out)


class _FactorFreeSet(_FreeSet):
    """S_FF = D_F + G_F G_F' solved by the Woodbury identity with the inverse of the k x k
    capacitance matrix C = I + G_F' D_F^-1 G_F, kept by Sherman-Morrison updates (O(k^2)
    per change); a product with S[:, F] is O(n k)."""

    def __init__(self, risk: FactorRisk, free: npt.NDArray[np.bool_]) -> None:
        super().__init__(risk, free)
        n = risk.n
        self.factor = risk
        self.g_t: FloatArray = np.ascontiguousarray(risk.g.T)
        self.g_f: FloatArray = np.empty((n, risk.rank))
        self.d2_f: FloatArray = np.empty(n)
        self.g_f[:self.f] = risk.g.take(self.idx, axis=0)
        self.d2_f[:self.f] = risk.d2.take(self.idx)
        self.c_inv: FloatArray = np.eye(risk.rank)
        self.refresh()

    def _swap(self, p: int, q: int) -> None:
        self.g_f[[p, q]] = self.g_f[[q, p]]
        self.d2_f[[p, q]] = self.d2_f[[q, p]]

    def refresh(self) -> None:
        f = self.f
        g_f, d2_f = self.g_f[:f], self.d2_f[:f]
        capacitance = g_f.T @ (g_f / d2_f[:, None])
        capacitance[np.diag_indices(self.factor.rank)] += 1.0
        self.c_inv = np.asarray(np.linalg.inv(capacitance), dtype=np.float64)
        self.updates = 0

    def _rank_one(self, g: FloatArray, d2: float, sign: float) -> bool:
        cg = self.c_inv @ g
        denom = d2 + sign * float(g @ cg)
        if not denom > 1e-12 * d2:
            return False
        self.c_inv -= cg[:, None] * (cg * (sign / denom))
        return True

    def add(self, j: int) -> None:
        f = self.f
        g, d2 = self.factor.g[j], float(self.factor.d2[j])
        self._append(j)
        self.g_f[f] = g
        self.d2_f[f] = d2
        if self.updates >= _REFRESH_EVERY or not self._rank_one(g, d2, 1.0):
            self.refresh()

    def remove(self, j: int) -> None:
        g, d2 = self.factor.g[j], float(self.factor.d2[j])
        self._drop(j)
        if self.updates >= _REFRESH_EVERY or not self._rank_one(g, d2, -1.0):
            self.refresh()

    def solve(self, rhs: FloatArray) -> FloatArray:
        f = self.f
        g_f, d2_f = self.g_f[:f], self.d2_f[:f]
        scaled = rhs / d2_f
        back = ((scaled @ g_f) @ self.c_inv) @ g_f.T
        out: FloatArray = scaled - back / d2_f
        return out

    def spread(self, x: FloatArray, out: FloatArray) -> None:
        f = self.f
        np.dot(x @ self.g_f[:f], self.g_t, out=out)
        out[:, self.idx] += x * self.d2_f[:f]


def _free_set(risk: Risk, free: npt.NDArray[np.bool_]) -> _FreeSet:
    if isinstance(risk, FactorRisk):
        return _FactorFreeSet(risk, free)
    return _DenseFreeSet(risk, risk.dense(), free)


class _Corners:
    """Corner portfolios as they are found, recorded as changes (see Frontier).

    A corner changes only the weights that were free before it: those are recorded (never an
    n-vector per corner: writing thousands of fresh rows costs more in page faults than the
    whole search). Only the free weights can spill over a bound by rounding; they are clipped
    here, and a spill beyond rounding is a bug.
    """

    def __init__(self, first: FloatArray, mu: FloatArray) -> None:
        self.first = np.array(first)
        self.current = np.array(first)
        self.mu = mu
        self.returns: list[float] = [float(mu @ first)]
        self.assets: list[IndexArray] = []
        self.values: list[FloatArray] = []

    def append(self, idx: IndexArray, free_weights: FloatArray, lo_f: FloatArray, hi_f: FloatArray,
               at: int = -1, bound: float = 0.0) -> None:
        """A corner with the free weights (bounds ``lo_f``, ``hi_f``) at ``idx``; position ``at``
        of them (the asset that reached a bound) is set exactly to ``bound``."""
        clipped = np.minimum(np.maximum(free_weights, lo_f), hi_f)
        spill = float(np.abs(clipped - free_weights).max())
        if spill > 1e-9:
            raise RuntimeError(f"critical line left the bounds by {spill:.3g}")
        if at >= 0:
            clipped[at] = bound
        assets = idx.copy()
        self.current[assets] = clipped
        self.assets.append(assets)
        self.values.append(clipped)
        self.returns.append(float(self.mu @ self.current))

    def frontier(self, unbounded: bool) -> Frontier:
        """The corners with strictly increasing returns (a corner that does not raise the
        return is the previous one up to rounding: its changes are carried into the next)."""
        returns = self.returns
        keep = [0]
        counts: list[int] = []
        assets: list[IndexArray] = []
        values: list[FloatArray] = []
        pending_a: list[IndexArray] = []
        pending_v: list[FloatArray] = []
        last = len(returns) - 1
        for k in range(1, len(returns)):
            pending_a.append(self.assets[k - 1])
            pending_v.append(self.values[k - 1])
            rises = returns[k] > returns[keep[-1]] + _RETURN_RTOL * max(1.0, abs(returns[k]))
            if not rises and not (k == last and unbounded and len(keep) > 1):
                continue
            if not rises:
                # The ray's far corner replaces the last kept one: merge their changes.
                keep.pop()
                if counts:
                    counts.pop()
                    pending_a.insert(0, assets.pop())
                    pending_v.insert(0, values.pop())
            a, v = _merged(pending_a, pending_v)
            keep.append(k)
            counts.append(a.shape[0])
            assets.append(a)
            values.append(v)
            pending_a, pending_v = [], []
        empty_a, empty_v = np.zeros(0, dtype=np.intp), np.zeros(0)
        return Frontier(corner_returns=np.array([returns[k] for k in keep]), first_weights=self.first,
                        change_counts=np.array(counts, dtype=np.intp),
                        change_assets=np.concatenate(assets) if assets else empty_a,
                        change_weights=np.concatenate(values) if values else empty_v,
                        unbounded_above=unbounded and len(keep) > 1)


def _merged(assets: list[IndexArray], values: list[FloatArray]) -> tuple[IndexArray, FloatArray]:
    """Changes applied one list after another, as one list (the last value of an asset wins)."""
    if len(assets) == 1:
        return assets[0], values[0]
    a, v = np.concatenate(assets)[::-1], np.concatenate(values)[::-1]
    _, first = np.unique(a, return_index=True)
    return a[first], v[first]


def _critical_line(inputs: MixInputs, start: BoxSolution | None = None) -> Frontier:
    """``start`` is the minimum-variance solution when the caller already has it."""
    risk, mu, lo, hi = inputs.risk, inputs.expected_returns, inputs.lower, inputs.upper
    n = inputs.n
    if start is None:
        start = solve_box_problem(BoxProblem(risk, lo, hi, None), min_variance_start(inputs))
    state = start.state.copy()
    lo0 = np.where(np.isfinite(lo), lo, 0.0)
    hi0 = np.where(np.isfinite(hi), hi, 0.0)
    c = np.where(state == UPPER, hi0, np.where((state == LOWER) | (state == FIXED), lo0, 0.0))
    # Sign that makes a bound multiplier non-negative (+1 at a lower bound, -1 at an upper
    # one, 0 for free and fixed assets: a fixed asset never leaves its bound).
    side = np.where(state == LOWER, 1.0, np.where(state == UPPER, -1.0, 0.0))
    free_set = _free_set(risk, state == FREE)
    # Rows (1, mu, S c) over every asset; their free entries are the right-hand sides.
    # s_c is a view of the last row and is only ever updated in place.
    rhs_all = np.empty((3, n))
    rhs_all[0] = 1.0
    rhs_all[1] = mu
    held = np.flatnonzero(c)
    rhs_all[2] = risk.columns_times(held, c[held])
    s_c = rhs_all[2]
    mu_scale = float(np.max(np.abs(mu)))
    tiny = float(np.finfo(float).tiny)
    # (a, b) = coef @ (v, u, r): a = gamma0 v - r, b = gamma1 v + u (free entries only).
    coef = np.array([[0.0, 0.0, -1.0], [0.0, 1.0, 0.0]])
    c_sum = float(c.sum())
    # Work arrays over every asset, reused at each corner (the loop runs ~2n times).
    grads = np.empty((2, n))
    scratch = np.empty((2, n))
    slope = np.empty(n)
    release = np.empty(n, dtype=bool)
    candidates = np.empty(n)

    corners = _Corners(start.weights, mu)
    lam = 0.0
    last_moved = -1
    unbounded = False
    refreshed = True

    def gradients(ab: FloatArray, gamma0: float, gamma1: float) -> tuple[float, float]:
        """Fill grads with (g0, -g1): S w - lambda mu - gamma 1 = g0 + lambda g1 is the bound
        multipliers on bounded assets and vanishes on free ones. Returns max |S a|, |S b|."""
        free_set.spread(ab, grads)
        grads[0] += s_c
        np.abs(grads, out=scratch)
        big0, big1 = scratch.max(axis=1).tolist()
        grads[0] -= gamma0
        # The slope row is kept negated, mu + gamma1 - S b, so that the release test and
        # the release point -g0 / g1 each take one operation.
        np.subtract(mu, grads[1], out=grads[1])
        grads[1] += gamma1
        return big0, big1

    # The event search divides by slopes and gradients that may be zero (masked after).
    with np.errstate(divide="ignore", invalid="ignore"):
        for _ in range(12 * n + 100):
            f = free_set.f
            idx = free_set.idx
            vur = free_set.solve(rhs_all.take(idx, axis=1))
            one_v, u_sum, r_sum = vur.sum(axis=1).tolist()
            v = vur[0]
            gamma0 = (1.0 - c_sum + r_sum) / one_v
            gamma1 = -u_sum / one_v
            # a (the free weights at lambda = 0 on this face) and b (their slope in lambda).
            # One free asset cannot move.
            coef[0, 0] = gamma0
            coef[1, 0] = gamma1 if f > 1 else 0.0
            coef[1, 1] = 1.0 if f > 1 else 0.0
            ab = coef @ vur
            big0, big1 = gradients(ab, gamma0, gamma1)
            if not refreshed:
                # The free entries of the gradients vanish in exact arithmetic; after rank-one
                # updates they show the drift of the kept inverse. Small drift is removed by
                # one step of iterative refinement, large drift by refactorising.
                free_grads = grads.take(idx, axis=1)
                drift0, drift1 = np.abs(free_grads).max(axis=1).tolist()
                drift0 /= max(abs(gamma0), big0, tiny)
                drift1 /= max(mu_scale + abs(gamma1), big1, tiny)
                if drift0 > _REFACTOR_RTOL or drift1 > _REFACTOR_RTOL:
                    free_set.refresh()
                    refreshed = True
                    continue
                if drift0 > _REFINE_RTOL or drift1 > _REFINE_RTOL:
                    # The correction shift * v - S_FF^-1 g keeps 1'a = budget and 1'b = 0
                    # (the second gradient row is stored negated).
                    free_grads[1] *= -1.0
                    corr = free_set.solve(free_grads)
                    shift0, shift1 = (corr.sum(axis=1) / one_v).tolist()
                    ab[0] -= corr[0]
                    ab[0] += shift0 * v
                    gamma0 += shift0
                    if f > 1:
                        ab[1] -= corr[1]
                        ab[1] += shift1 * v
                        gamma1 += shift1
                    gradients(ab, gamma0, gamma1)
            a_f, b_f = ab
            big_u, big_v = np.abs(vur[1::-1]).max(axis=1).tolist()
            # Rounding-level slopes are no motion: they must not make bound events.
            b_tol = 1e-12 * max(big_u, big_v * abs(gamma1), tiny)
            g0, minus_g1 = grads
            g_tol = 1e-13 * max(mu_scale + abs(gamma1), big1, tiny)
            lam_tol = 1e-12 * max(1.0, lam)
            # Bounded assets are released where the multiplier falls (side * g1 < 0), at
            # lambda = -g0 / g1; free and fixed assets have side 0.
            np.multiply(side, minus_g1, out=slope)
            np.greater(slope, g_tol, out=release)
            candidates.fill(math.inf)
            np.divide(g0, minus_g1, out=candidates, where=release)
            # Free assets: where their weight reaches a bound (an infinite bound never does).
            lo_f, hi_f = lo.take(idx), hi.take(idx)
            hit = (np.where(b_f > 0.0, hi_f, lo_f) - a_f) / b_f
            hit[np.abs(b_f) <= b_tol] = math.inf
            # A free asset whose hit lies behind lam sits on its bound already and moves out
            # (a tie of two events, split by rounding): it is bound now, not skipped.
            candidates[idx] = np.maximum(hit, lam)
            if last_moved >= 0 and candidates[last_moved] <= lam + lam_tol:
                candidates[last_moved] = math.inf
            j = int(candidates.argmin())
            if candidates[j] < lam - lam_tol:
                # A release point behind lam is rounding, not an event (rare: filter, search again).
                candidates[candidates < lam - lam_tol] = math.inf
                j = int(candidates.argmin())
            lam_next = float(candidates[j])
            if not math.isfinite(lam_next):
                if f > 1 and bool((np.abs(b_f) > b_tol).any()):
                    # No bound ever stops the last segment: the frontier has no top.
                    lam_far = lam + max(1.0, lam)
                    corners.append(idx, a_f + lam_far * b_f, lo_f, hi_f)
                    unbounded = True
                break
            lam_next = max(lam_next, lam)
            if free_set.free[j]:
                at = int(free_set.pos[j])
                if b_f[at] > 0.0:
                    bound, state[j], side[j] = hi[j], UPPER, -1.0
                else:
                    bound, state[j], side[j] = lo[j], LOWER, 1.0
                corners.append(idx, a_f + lam_next * b_f, lo_f, hi_f, at, bound)
                c[j] = bound
                c_sum += bound
                if bound != 0.0:
                    s_c += bound * risk.row(j)
                free_set.remove(j)
            else:
                corners.append(idx, a_f + lam_next * b_f, lo_f, hi_f)
                if c[j] != 0.0:
                    s_c -= c[j] * risk.row(j)
                    c_sum -= c[j]
                c[j] = 0.0
                state[j] = FREE
                side[j] = 0.0
                free_set.add(j)
            refreshed = free_set.updates == 0
            lam = lam_next
            last_moved = j
        else:
            raise RuntimeError(f"critical line did not finish in {12 * n + 100} steps")

    return corners.frontier(unbounded)


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
    risk, mu, rf = inputs.risk, inputs.expected_returns, inputs.risk_free_rate
    corners = frontier.corner_weights
    best_w = corners[0]
    best = -math.inf

    def sharpe(w: FloatArray) -> float:
        var = risk.variance(w)
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
        sa, sd = risk.times(a), risk.times(d)
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


def corner_kkt_residuals(frontier: Frontier, inputs: MixInputs) -> FloatArray:
    """Scale-free KKT residual of every corner as a minimum-variance portfolio for its return.

    Corner k minimises w'Sw/2 - lambda mu'w on {1'w = 1, lo <= w <= hi} for some lambda >= 0:
    S w - lambda mu - gamma 1 vanishes on the assets free on the segment from corner k (the
    one before it, for the last corner), and is a multiplier of the right sign on assets at
    a bound. (lambda, gamma) are fitted by least squares on those free assets; the residual
    is the worst violation measured against the size of the terms in S w, with the bounds,
    the budget and lambda >= 0 (weights within 1e-12 of a bound count as at it). An independent check of the critical line (products with S
    only, O(corners n k) for a factor model): nothing of the solver's state is used.
    """
    w_all = frontier.corner_weights
    count = w_all.shape[0]
    mu, lo, hi = inputs.expected_returns, inputs.lower, inputs.upper
    sw_all = inputs.risk.times(w_all)
    diag_max = float(np.max(inputs.risk.diagonal))
    mu_scale = float(np.max(np.abs(mu)))
    out = np.empty(count)
    for k in range(count):
        w, sw = w_all[k], sw_all[k]
        if count == 1:
            mid = w
        else:
            other = w_all[k + 1] if k + 1 < count else w_all[k - 1]
            mid = 0.5 * (w + other)
        # Weights within rounding of a bound count as at the bound (a tie of two events
        # can leave 1e-16 on an asset that the next face holds at its bound).
        tol = 1e-12 * max(1.0, float(np.max(np.abs(w))))
        free = (mid > lo + tol) & (mid < hi - tol)
        # A fixed weight (lo == hi) has a multiplier of either sign.
        side = np.where(free | (lo == hi), 0.0, np.where(w <= lo + tol, 1.0, -1.0))
        if np.count_nonzero(free) >= 2:
            design = np.column_stack([mu[free], np.ones(int(np.count_nonzero(free)))])
            (lam, gamma), *_ = np.linalg.lstsq(design, sw[free], rcond=None)
        else:
            lam, gamma = 0.0, float(sw[free].sum()) if free.any() else 0.0
        g = sw - lam * mu - gamma
        if count == 1 and not free.any():
            # The only feasible portfolio: gamma is not pinned by any free asset and can always
            # be chosen to give every bounded multiplier its sign.
            g = np.zeros_like(g)
        worst = max(float(np.max(np.where(free, np.abs(g), -side * g))), 0.0, -float(lam))
        scale = max(float(np.max(np.abs(sw))), diag_max * float(np.abs(w).sum()), abs(float(gamma)),
                    abs(float(lam)) * mu_scale, np.finfo(float).tiny)
        primal = max(float(np.max(lo - w)), float(np.max(w - hi)), abs(float(w.sum()) - 1.0), 0.0)
        out[k] = max(worst / scale, primal / max(1.0, float(np.max(np.abs(w)))))
    return out
