"""Three numerical routes to the tangency, run as independent cross-checks of the exact answer.

They use only scipy.optimize (SLSQP, and HiGHS for the top of the return range), never the
exact code of this package:

1. ``direct_search``: maximise the Sharpe ratio over the weights directly;
2. ``risk_grid``: for a grid of target volatilities, maximise the expected return;
3. ``return_grid``: for a grid of target returns, minimise the variance.

A grid route reports its best-Sharpe grid point. Grids have ``grid_points(n)`` points
(GRID_POINTS, halved above LARGE_MIX assets: each SLSQP step costs O(n^2 m) with m ~ 2n
bound rows, and the halved grid keeps N = 200 at a few seconds) and each point starts
from the previous one's answer.
"""

from __future__ import annotations

import math
import time
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
import scipy.optimize

from service.numerics.inputs import MixInputs
from service.numerics.portfolio import Portfolio

__all__ = ["CrossCheck", "cross_checks", "GRID_POINTS", "LARGE_MIX", "grid_points"]

FloatArray = npt.NDArray[np.float64]

GRID_POINTS = 40
LARGE_MIX = 100


def grid_points(n: int) -> int:
    """Points per grid for a mix of n assets."""
    return GRID_POINTS if n <= LARGE_MIX else GRID_POINTS // 2

_SLSQP_OPTIONS: dict[str, Any] = {"ftol": 1e-12, "maxiter": 300}


@dataclass(frozen=True)
class CrossCheck:
    """How far one numerical route lands from the exact tangency."""

    method: str              # "direct_search", "risk_grid", "return_grid"
    sharpe_ratio: float
    max_weight_gap: float    # max |w_route - w_exact|
    sharpe_gap: float        # exact sharpe - route sharpe (>= ~0 when exact is right)
    seconds: float


class _Routes:
    """The routes work in whitened coordinates z = L'w (S = LL'), where the variance is
    z'z: SLSQP's quasi-Newton model starts from the identity, which is then the exact
    Hessian of the variance, so each solve takes a handful of iterations instead of ~n."""

    def __init__(self, inputs: MixInputs) -> None:
        self.s = inputs.covariance
        self.mu = inputs.expected_returns
        self.rf = inputs.risk_free_rate
        self.lo = inputs.lower
        self.hi = inputs.upper
        n = self.n = inputs.n
        chol = np.linalg.cholesky(self.s)
        self.chol = chol
        self.to_w = scipy.linalg.solve_triangular(chol, np.eye(n), lower=True, check_finite=False).T
        self.mu_z = self.mu @ self.to_w
        self.e_z = (self.mu - self.rf) @ self.to_w
        ones_z = self.to_w.sum(axis=0)
        self.budget: dict[str, Any] = {"type": "eq", "fun": lambda z: float(ones_z @ z) - 1.0,
                                       "jac": lambda z: ones_z}
        lo_keep, hi_keep = np.isfinite(self.lo), np.isfinite(self.hi)
        # A bound that full investment can never reach adds work, not information.
        if lo_keep.all():
            hi_keep &= self.hi < 1.0 - (float(self.lo.sum()) - self.lo)
        if hi_keep.all() and np.isfinite(self.hi).all():
            lo_keep &= self.lo > 1.0 - (float(self.hi.sum()) - self.hi)
        rows = np.vstack([self.to_w[lo_keep], -self.to_w[hi_keep]])
        rhs = np.concatenate([self.lo[lo_keep], -self.hi[hi_keep]])
        self.box: list[dict[str, Any]] = []
        if rows.shape[0]:
            self.box = [{"type": "ineq", "fun": lambda z: rows @ z - rhs, "jac": lambda z: rows}]

    def sharpe(self, w: FloatArray) -> float:
        var = float(w @ self.s @ w)
        return (float(self.mu @ w) - self.rf) / math.sqrt(var) if var > 0.0 else -math.inf

    def feasible_start(self) -> FloatArray:
        """Equal weights shifted and clipped into the bounds (bisection on the shift)."""
        base = np.full(self.n, 1.0 / self.n)
        low, high = -1.0, 1.0
        while float(np.clip(base + low, self.lo, self.hi).sum()) > 1.0:
            low *= 2.0
        while float(np.clip(base + high, self.lo, self.hi).sum()) < 1.0:
            high *= 2.0
        for _ in range(200):
            mid = 0.5 * (low + high)
            if float(np.clip(base + mid, self.lo, self.hi).sum()) < 1.0:
                low = mid
            else:
                high = mid
        out: FloatArray = np.clip(base + 0.5 * (low + high), self.lo, self.hi)
        return out

    def minimize(self, fun: Any, w0: FloatArray, extra: list[dict[str, Any]]) -> FloatArray:
        z0 = self.chol.T @ w0
        with warnings.catch_warnings():
            # SLSQP may report a clipped or unproductive step; the route still reports where it got.
            warnings.simplefilter("ignore", RuntimeWarning)
            res = scipy.optimize.minimize(fun, z0, jac=True, method="SLSQP",
                                          constraints=[self.budget, *self.box, *extra], options=_SLSQP_OPTIONS)
        w: FloatArray = self.to_w @ np.asarray(res.x, dtype=np.float64)
        return w

    def direct_search(self) -> FloatArray:
        e_z = self.e_z
        w0 = self.feasible_start()
        z0 = self.chol.T @ w0
        # Scale so the Hessian of the objective is near the identity SLSQP starts from.
        kappa = float(z0 @ z0) / max(abs(float(e_z @ z0)) / math.sqrt(float(z0 @ z0)), 1e-12)

        def neg_sharpe(z: FloatArray) -> tuple[float, FloatArray]:
            vol = math.sqrt(max(float(z @ z), 1e-300))
            gain = float(e_z @ z)
            return -kappa * gain / vol, -kappa * (e_z / vol - gain * z / vol ** 3)

        return self.minimize(neg_sharpe, w0, [])

    def min_variance(self) -> FloatArray:
        return self.minimize(_squared_norm, self.feasible_start(), [])

    def top_return(self, fallback: FloatArray) -> FloatArray:
        """Highest-return feasible portfolio (HiGHS); for an unbounded set, ``fallback``."""
        bounds = [(None if math.isinf(a) else float(a), None if math.isinf(b) else float(b))
                  for a, b in zip(self.lo, self.hi, strict=True)]
        res = scipy.optimize.linprog(-self.mu, A_eq=np.ones((1, self.n)), b_eq=[1.0], bounds=bounds,
                                     method="highs")
        if res.status == 0:
            out: FloatArray = np.asarray(res.x, dtype=np.float64)
            return out
        return fallback

    def grid_best(self, points: list[FloatArray]) -> FloatArray:
        values = [self.sharpe(w) for w in points]
        return points[int(np.argmax(values))]

    def return_grid(self, low_w: FloatArray, high_w: FloatArray) -> FloatArray:
        mu_z = self.mu_z
        # Interior points only: at either end the feasible set shrinks to a single portfolio.
        targets = np.linspace(float(self.mu @ low_w), float(self.mu @ high_w), grid_points(self.n) + 2)[1:-1]
        w = low_w
        found: list[FloatArray] = []
        for m in targets:
            target = {"type": "eq", "fun": lambda z, m=m: float(mu_z @ z) - m, "jac": lambda z: mu_z}
            w = self.minimize(_squared_norm, w, [target])
            found.append(w)
        return self.grid_best(found)

    def risk_grid(self, low_w: FloatArray, high_w: FloatArray) -> FloatArray:
        mu_z, s, mu = self.mu_z, self.s, self.mu
        lowest = math.sqrt(float(low_w @ s @ low_w))
        highest = math.sqrt(float(high_w @ s @ high_w))
        # Geometric spacing: the Sharpe ratio peaks near the low-risk end of the frontier.
        vols = np.geomspace(lowest, highest, grid_points(self.n) + 2)[1:-1]
        w = low_w
        prev_vol, prev_ret = lowest, float(mu @ low_w)
        slope = float(np.linalg.norm(mu_z))
        found: list[FloatArray] = []
        for vol in vols:
            # With the objective scaled by vol / (frontier slope), the Lagrangian Hessian
            # (multiplier x identity) is near the identity SLSQP starts from.
            kappa = float(vol) / max(slope, 1e-300)
            cap = {"type": "ineq", "fun": lambda z, v=vol: v * v - float(z @ z), "jac": lambda z: -2.0 * z}
            w = self.minimize(lambda z, k=kappa: (-k * float(mu_z @ z), -k * mu_z), w, [cap])
            found.append(w)
            got_vol, got_ret = math.sqrt(float(w @ s @ w)), float(mu @ w)
            if got_vol > prev_vol and got_ret > prev_ret:
                slope = (got_ret - prev_ret) / (got_vol - prev_vol)
            prev_vol, prev_ret = got_vol, got_ret
        return self.grid_best(found)


def _squared_norm(z: FloatArray) -> tuple[float, FloatArray]:
    return float(z @ z), 2.0 * z


def cross_checks(inputs: MixInputs, exact: Portfolio) -> tuple[CrossCheck, ...]:
    """Run the three numerical routes and report each one's distance from ``exact``.

    A grid route's ``seconds`` includes the two solves that fix its range (minimum
    variance and maximum return), shared by both grids.
    """
    started = time.perf_counter()
    routes = _Routes(inputs)
    setup = time.perf_counter() - started

    def report(method: str, seconds: float, w: FloatArray) -> CrossCheck:
        sharpe = routes.sharpe(w)
        return CrossCheck(method=method, sharpe_ratio=sharpe,
                          max_weight_gap=float(np.max(np.abs(w - exact.weights))),
                          sharpe_gap=exact.sharpe_ratio - sharpe, seconds=seconds)

    started = time.perf_counter()
    direct = routes.direct_search()
    out = [report("direct_search", setup + time.perf_counter() - started, direct)]

    started = time.perf_counter()
    low_w = routes.min_variance()
    high_w = routes.top_return(low_w + 2.0 * (direct - low_w))
    ends = setup + time.perf_counter() - started
    started = time.perf_counter()
    risk = routes.risk_grid(low_w, high_w)
    out.append(report("risk_grid", ends + time.perf_counter() - started, risk))
    started = time.perf_counter()
    ret = routes.return_grid(low_w, high_w)
    out.append(report("return_grid", ends + time.perf_counter() - started, ret))
    return tuple(out)
