"""Seeded, invented capital-market scenarios for the numerics tests.

A factor model (a few common factors plus idiosyncratic risk) gives a positive definite
covariance; expected returns are the risk-free rate plus factor premia plus noise, so a
long-only tangency holds some assets and leaves others out.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from service.numerics import MixInputs, build_inputs

FloatArray = npt.NDArray[np.float64]

RISK_FREE_RATE = 0.02


def factor_model(n: int, seed: int) -> tuple[FloatArray, FloatArray]:
    """(expected returns, covariance) of n invented asset classes."""
    rng = np.random.default_rng(seed)
    k = 3
    loadings = rng.normal(0.0, 1.0, (n, k)) * np.array([0.12, 0.06, 0.04])
    loadings[:, 0] = np.abs(loadings[:, 0]) + 0.03
    idio = rng.uniform(0.03, 0.20, n)
    cov = loadings @ loadings.T + np.diag(idio ** 2)
    premia = np.array([0.35, 0.10, 0.05])
    mu = RISK_FREE_RATE + loadings @ premia + rng.normal(0.0, 0.015, n)
    return mu, cov


def codes(n: int) -> list[str]:
    return [f"ASSET_{i:03d}" for i in range(n)]


def scenario(n: int, seed: int, *, case: str = "long_only") -> MixInputs:
    """``case``: "long_only" (bounds [0, 1]), "capped" (long only, caps ~2.5/n so they bind),
    "boxed" (random lower floors and caps), "unbounded" (no bounds at all)."""
    mu, cov = factor_model(n, seed)
    names = codes(n)
    if case == "long_only":
        return build_inputs(names, mu, RISK_FREE_RATE, covariance=cov)
    if case == "capped":
        cap = min(1.0, 2.5 / n) if n > 2 else 0.7
        return build_inputs(names, mu, RISK_FREE_RATE, covariance=cov, bounds={c: (0.0, cap) for c in names})
    if case == "boxed":
        rng = np.random.default_rng(seed + 1000)
        floors = rng.uniform(0.0, 0.3 / n, n)
        caps = floors + rng.uniform(0.5, 4.0, n) / n
        caps = np.maximum(caps, (1.0 - floors.sum()) / n + floors)  # keeps sum(caps) >= 1
        return build_inputs(names, mu, RISK_FREE_RATE, covariance=cov,
                            bounds={c: (float(lo), float(hi)) for c, lo, hi in zip(names, floors, caps, strict=True)})
    if case == "unbounded":
        # Keep the risk-free rate below the minimum-variance return (Merton 1972: otherwise
        # the closed-form tangency is on the inefficient branch), computed with numpy.
        ones = np.ones(n)
        m_mv = float(mu @ np.linalg.solve(cov, ones) / (ones @ np.linalg.solve(cov, ones)))
        rf = min(RISK_FREE_RATE, m_mv - 0.01)
        return build_inputs(names, mu, rf, covariance=cov, long_only=False)
    raise ValueError(case)


def feasible_portfolios(inputs: MixInputs, count: int, seed: int) -> FloatArray:
    """Random fully invested portfolios inside the bounds: a random point shifted and
    clipped into the box until it sums to one (bisection on the shift)."""
    rng = np.random.default_rng(seed)
    lo = np.where(np.isfinite(inputs.lower), inputs.lower, -2.0)
    hi = np.where(np.isfinite(inputs.upper), inputs.upper, 2.0)
    base = lo + (hi - lo) * rng.dirichlet(np.full(inputs.n, 0.5), size=count)
    low, high = np.full((count, 1), -4.0), np.full((count, 1), 4.0)
    for _ in range(100):
        mid = 0.5 * (low + high)
        short = np.clip(base + mid, lo, hi).sum(axis=1, keepdims=True) < 1.0
        low = np.where(short, mid, low)
        high = np.where(short, high, mid)
    out: FloatArray = np.clip(base + 0.5 * (low + high), lo, hi)
    return out
