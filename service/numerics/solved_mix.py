"""A solved risky-mix version: every exact answer plus the cross-checks, and its
JSON-able document form (rebuilt without solving anything).

Document layout (``format`` = ``DOCUMENT_FORMAT``): floats, strings, lists and the integer
counts and asset indices of the frontier's corner changes (``Frontier.to_document``). The
inputs hold either ``covariance_f64le`` (the n x n matrix as base64 of little-endian float64
bytes; documents with a ``covariance`` list of rows are read too) or ``factor_model``
(loadings, factor covariance, specific volatilities: never expanded to n x n).
Infinite bounds are written as the strings ``"-inf"`` / ``"inf"``; the frontier's
``shape`` is ``"bounded"`` or ``"unbounded_above"``. Floats are written as Python floats,
whose JSON text round-trips bit for bit.
"""

from __future__ import annotations

import base64
import math
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import numpy.typing as npt

from service.numerics.exact import min_variance_with_solution, tangency
from service.numerics.frontier import Frontier, frontier_from_min_variance
from service.numerics.inputs import MixInputs
from service.numerics.numerical_routes import CrossCheck, cross_checks
from service.numerics.portfolio import Portfolio
from service.numerics.risk import DenseRisk, FactorModel, FactorRisk, Risk

__all__ = ["DOCUMENT_FORMAT", "SolvedMix", "solve_mix"]

FloatArray = npt.NDArray[np.float64]

DOCUMENT_FORMAT = "mixline.solved_mix/1"


@dataclass(frozen=True, eq=False)
class SolvedMix:
    """Exact tangency, minimum variance and frontier of one mix, with the cross-checks."""

    inputs: MixInputs
    tangency: Portfolio
    min_variance: Portfolio
    # None until computed: solve_mix(frontier=False) leaves it for later (with_frontier).
    frontier: Frontier | None
    cross_checks: tuple[CrossCheck, ...]
    kkt_residual: float            # max KKT residual of the exact tangency (<= 1e-10 or it raised)

    def with_frontier(self, frontier: Frontier) -> SolvedMix:
        return replace(self, frontier=frontier)

    def to_document(self) -> dict[str, Any]:
        """JSON-able form (floats, strings, lists); ``from_document`` inverts it exactly."""
        inp = self.inputs
        model = inp.factor_model
        # A factor model is stored as given (n k + k^2 + n numbers), never as the n x n matrix.
        risk: dict[str, Any] = (
            {"covariance_f64le": _packed(inp.covariance)} if model is None else
            {"factor_model": {"loadings": model.loadings.tolist(),
                              "factor_covariance": model.factor_covariance.tolist(),
                              "specific_volatility": _floats(model.specific_volatility)}})
        return {
            "format": DOCUMENT_FORMAT,
            "inputs": {
                "codes": list(inp.codes),
                "expected_returns": _floats(inp.expected_returns),
                **risk,
                "risk_free_rate": float(inp.risk_free_rate),
                "lower": [_bound_out(x) for x in inp.lower],
                "upper": [_bound_out(x) for x in inp.upper],
            },
            "tangency": _portfolio_out(self.tangency),
            "min_variance": _portfolio_out(self.min_variance),
            "frontier": None if self.frontier is None else self.frontier.to_document(),
            "cross_checks": [
                {"method": c.method, "sharpe_ratio": float(c.sharpe_ratio),
                 "max_weight_gap": float(c.max_weight_gap), "sharpe_gap": float(c.sharpe_gap),
                 "seconds": float(c.seconds)}
                for c in self.cross_checks
            ],
            "kkt_residual": float(self.kkt_residual),
        }

    @classmethod
    def from_document(cls, doc: dict[str, Any]) -> SolvedMix:
        """Rebuild from ``to_document`` output WITHOUT solving anything (shapes are checked)."""
        if doc.get("format") != DOCUMENT_FORMAT:
            raise ValueError(f"not a solved-mix document of format {DOCUMENT_FORMAT!r}: {doc.get('format')!r}")
        raw = doc["inputs"]
        codes = tuple(str(c) for c in raw["codes"])
        n = len(codes)
        risk: Risk
        if "factor_model" in raw:
            model = raw["factor_model"]
            loadings = np.array(model["loadings"], dtype=np.float64)
            k = loadings.shape[1] if loadings.ndim == 2 else -1
            risk = FactorRisk(FactorModel(
                loadings=_frozen(loadings, (n, k), "inputs.factor_model.loadings"),
                factor_covariance=_array(model["factor_covariance"], (k, k), "inputs.factor_model.factor_covariance"),
                specific_volatility=_array(model["specific_volatility"], (n,), "inputs.factor_model.specific_volatility"),
            ))
        else:
            dense = _unpacked(raw["covariance_f64le"], n) if "covariance_f64le" in raw else raw["covariance"]
            risk = DenseRisk(_array(dense, (n, n), "inputs.covariance"))
        inputs = MixInputs(
            codes=codes,
            expected_returns=_array(raw["expected_returns"], (n,), "inputs.expected_returns"),
            risk=risk,
            risk_free_rate=float(raw["risk_free_rate"]),
            lower=_frozen(np.array([_bound_in(x) for x in raw["lower"]], dtype=np.float64), (n,), "inputs.lower"),
            upper=_frozen(np.array([_bound_in(x) for x in raw["upper"]], dtype=np.float64), (n,), "inputs.upper"),
        )
        frontier = None if doc["frontier"] is None else Frontier.from_document(doc["frontier"], n)
        checks = tuple(
            CrossCheck(method=str(c["method"]), sharpe_ratio=float(c["sharpe_ratio"]),
                       max_weight_gap=float(c["max_weight_gap"]), sharpe_gap=float(c["sharpe_gap"]),
                       seconds=float(c["seconds"]))
            for c in doc["cross_checks"]
        )
        return cls(inputs=inputs, tangency=_portfolio_in(doc["tangency"], n, "tangency"),
                   min_variance=_portfolio_in(doc["min_variance"], n, "min_variance"),
                   frontier=frontier, cross_checks=checks, kkt_residual=float(doc["kkt_residual"]))


def _packed(a: FloatArray) -> str:
    """An array as base64 of its little-endian float64 bytes: exact, and ~20x quicker to write
    and read than a million JSON numbers (the published inputs keep the numbers as given)."""
    return base64.b64encode(np.ascontiguousarray(a, dtype="<f8").tobytes()).decode("ascii")


def _unpacked(text: str, n: int) -> FloatArray:
    flat = np.frombuffer(base64.b64decode(text), dtype="<f8")
    if flat.size != n * n:
        raise ValueError(f"inputs.covariance_f64le holds {flat.size} numbers, expected {n * n}")
    return flat.astype(np.float64).reshape(n, n)


def _floats(a: FloatArray) -> list[float]:
    out: list[float] = np.asarray(a, dtype=np.float64).tolist()  # Python floats, exactly
    return out


def _bound_out(x: float) -> float | str:
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return float(x)


def _bound_in(x: float | str) -> float:
    if isinstance(x, str):
        if x not in ("inf", "-inf"):
            raise ValueError(f"a bound is a number, 'inf' or '-inf', got {x!r}")
        return math.inf if x == "inf" else -math.inf
    return float(x)


def _frozen(a: FloatArray, shape: tuple[int, ...], where: str) -> FloatArray:
    if a.shape != shape:
        raise ValueError(f"{where} has shape {a.shape}, expected {shape}")
    a.setflags(write=False)
    return a


def _array(values: Any, shape: tuple[int, ...], where: str) -> FloatArray:
    return _frozen(np.array(values, dtype=np.float64), shape, where)


def _portfolio_out(p: Portfolio) -> dict[str, Any]:
    return {"weights": _floats(p.weights), "expected_return": float(p.expected_return),
            "volatility": float(p.volatility), "sharpe_ratio": float(p.sharpe_ratio), "method": p.method}


def _portfolio_in(raw: dict[str, Any], n: int, where: str) -> Portfolio:
    return Portfolio(weights=_array(raw["weights"], (n,), f"{where}.weights"),
                     expected_return=float(raw["expected_return"]), volatility=float(raw["volatility"]),
                     sharpe_ratio=float(raw["sharpe_ratio"]), method=str(raw["method"]))


def solve_mix(inputs: MixInputs, *, cross_check: bool = True, frontier: bool = True) -> SolvedMix:
    """Solve one validated mix exactly (tangency, minimum variance, frontier) and, unless
    ``cross_check`` is false, run the three numerical routes against the tangency.
    ``frontier=False`` leaves the frontier (the costliest part at large N) for
    ``efficient_frontier`` and ``SolvedMix.with_frontier`` later."""
    best, residual = tangency(inputs)
    lowest, low_solution = min_variance_with_solution(inputs)
    # The critical line starts at the minimum-variance active set: solved once, used twice.
    corners = frontier_from_min_variance(inputs, low_solution) if frontier else None
    checks = cross_checks(inputs, best) if cross_check else ()
    return SolvedMix(inputs=inputs, tangency=best, min_variance=lowest, frontier=corners,
                     cross_checks=checks, kkt_residual=residual)
