"""Validated, immutable inputs of one risky-mix version, and the checks that admit them.

``build_inputs`` is the only boundary between caller-supplied numbers and the solvers:
everything past it may assume finite arrays of matching shapes, a symmetric positive
definite covariance with a bounded condition number, and bounds that admit a fully
invested portfolio. Every refusal is an :class:`InputError` naming the request field.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from service.numerics.errors import InputError

__all__ = ["MixInputs", "build_inputs", "budget_tolerance"]

FloatArray = npt.NDArray[np.float64]

_CORRELATION_SYMMETRY_TOL = 1e-12
_CORRELATION_DIAGONAL_TOL = 1e-12
# Ordinary floating point puts 1.0000000000000002 (1 + one ulp) where 1 was meant: entries this
# close outside [-1, 1] are rounding, not a claim, and are brought back to the bound.
_CORRELATION_BOUND_TOL = 1e-12
_COVARIANCE_SYMMETRY_RTOL = 1e-12
_VOLATILITY_AGREEMENT_RTOL = 1e-9
_PSD_RTOL = 1e-12


def budget_tolerance(n: int) -> float:
    """Slack allowed on sum(w) = 1: the rounding of a sum of ``n`` decimal weights."""
    return 4.0 * np.finfo(float).eps * max(n, 1)


def _frozen(values: FloatArray) -> FloatArray:
    out = np.array(values, dtype=np.float64, copy=True)
    out.setflags(write=False)
    return out


@dataclass(frozen=True, eq=False)
class MixInputs:
    """The capital-market assumptions of one risky-mix version, validated.

    Arrays are read-only. ``lower``/``upper`` hold ``-inf``/``+inf`` where a weight is
    unbounded; ``unconstrained`` is true when every bound is infinite (closed forms apply).
    """

    codes: tuple[str, ...]
    expected_returns: FloatArray
    covariance: FloatArray
    risk_free_rate: float
    lower: FloatArray
    upper: FloatArray

    def __post_init__(self) -> None:
        # Derived once (O(n)) so every solve can branch without re-scanning the bounds.
        lo, hi = self.lower, self.upper
        object.__setattr__(self, "_volatilities", _frozen(np.sqrt(np.diag(self.covariance))))
        object.__setattr__(self, "_unconstrained", bool(np.isneginf(lo).all() and np.isposinf(hi).all()))
        object.__setattr__(self, "_bounds_finite", bool(np.isfinite(lo).all() and np.isfinite(hi).all()))

    @property
    def n(self) -> int:
        return len(self.codes)

    @property
    def volatilities(self) -> FloatArray:
        out: FloatArray = self._volatilities  # type: ignore[attr-defined]
        return out

    @property
    def unconstrained(self) -> bool:
        """True when every bound is infinite (the closed forms apply)."""
        return bool(self._unconstrained)  # type: ignore[attr-defined]

    @property
    def bounds_finite(self) -> bool:
        """True when every bound is finite (the feasible set is a bounded box slice)."""
        return bool(self._bounds_finite)  # type: ignore[attr-defined]


def _finite_vector(values: Sequence[float], n: int, count_field: str, item_field: str,
                   noun: str) -> FloatArray:
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(count_field, f"{noun} must be numbers: {exc}") from None
    if arr.shape != (n,):
        raise InputError(count_field, f"expected {n} {noun} (one per asset), got shape {arr.shape}")
    try:
        np.asarray_chkfinite(arr)
    except ValueError:
        i = int(np.flatnonzero(~np.isfinite(arr))[0])
        raise InputError(item_field.format(i=i), f"{noun[:-1]} must be finite, got {arr[i]}") from None
    return arr


def _finite_matrix(values: Sequence[Sequence[float]], n: int, name: str) -> FloatArray:
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(name, f"{name} must be a square matrix of numbers: {exc}") from None
    if arr.shape != (n, n):
        raise InputError(name, f"{name} must be {n} x {n} (one row per asset), got shape {arr.shape}")
    try:
        np.asarray_chkfinite(arr)
    except ValueError:
        i, j = (int(k) for k in np.argwhere(~np.isfinite(arr))[0])
        raise InputError(f"{name}[{i}][{j}]", f"entry must be finite, got {arr[i, j]}") from None
    return arr


def _asymmetry(arr: FloatArray, tol: float, name: str) -> None:
    gap = np.abs(arr - arr.T)
    if gap.max(initial=0.0) > tol:
        i, j = (int(k) for k in np.unravel_index(int(np.argmax(gap)), gap.shape))
        i, j = max(i, j), min(i, j)
        raise InputError(f"{name}[{i}][{j}]",
                         f"{name} is not symmetric: {name}[{i}][{j}] = {arr[i, j]:.12g} but "
                         f"{name}[{j}][{i}] = {arr[j, i]:.12g}")


def _check_spectrum(matrix: FloatArray, name: str, max_condition_number: float) -> None:
    eig = np.linalg.eigvalsh(matrix)
    smallest, largest = float(eig[0]), float(eig[-1])
    scale = float(np.max(np.abs(eig)))
    if smallest < -_PSD_RTOL * scale:
        raise InputError(name, f"{name} is not positive semi-definite: smallest eigenvalue {smallest:.3g}")
    condition = largest / smallest if smallest > 0.0 else math.inf
    if not condition <= max_condition_number:
        shown = "infinite (the matrix is singular)" if math.isinf(condition) else f"{condition:.3g}"
        raise InputError(name, f"{name} condition number {shown} exceeds the bound "
                               f"{max_condition_number:.3g} (eigenvalues from {smallest:.3g} to {largest:.3g})")


def _codes(codes: Sequence[str]) -> tuple[str, ...]:
    out = tuple(codes)
    if len(out) == 0:
        raise InputError("assets", "at least one asset is needed, got 0")
    first_seen: dict[str, int] = {}
    for i, code in enumerate(out):
        if not isinstance(code, str) or not code.strip():
            raise InputError(f"assets[{i}].code", f"code must be a non-empty string, got {code!r}")
        if code in first_seen:
            raise InputError(f"assets[{i}].code", f"duplicate code {code!r}, also at assets[{first_seen[code]}]")
        first_seen[code] = i
    return out


def _bounds(codes: tuple[str, ...], bounds: Mapping[str, tuple[float, float]] | None,
            long_only: bool) -> tuple[FloatArray, FloatArray]:
    n = len(codes)
    lower = np.full(n, 0.0 if long_only else -math.inf)
    upper = np.full(n, 1.0 if long_only else math.inf)
    index = {code: i for i, code in enumerate(codes)}
    for code, pair in (bounds or {}).items():
        field = f"bounds.{code}"
        if code not in index:
            raise InputError(field, "unknown asset code")
        try:
            lo, hi = (float(v) for v in pair)
        except (TypeError, ValueError):
            raise InputError(field, f"a bound is a pair [lo, hi] of numbers, got {pair!r}") from None
        if math.isnan(lo) or math.isnan(hi):
            raise InputError(field, f"bounds must be numbers, got [{lo}, {hi}]")
        if lo > hi:
            raise InputError(field, f"lower bound {lo:g} exceeds upper bound {hi:g}")
        if long_only and lo < 0.0:
            raise InputError(field, f"lower bound {lo:g} is negative but long_only is true")
        if math.isinf(lo) and lo > 0 or math.isinf(hi) and hi < 0:
            raise InputError(field, f"bounds [{lo:g}, {hi:g}] admit no weight")
        lower[index[code]], upper[index[code]] = lo, hi
    low_sum, high_sum = float(np.sum(lower)), float(np.sum(upper))
    tol = budget_tolerance(n)
    if not (low_sum <= 1.0 + tol and high_sum >= 1.0 - tol):
        raise InputError("bounds", "full investment is infeasible: lower bounds sum to "
                                   f"{low_sum:.6g} and upper bounds to {high_sum:.6g}, "
                                   "but weights must sum to 1")
    return lower, upper


def build_inputs(codes: Sequence[str], expected_returns: Sequence[float], risk_free_rate: float, *,
                 volatilities: Sequence[float] | None = None,
                 correlation: Sequence[Sequence[float]] | None = None,
                 covariance: Sequence[Sequence[float]] | None = None,
                 bounds: Mapping[str, tuple[float, float]] | None = None,
                 long_only: bool = True,
                 max_condition_number: float = 1e12) -> MixInputs:
    """Validate one risky-mix version and return it frozen; raise InputError otherwise.

    Give exactly one of ``correlation`` (with ``volatilities``) or ``covariance``
    (``volatilities`` then optional and, if given, checked against its diagonal).
    ``long_only`` makes absent bounds [0, 1] and forbids negative lower bounds;
    otherwise absent bounds are (-inf, inf).
    """
    code_tuple = _codes(codes)
    n = len(code_tuple)
    mu = _finite_vector(expected_returns, n, "expected_return", "assets[{i}].expected_return",
                        "expected returns")
    try:
        rf = float(risk_free_rate)
    except (TypeError, ValueError):
        raise InputError("risk_free_rate", f"must be a number, got {risk_free_rate!r}") from None
    if not math.isfinite(rf):
        raise InputError("risk_free_rate", f"must be finite, got {rf}")

    vols: FloatArray | None = None
    if volatilities is not None:
        vols = _finite_vector(volatilities, n, "volatility", "assets[{i}].volatility", "volatilities")
        bad = np.flatnonzero(vols <= 0.0)
        if bad.size:
            i = int(bad[0])
            raise InputError(f"assets[{i}].volatility", f"volatility must be > 0, got {vols[i]:g}")

    if (correlation is None) == (covariance is None):
        both = "both were given" if correlation is not None else "neither was given"
        raise InputError("covariance", f"give exactly one of correlation (with volatilities) or covariance; {both}")

    if correlation is not None:
        if vols is None:
            raise InputError("correlation", "correlation needs a volatility for every asset")
        corr = _finite_matrix(correlation, n, "correlation")
        _asymmetry(corr, _CORRELATION_SYMMETRY_TOL, "correlation")
        diag_gap = np.abs(np.diag(corr) - 1.0)
        if diag_gap.max() > _CORRELATION_DIAGONAL_TOL:
            i = int(np.argmax(diag_gap))
            raise InputError(f"correlation[{i}][{i}]", f"diagonal entries must be 1, got {float(corr[i, i])!r}")
        outside = np.argwhere(np.abs(corr) > 1.0 + _CORRELATION_BOUND_TOL)
        if outside.size:
            i, j = (int(k) for k in outside[0])
            raise InputError(f"correlation[{i}][{j}]", f"correlation must lie in [-1, 1], got {float(corr[i, j])!r}")
        corr = np.clip(0.5 * (corr + corr.T), -1.0, 1.0)
        np.fill_diagonal(corr, 1.0)
        _check_spectrum(corr, "correlation", max_condition_number)
        cov = corr * np.outer(vols, vols)
    else:
        assert covariance is not None
        cov = _finite_matrix(covariance, n, "covariance")
        _asymmetry(cov, _COVARIANCE_SYMMETRY_RTOL * float(np.max(np.abs(cov))), "covariance")
        diag = np.diag(cov)
        bad = np.flatnonzero(diag <= 0.0)
        if bad.size:
            i = int(bad[0])
            raise InputError(f"covariance[{i}][{i}]", f"variances on the diagonal must be > 0, got {diag[i]:g}")
        if vols is not None:
            implied = np.sqrt(diag)
            gap = np.abs(implied - vols) / vols
            if gap.max() > _VOLATILITY_AGREEMENT_RTOL:
                i = int(np.argmax(gap))
                raise InputError(f"assets[{i}].volatility",
                                 f"volatility {vols[i]:.12g} disagrees with sqrt(covariance[{i}][{i}]) "
                                 f"= {implied[i]:.12g}")
        cov = 0.5 * (cov + cov.T)
        _check_spectrum(cov, "covariance", max_condition_number)

    lower, upper = _bounds(code_tuple, bounds, long_only)
    return MixInputs(codes=code_tuple, expected_returns=_frozen(mu), covariance=_frozen(cov),
                     risk_free_rate=rf, lower=_frozen(lower), upper=_frozen(upper))
