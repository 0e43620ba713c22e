"""Three numerical routes to the tangency, run as independent cross-checks of the exact answer.

They use only scipy.optimize (SLSQP, and HiGHS for the top of the return range), never the
exact code of this package:

1. ``direct_search``: maximise the Sharpe ratio over the weights directly;
2. ``risk_grid``: for a grid of target volatilities, maximise the expected return;
3. ``return_grid``: for a grid of target returns, minimise the variance.

A grid route reports its best-Sharpe grid point. Grids have ``GRID_POINTS`` points and
each point starts from the previous one's answer.
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

__all__ = ["CrossCheck", "cross_checks", "GRID_POINTS"]

FloatArray = npt.NDArray[np.float64]

GRID_POINTS = 40
_SLSQP_OPTIONS: dict[str, Any] = {"ftol": 1e-12, "maxiter": 500}


@dataclass(frozen=True)
class CrossCheck:
    """How far one numerical route lands from the exact tangency."""

    method: str              # "direct_search", "risk_grid", "return_grid"
    sharpe_ratio: float
    max_weight_gap: float    # max |w_route - w_exact|
    sharpe_gap: float        # exact sharpe - route sharpe (>= ~0 when exact is right)
    seconds: float


class _Routes:
    def __init__(self, inputs: MixInputs) -> None:
        self.s = inputs.covariance
        self.mu = inputs.expected_returns
        self.rf = inputs.risk_free_rate
        self.lo = inputs.lower
        self.hi = inputs.upper
        self.n = inputs.n
        self.bounds = scipy.optimize.Bounds(self.lo, self.hi) if not inputs.unconstrained else None
        ones = np.ones(self.n)
        self.budget = {"type": "eq", "fun": lambda w: float(w.sum()) - 1.0, "jac": lambda w: ones}

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

    def minimize(self, fun: Any, jac: Any, x0: FloatArray, extra: list[dict[str, Any]]) -> FloatArray:
        with warnings.catch_warnings():
            # SLSQP may clip a trial step to the bounds and say so; the result is still usable.
            warnings.simplefilter("ignore", RuntimeWarning)
            res = scipy.optimize.minimize(fun, x0, jac=jac, method="SLSQP", bounds=self.bounds,
                                          constraints=[self.budget, *extra], options=_SLSQP_OPTIONS)
        x: FloatArray = np.asarray(res.x, dtype=np.float64)
        return x

    def direct_search(self) -> FloatArray:
        s, e = self.s, self.mu - self.rf

        def neg_sharpe(w: FloatArray) -> tuple[float, FloatArray]:
            sw = s @ w
            var = float(w @ sw)
            vol = math.sqrt(max(var, 1e-300))
            gain = float(e @ w)
            return -gain / vol, -(e / vol - gain * sw / (vol ** 3))

        return self.minimize(neg_sharpe, True, self.feasible_start(), [])

    def min_variance(self) -> FloatArray:
        s = self.s

        def var(w: FloatArray) -> tuple[float, FloatArray]:
            sw = s @ w
            return float(w @ sw), 2.0 * sw

        return self.minimize(var, True, self.feasible_start(), [])

    def top_return(self, fallback: FloatArray) -> FloatArray:
        """Highest-return feasible portfolio (HiGHS); for an unbounded set, a far point
        along the direct-search answer's direction."""
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
        s, mu = self.s, self.mu
        targets = np.linspace(float(mu @ low_w), float(mu @ high_w), GRID_POINTS)

        def var(w: FloatArray) -> tuple[float, FloatArray]:
            sw = s @ w
            return float(w @ sw), 2.0 * sw

        x = low_w.copy()
        found: list[FloatArray] = []
        for m in targets:
            target = {"type": "eq", "fun": lambda w, m=m: float(mu @ w) - m, "jac": lambda w: mu}
            x = self.minimize(var, True, x, [target])
            found.append(x)
        return self.grid_best(found)

    def risk_grid(self, low_w: FloatArray, high_w: FloatArray) -> FloatArray:
        s, mu = self.s, self.mu
        vols = np.linspace(math.sqrt(float(low_w @ s @ low_w)), math.sqrt(float(high_w @ s @ high_w)), GRID_POINTS)

        def neg_return(w: FloatArray) -> tuple[float, FloatArray]:
            return -float(mu @ w), -mu

        x = low_w.copy()
        found: list[FloatArray] = []
        for vol in vols:
            cap = {"type": "ineq", "fun": lambda w, v=vol: v * v - float(w @ s @ w),
                   "jac": lambda w: -2.0 * (s @ w)}
            x = self.minimize(neg_return, True, x, [cap])
            found.append(x)
        return self.grid_best(found)


def cross_checks(inputs: MixInputs, exact: Portfolio) -> tuple[CrossCheck, ...]:
    """Run the three numerical routes and report each one's distance from ``exact``."""
    routes = _Routes(inputs)

    def report(method: str, started: float, w: FloatArray) -> CrossCheck:
        sharpe = routes.sharpe(w)
        return CrossCheck(method=method, sharpe_ratio=sharpe,
                          max_weight_gap=float(np.max(np.abs(w - exact.weights))),
                          sharpe_gap=exact.sharpe_ratio - sharpe, seconds=time.perf_counter() - started)

    started = time.perf_counter()
    direct = routes.direct_search()
    out = [report("direct_search", started, direct)]

    started = time.perf_counter()
    low_w = routes.min_variance()
    bottom_seconds = time.perf_counter() - started
    started = time.perf_counter()
    far = low_w + 2.0 * (direct - low_w)
    high_w = routes.top_return(far)
    top_seconds = time.perf_counter() - started

    started = time.perf_counter() - bottom_seconds - top_seconds
    out.append(report("risk_grid", started, routes.risk_grid(low_w, high_w)))
    started = time.perf_counter() - bottom_seconds - top_seconds
    out.append(report("return_grid", started, routes.return_grid(low_w, high_w)))
    return tuple(out)
