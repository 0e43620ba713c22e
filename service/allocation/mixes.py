"""Risky-mix versions: their canonical form and content hash, solving once, and the published view.

A mix is identified by the SHA-256 of a canonical JSON form of its inputs, so the same content
always hashes the same whatever key order or number spelling a caller used; the solved result is
kept beside it and rebuilt from its document, never re-solved.
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import orjson

from service.numerics import (
    Frontier,
    MixInputs,
    Portfolio,
    SolvedMix,
    build_inputs,
    solve_mix,
)

from .errors import AllocationError

# Version of the canonical form below; part of the hash so a future change cannot collide.
CANONICAL_FORM = "mixline.mix.v1"

# Above these an annual rate reads as a percentage typed as a number (7 for 7 %), not a decimal.
MAX_DECIMAL_RETURN = 1.0
MAX_DECIMAL_VOLATILITY = 1.0
MAX_DECIMAL_RISK_FREE_RATE = 0.5
_DECIMALS = "rates and volatilities are annual decimals (0.05 = 5 %)"


def percent_like(value: float, kind: str) -> str | None:
    """Why ``value`` (an annual ``expected_return``, ``volatility`` or ``risk_free_rate``) looks
    like a percentage rather than a decimal, or None when it does not."""
    limit = {
        "expected_return": MAX_DECIMAL_RETURN,
        "volatility": MAX_DECIMAL_VOLATILITY,
        "risk_free_rate": MAX_DECIMAL_RISK_FREE_RATE,
    }[kind]
    if value > limit:
        return f"{kind.replace('_', ' ')} {value:g} looks like a percentage: {_DECIMALS}"
    return None


def check_decimal_rates(
    expected_returns: Sequence[float],
    volatilities: Sequence[float | None],
    risk_free_rate: float,
    covariance: Sequence[Sequence[float]] | None = None,
) -> None:
    """Refuse values that look like percentages; ``field`` names the first one."""
    for i, mu in enumerate(expected_returns):
        if reason := percent_like(mu, "expected_return"):
            raise AllocationError(f"assets[{i}].expected_return", reason)
    for i, vol in enumerate(volatilities):
        if vol is not None and (reason := percent_like(vol, "volatility")):
            raise AllocationError(f"assets[{i}].volatility", reason)
    for i, row in enumerate(covariance or []):
        if i < len(row) and row[i] > 0 and (reason := percent_like(math.sqrt(row[i]), "volatility")):
            raise AllocationError(f"covariance[{i}][{i}]", f"variance {row[i]:g}: {reason}")
    if reason := percent_like(risk_free_rate, "risk_free_rate"):
        raise AllocationError("risk_free_rate", reason)


def canonical_inputs(
    *,
    assets: Sequence[Mapping[str, Any]],
    risk_free_rate: float,
    correlation: Sequence[Sequence[float]] | None,
    covariance: Sequence[Sequence[float]] | None,
    bounds: Mapping[str, Sequence[float]] | None,
    long_only: bool,
    factor_model: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """Everything that determines the solution, in one canonical shape (cross_check is not in it).

    A factor model is kept as published (loadings, factor_covariance, specific_volatility); the
    key is present only when one is given, so the hashes of correlation and covariance mixes are
    what they were before factor models existed."""
    canonical = {
        "form": CANONICAL_FORM,
        "assets": [
            {
                "code": a["code"],
                "expected_return": float(a["expected_return"]),
                "volatility": None if a.get("volatility") is None else float(a["volatility"]),
            }
            for a in assets
        ],
        "risk_free_rate": float(risk_free_rate),
        # The schema hands over floats already (strict, finite); the lists are taken as they are.
        "correlation": None if correlation is None else [list(row) for row in correlation],
        "covariance": None if covariance is None else [list(row) for row in covariance],
        "bounds": None
        if not bounds
        else {code: [float(lo), float(hi)] for code, (lo, hi) in sorted(bounds.items())},
        "long_only": bool(long_only),
    }
    if factor_model is not None:
        canonical["factor_model"] = {
            "loadings": [list(row) for row in factor_model["loadings"]],
            "factor_covariance": [list(row) for row in factor_model["factor_covariance"]],
            "specific_volatility": list(factor_model["specific_volatility"]),
        }
    return canonical


def canonical_text(canonical: Mapping[str, Any]) -> bytes:
    """The one text of a canonical form: hashed, and stored as it is (a 1,000-asset covariance
    is 20 MB of it, so it is written once)."""
    # orjson writes floats in shortest round-trip form and sorted keys make the text unique.
    return orjson.dumps(canonical, option=orjson.OPT_SORT_KEYS)


def content_hash(canonical: Mapping[str, Any] | bytes) -> str:
    text = canonical if isinstance(canonical, bytes) else canonical_text(canonical)
    return hashlib.sha256(text).hexdigest()


def inputs_from_canonical(canonical: Mapping[str, Any], *, max_condition_number: float) -> MixInputs:
    assets = canonical["assets"]
    vols = [a["volatility"] for a in assets]
    bounds = canonical["bounds"]
    return build_inputs(
        [a["code"] for a in assets],
        [a["expected_return"] for a in assets],
        canonical["risk_free_rate"],
        volatilities=None if all(v is None for v in vols) else vols,
        correlation=canonical["correlation"],
        covariance=canonical["covariance"],
        factor_model=canonical.get("factor_model"),
        bounds=None if bounds is None else {k: (v[0], v[1]) for k, v in bounds.items()},
        long_only=canonical["long_only"],
        max_condition_number=max_condition_number,
    )


def cross_checks_wanted(requested: bool | None, assets: int, limit: int) -> bool:
    """Whether to run the numerical cross-checks: as asked, or, when the request does not say,
    for mixes of at most ``limit`` assets. Asked for above the limit they would hold the
    publication for minutes (SLSQP on hundreds of weights): refused, naming the field."""
    if requested is None:
        return assets <= limit
    if requested and assets > limit:
        raise AllocationError("cross_check", f"the numerical cross-checks run for mixes of at most {limit} assets "
                                             f"(above that they take minutes); this mix has {assets}: leave "
                                             "cross_check out or set it to false")
    return requested


def solve(canonical: Mapping[str, Any], *, cross_check: bool, max_condition_number: float) -> SolvedMix:
    """Tangency, minimum variance and (if asked) cross-checks; the frontier is solved apart."""
    return solve_mix(
        inputs_from_canonical(canonical, max_condition_number=max_condition_number),
        cross_check=cross_check,
        frontier=False,
    )


def _cleaned_weights(codes: Sequence[str], weights: np.ndarray) -> dict[str, float]:
    """Weights by code. -0.0 and 1e-17 noise in weights read as errors to people; exact zeros
    stay zeros. Vectorised: a 100-point frontier of 2,000 assets has 200,000 weights."""
    values = np.where(np.abs(weights) < 1e-15, 0.0, weights).tolist()
    return dict(zip(codes, values, strict=True))


def portfolio_document(p: Portfolio, codes: Sequence[str]) -> dict[str, Any]:
    return {
        "weights": _cleaned_weights(codes, p.weights),
        "expected_return": p.expected_return,
        "volatility": p.volatility,
        "sharpe_ratio": p.sharpe_ratio,
        "method": p.method,
    }


def published_document(version: str, digest: str, solved: SolvedMix) -> dict[str, Any]:
    """The body a committee gets back at publish, and anyone gets from GET .../mixes/{version}."""
    codes = solved.inputs.codes
    return {
        "version": version,
        "content_hash": digest,
        "risk_free_rate": solved.inputs.risk_free_rate,
        "asset_codes": list(codes),
        "tangency": portfolio_document(solved.tangency, codes),
        "min_variance": portfolio_document(solved.min_variance, codes),
        "kkt_residual": solved.kkt_residual,
        "cross_checks": [
            {
                "method": c.method,
                "sharpe_ratio": c.sharpe_ratio,
                "max_weight_gap": c.max_weight_gap,
                "sharpe_gap": c.sharpe_gap,
                "seconds": c.seconds,
            }
            for c in solved.cross_checks
        ],
    }


@dataclass(frozen=True)
class MixTerms:
    """What the allocation rules need of one solved mix (small: it travels to batch processes)."""

    version: str
    content_hash: str
    codes: tuple[str, ...]
    weights: np.ndarray
    tangency_return: float
    tangency_volatility: float
    risk_free_rate: float


@dataclass(frozen=True)
class MixView(MixTerms):
    """A published version as a process keeps it: the allocation terms and the solved mix."""

    solved: SolvedMix

    @classmethod
    def from_solved(cls, version: str, digest: str, solved: SolvedMix) -> MixView:
        return cls(
            version=version,
            content_hash=digest,
            codes=solved.inputs.codes,
            weights=solved.tangency.weights,
            tangency_return=solved.tangency.expected_return,
            tangency_volatility=solved.tangency.volatility,
            risk_free_rate=solved.inputs.risk_free_rate,
            solved=solved,
        )

    def terms(self) -> MixTerms:
        return MixTerms(
            self.version, self.content_hash, self.codes, self.weights,
            self.tangency_return, self.tangency_volatility, self.risk_free_rate,
        )


# When a spaced point falls on a labelled one, the label wins (the first kinds are the rarer).
_KIND_ORDER = {"min_variance": 0, "tangency": 1, "corner": 2, "spaced": 3}


def frontier_document(
    view: MixView, frontier: Frontier, points: int, spacing: str = "return", *, corners: bool = True
) -> dict[str, Any]:
    """``points`` frontier portfolios evenly spaced in return or volatility, plus every corner
    portfolio (unless ``corners`` is false: a 2,000-asset mix has thousands) and the tangency,
    sorted by expected return, each with its ``kind``."""
    solved = view.solved
    codes = view.codes
    inputs = solved.inputs
    if corners:
        labelled: list[tuple[str, Portfolio]] = [("corner", p) for p in frontier.corners(inputs)]
        labelled[0] = ("min_variance", labelled[0][1])
    else:
        labelled = [("min_variance", solved.min_variance)]
    labelled.append(("tangency", solved.tangency))
    scale = max(1.0, float(np.max(np.abs(inputs.expected_returns))))
    every = labelled + [("spaced", p) for p in frontier.sample(points, inputs, spacing)]
    every.sort(key=lambda kp: (kp[1].expected_return, _KIND_ORDER[kp[0]]))
    merged: list[tuple[str, Portfolio]] = []
    for kind, p in every:
        if merged and abs(p.expected_return - merged[-1][1].expected_return) <= 1e-12 * scale:
            if _KIND_ORDER[kind] < _KIND_ORDER[merged[-1][0]]:
                merged[-1] = (kind, p)
            continue
        merged.append((kind, p))
    sharpe = solved.tangency.sharpe_ratio
    return {
        "version": view.version,
        "content_hash": view.content_hash,
        "spacing": spacing,
        "points": [
            {
                "kind": kind,
                "expected_return": p.expected_return,
                "volatility": p.volatility,
                "sharpe_ratio": p.sharpe_ratio,
                "weights": _cleaned_weights(codes, p.weights),
            }
            for kind, p in merged
        ],
        "tangency": portfolio_document(solved.tangency, codes),
        "min_variance": portfolio_document(solved.min_variance, codes),
        # E[r] = intercept + slope * sigma: the capital allocation line through rf and the tangency.
        "allocation_line": {"intercept": view.risk_free_rate, "slope": sharpe},
    }


def is_finite_document(doc: Any) -> bool:
    """True when no float anywhere in a document is NaN or infinite (never sent to a client)."""
    if isinstance(doc, float):
        return math.isfinite(doc)
    if isinstance(doc, dict):
        return all(is_finite_document(v) for v in doc.values())
    if isinstance(doc, list | tuple):
        return all(is_finite_document(v) for v in doc)
    return True
