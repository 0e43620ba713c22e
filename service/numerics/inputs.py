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
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy.linalg.lapack import dpocon as _pocon
from scipy.linalg.lapack import dpotrf as _potrf

from service.numerics.errors import InputError
from service.numerics.risk import DenseRisk, FactorModel, FactorRisk, Risk

__all__ = ["MAX_FACTORS", "MixInputs", "budget_tolerance", "build_inputs"]

FloatArray = npt.NDArray[np.float64]

_CORRELATION_SYMMETRY_TOL = 1e-12
_CORRELATION_DIAGONAL_TOL = 1e-12
# Ordinary floating point puts 1.0000000000000002 (1 + one ulp) where 1 was meant: entries this
# close outside [-1, 1] are rounding, not a claim, and are brought back to the bound.
_CORRELATION_BOUND_TOL = 1e-12
_COVARIANCE_SYMMETRY_RTOL = 1e-12
_VOLATILITY_AGREEMENT_RTOL = 1e-9
_PSD_RTOL = 1e-12
#: Most factors a factor model may have (solves cost O(n k^2)).
MAX_FACTORS = 50
# The 1-norm condition estimate from a Cholesky factor (LAPACK pocon) accepts a matrix
# outright when it is this far below the bound; nearer the bound, the eigenvalues decide.
_CONDITION_MARGIN = 10.0


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
    ``risk`` is the covariance as the solvers use it (dense, or a factor model that is never
    formed as a matrix unless ``covariance`` is read).
    """

    codes: tuple[str, ...]
    expected_returns: FloatArray
    risk: Risk
    risk_free_rate: float
    lower: FloatArray
    upper: FloatArray

    def __post_init__(self) -> None:
        # Derived once (O(n)) so every solve can branch without re-scanning the bounds.
        lo, hi = self.lower, self.upper
        object.__setattr__(self, "_volatilities", _frozen(np.sqrt(self.risk.diagonal)))
        object.__setattr__(self, "_unconstrained", bool(np.isneginf(lo).all() and np.isposinf(hi).all()))
        object.__setattr__(self, "_bounds_finite", bool(np.isfinite(lo).all() and np.isfinite(hi).all()))

    @property
    def n(self) -> int:
        return len(self.codes)

    @property
    def covariance(self) -> FloatArray:
        """The dense n x n covariance (formed on first use for a factor model)."""
        return self.risk.dense()

    @property
    def factor_model(self) -> FactorModel | None:
        return self.risk.factor_model

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
        one = noun[:-3] + "y" if noun.endswith("ies") else noun[:-1]
        raise InputError(item_field.format(i=i), f"{one} must be finite, got {arr[i]}") from None
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
    """Positive definite with a bounded condition number, or an InputError saying why.

    A Cholesky factorisation and LAPACK's 1-norm condition estimate (pocon) decide the common
    case in O(n^3 / 3) without an eigendecomposition: kappa_2 <= kappa_1, and the estimate
    is within a small factor of kappa_1, so an estimate _CONDITION_MARGIN below the bound
    accepts. When the factorisation fails, or the estimate comes near the bound, the
    eigenvalues are computed and decide (and give the numbers the message shows).
    """
    chol, info = _potrf(matrix, lower=1, clean=0)
    if info == 0:
        norm = float(np.abs(matrix).sum(axis=0).max())
        rcond, info = _pocon(chol, norm, uplo="L")
        if info == 0 and rcond > 0.0 and _CONDITION_MARGIN / rcond <= max_condition_number:
            return
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
                 volatilities: Sequence[float | None] | None = None,
                 correlation: Sequence[Sequence[float]] | None = None,
                 covariance: Sequence[Sequence[float]] | None = None,
                 factor_model: Mapping[str, Any] | None = None,
                 bounds: Mapping[str, tuple[float, float]] | None = None,
                 long_only: bool = True,
                 max_condition_number: float = 1e12) -> MixInputs:
    """Validate one risky-mix version and return it frozen; raise InputError otherwise.

    Give exactly one of ``correlation`` (with ``volatilities``), ``covariance`` or
    ``factor_model`` (a mapping with ``loadings`` n x k, ``factor_covariance`` k x k and
    ``specific_volatility`` n: covariance B F B' + diag(d^2)); with either of the last two
    ``volatilities`` are optional and, if given, checked against the covariance's diagonal.
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
    # With a covariance or a factor model some volatilities may be left out (None): only the
    # given ones are checked against it. A correlation needs all of them.
    vols_given: npt.NDArray[np.bool_] | None = None
    if volatilities is not None:
        listed = list(volatilities)
        vols_given = np.array([v is not None for v in listed], dtype=bool)
        if correlation is not None and not vols_given.all():
            i = int(np.flatnonzero(~vols_given)[0])
            raise InputError(f"assets[{i}].volatility", "required when a correlation matrix is given")
        filled = [1.0 if v is None else v for v in listed]
        vols = _finite_vector(filled, n, "volatility", "assets[{i}].volatility", "volatilities")
        bad = np.flatnonzero(vols <= 0.0)
        if bad.size:
            i = int(bad[0])
            raise InputError(f"assets[{i}].volatility", f"volatility must be > 0, got {vols[i]:g}")

    given = [name for name, value in (("correlation", correlation), ("covariance", covariance),
                                      ("factor_model", factor_model)) if value is not None]
    if len(given) != 1:
        said = f"{' and '.join(given)} were given" if given else "none was given"
        raise InputError(given[-1] if given else "covariance",
                         f"give exactly one of correlation (with volatilities), covariance or factor_model; {said}")

    risk: Risk
    if factor_model is not None:
        risk = _factor_risk(factor_model, n, vols, vols_given, max_condition_number)
    elif correlation is not None:
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
        _volatilities_agree(np.sqrt(diag), vols, vols_given, "sqrt(covariance[{i}][{i}])")
        cov = 0.5 * (cov + cov.T)
        _check_spectrum(cov, "covariance", max_condition_number)
    if factor_model is None:
        risk = DenseRisk(_frozen(cov))

    lower, upper = _bounds(code_tuple, bounds, long_only)
    return MixInputs(codes=code_tuple, expected_returns=_frozen(mu), risk=risk,
                     risk_free_rate=rf, lower=_frozen(lower), upper=_frozen(upper))


def _volatilities_agree(implied: FloatArray, vols: FloatArray | None, given: npt.NDArray[np.bool_] | None,
                        source: str) -> None:
    if vols is None:
        return
    gap = np.abs(implied - vols) / vols
    if given is not None:
        gap[~given] = 0.0
    if gap.max() > _VOLATILITY_AGREEMENT_RTOL:
        i = int(np.argmax(gap))
        raise InputError(f"assets[{i}].volatility",
                         f"volatility {vols[i]:.12g} disagrees with {source.format(i=i)} = {implied[i]:.12g}")


def _factor_risk(model: Mapping[str, Any], n: int, vols: FloatArray | None,
                 given: npt.NDArray[np.bool_] | None, max_condition_number: float) -> FactorRisk:
    """Validate a factor model (shapes, finite, F symmetric PSD, d > 0, k <= MAX_FACTORS).

    The covariance B F B' + D is positive definite because D is; its condition number is
    at most (max d^2 + lambda_max(G'G)) / min d^2 (G'G is k x k), which accepts without
    forming the n x n matrix; only above the bound do the exact eigenvalues decide.
    """
    extra = sorted(set(model) - {"loadings", "factor_covariance", "specific_volatility"})
    if extra:
        raise InputError(f"factor_model.{extra[0]}", "unknown field; a factor model has loadings, "
                                                    "factor_covariance and specific_volatility")
    for key in ("loadings", "factor_covariance", "specific_volatility"):
        if model.get(key) is None:
            raise InputError(f"factor_model.{key}", "required")
    where = "factor_model.loadings"
    b = _matrix_of_numbers(model["loadings"], where, "loadings must be an n x k matrix of numbers")
    if b.ndim != 2 or b.shape[0] != n or not 1 <= b.shape[1] <= MAX_FACTORS:
        raise InputError(where, f"loadings must be {n} x k (one row per asset, 1 <= k <= {MAX_FACTORS} "
                                f"factors), got shape {b.shape}")
    k = int(b.shape[1])
    _all_finite(b, where)
    where = "factor_model.factor_covariance"
    f = _matrix_of_numbers(model["factor_covariance"], where, "factor_covariance must be a k x k matrix of numbers")
    if f.shape != (k, k):
        raise InputError(where, f"factor_covariance must be {k} x {k} (one row per factor of the "
                                f"loadings), got shape {f.shape}")
    _all_finite(f, where)
    _asymmetry(f, _COVARIANCE_SYMMETRY_RTOL * max(float(np.max(np.abs(f))), np.finfo(float).tiny), where)
    f = 0.5 * (f + f.T)
    eig = np.linalg.eigvalsh(f)
    if float(eig[0]) < -_PSD_RTOL * max(float(np.max(np.abs(eig))), np.finfo(float).tiny):
        raise InputError(where, f"factor_covariance is not positive semi-definite: smallest eigenvalue "
                                f"{float(eig[0]):.3g}")
    d = _finite_vector(model["specific_volatility"], n, "factor_model.specific_volatility",
                       "factor_model.specific_volatility[{i}]", "specific volatilities")
    bad = np.flatnonzero(d <= 0.0)
    if bad.size:
        i = int(bad[0])
        raise InputError(f"factor_model.specific_volatility[{i}]", f"specific volatility must be > 0, got {d[i]:g}")
    risk = FactorRisk(FactorModel(loadings=_frozen(b), factor_covariance=_frozen(f),
                                  specific_volatility=_frozen(d)))
    _volatilities_agree(np.sqrt(risk.diagonal), vols, given,
                        "the factor model's sqrt((B F B')[{i}][{i}] + specific_volatility[{i}]^2)")
    d2 = risk.d2
    top = float(np.linalg.eigvalsh(risk.g.T @ risk.g)[-1]) if risk.rank else 0.0
    if not (float(d2.max()) + top) / float(d2.min()) <= max_condition_number:
        exact = np.linalg.eigvalsh(risk.dense())
        condition = float(exact[-1]) / float(exact[0])
        if not condition <= max_condition_number:
            raise InputError("factor_model", f"the factor model's covariance has condition number "
                                             f"{condition:.3g}, above the bound {max_condition_number:.3g} "
                                             f"(eigenvalues from {float(exact[0]):.3g} to {float(exact[-1]):.3g})")
    return risk


def _matrix_of_numbers(values: Any, where: str, what: str) -> FloatArray:
    try:
        return np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        rows = list(values) if isinstance(values, Sequence) else []
        if rows and all(isinstance(row, Sequence) for row in rows):
            width = len(rows[0])
            for i, row in enumerate(rows):
                if len(row) != width:
                    raise InputError(f"{where}[{i}]", f"{what}: row {i} has {len(row)} entries, "
                                                      f"row 0 has {width}") from None
        raise InputError(where, f"{what}: {exc}") from None


def _all_finite(arr: FloatArray, name: str) -> None:
    try:
        np.asarray_chkfinite(arr)
    except ValueError:
        i, j = (int(k) for k in np.argwhere(~np.isfinite(arr))[0])
        raise InputError(f"{name}[{i}][{j}]", f"entry must be finite, got {arr[i, j]}") from None
