"""Capital-market assumptions estimated from a history of periodic simple returns.

- ``sample``: the unbiased sample covariance, sum of centred outer products / (T - 1).
- ``shrinkage``: Ledoit and Wolf (2004), "A well-conditioned estimator for large-dimensional
  covariance matrices", J. Multivariate Analysis 88, 365-411: the maximum-likelihood sample
  covariance S (divided by T, after centring) shrunk toward m I, m = tr(S)/N, with intensity
  b^2 / d^2, where d^2 = ||S - m I||^2 / N and b^2 = min(d^2, sum_t ||x_t x_t' - S||^2 / (T^2 N))
  (Frobenius norms; Lemmas 3.2-3.4 of the paper).
- Annualised by the periods per year of the frequency, arithmetically: mean * P, covariance * P
  (common practice; compounding is left to the committee).
- An estimate whose correlation is not positive definite within the service's condition-number
  bound (series that move as one) is refused, or, when asked, replaced by the nearest
  correlation matrix (Higham 2002) with eigenvalues at least ``REPAIR_EIGENVALUE_FLOOR``.

Every refusal is an InputError naming the request field (``returns.CODE``, ``returns.CODE[i]``,
``frequency``, ...). Nothing is dropped, filled or repaired without being asked.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from service.numerics.errors import InputError
from service.numerics.nearest_correlation import nearest_correlation

__all__ = [
    "COVARIANCE_METHODS",
    "PERIODS_PER_YEAR",
    "REPAIR_EIGENVALUE_FLOOR",
    "HistoryEstimate",
    "estimate_from_history",
    "history_matrix",
    "ledoit_wolf",
    "sample_covariance",
]

FloatArray = npt.NDArray[np.float64]

# Trading days, weeks, months and quarters in a year (common practice).
PERIODS_PER_YEAR: Mapping[str, int] = {"daily": 252, "weekly": 52, "monthly": 12, "quarterly": 4, "annual": 1}
COVARIANCE_METHODS = ("sample", "shrinkage")
# A simple return above this in one period (1,000 %) is a unit mistake, not a market move.
MAX_PERIOD_RETURN = 10.0
# Smallest eigenvalue of a repaired correlation matrix: positive definite with a condition number
# of at most N / 1e-8, well inside the bound the service publishes under (1e12 by default).
REPAIR_EIGENVALUE_FLOOR = 1e-8


def sample_covariance(x: FloatArray) -> FloatArray:
    """Unbiased sample covariance of the rows of ``x`` (T x N, T >= 2)."""
    centred = x - x.mean(axis=0)
    out: FloatArray = centred.T @ centred / (x.shape[0] - 1)
    return out


def ledoit_wolf(x: FloatArray) -> tuple[FloatArray, float]:
    """Ledoit-Wolf (2004) shrinkage of the maximum-likelihood covariance of the rows of ``x``
    toward the average variance times the identity: (covariance, intensity in [0, 1])."""
    t, n = x.shape
    centred = x - x.mean(axis=0)
    s = centred.T @ centred / t
    m = float(np.trace(s)) / n
    target_gap = s.copy()
    target_gap[np.diag_indices(n)] -= m
    d2 = float(np.sum(target_gap * target_gap)) / n
    # sum_t ||x_t x_t' - S||^2 = sum_t ||x_t||^4 - T ||S||^2, since sum_t x_t x_t' = T S.
    row_norms = np.einsum("ij,ij->i", centred, centred)
    b2_bar = (float(np.sum(row_norms**2)) - t * float(np.sum(s * s))) / (t * t * n)
    b2 = min(max(b2_bar, 0.0), d2)
    intensity = 0.0 if d2 == 0.0 else b2 / d2
    shrunk: FloatArray = (1.0 - intensity) * s
    shrunk[np.diag_indices(n)] += intensity * m
    return shrunk, intensity


@dataclass(frozen=True, eq=False)
class HistoryEstimate:
    """Annualised assumptions estimated from a return history, and how they were made."""

    codes: tuple[str, ...]
    expected_returns: FloatArray   # annual; historical means or as given
    volatilities: FloatArray       # annual
    correlation: FloatArray
    covariance: FloatArray         # annual
    observations: int
    periods_per_year: int
    covariance_method: str
    shrinkage_intensity: float | None
    condition_number: float        # of the annual covariance
    repaired: bool
    repair_distance: float | None  # Frobenius distance the correlation moved, when repaired


def history_matrix(series: Mapping[str, Sequence[float | None]]) -> tuple[tuple[str, ...], FloatArray]:
    """(codes, T x N returns) from one series per asset code; None becomes NaN (missing, which
    ``estimate_from_history`` refuses with the row named). Ragged series are refused."""
    codes = tuple(series)
    if not codes:
        raise InputError("returns", "at least one asset series is needed")
    first = codes[0]
    length = len(series[first])
    for code in codes[1:]:
        if len(series[code]) != length:
            raise InputError(f"returns.{code}", f"has {len(series[code])} observations but {first} has {length}: "
                             "every series covers the same periods")
    matrix = np.array([[math.nan if v is None else v for v in series[c]] for c in codes], dtype=np.float64).T
    return codes, matrix.reshape(length, len(codes))


def periods_per_year(frequency: str) -> int:
    try:
        return PERIODS_PER_YEAR[frequency]
    except (KeyError, TypeError):
        raise InputError("frequency", f"unknown frequency {frequency!r}; one of {', '.join(PERIODS_PER_YEAR)}") from None


def _label(i: int, row_labels: Sequence[str] | None) -> str:
    return f"observation {i}" + (f" ({row_labels[i]})" if row_labels is not None else "")


def _history(codes: tuple[str, ...], returns: FloatArray, row_labels: Sequence[str] | None) -> FloatArray:
    t, n = returns.shape
    if t < n + 1:
        raise InputError("returns", f"{n} assets need at least {n + 1} observations for a covariance estimate; got {t}")
    if row_labels is not None and len(row_labels) != t:
        raise InputError("dates", f"{len(row_labels)} dates for {t} observations; give one date per observation")
    for j, code in enumerate(codes):
        column = returns[:, j]
        missing = np.flatnonzero(~np.isfinite(column))
        if missing.size:
            i = int(missing[0])
            what = "missing value" if math.isnan(column[i]) else f"value {column[i]} is not finite"
            raise InputError(f"returns.{code}[{i}]", f"{what} at {_label(i, row_labels)}: every series must be "
                             "complete (nothing is dropped or filled in)")
        below = np.flatnonzero(column < -1.0)
        if below.size:
            i = int(below[0])
            raise InputError(f"returns.{code}[{i}]", f"{column[i]:g} at {_label(i, row_labels)} is a loss of more than "
                             "100 %: are these in percent? Returns are simple returns as decimals (-0.05 = -5 %)")
        above = np.flatnonzero(column > MAX_PERIOD_RETURN)
        if above.size:
            i = int(above[0])
            raise InputError(f"returns.{code}[{i}]", f"{column[i]:g} at {_label(i, row_labels)} is a gain of more than "
                             f"{MAX_PERIOD_RETURN:.0%} in one period: are these in percent? Returns are simple returns "
                             "as decimals (0.05 = 5 %)")
        if float(np.ptp(column)) == 0.0:
            raise InputError(f"returns.{code}", f"the series is constant ({column[0]:g} every period): it has no "
                             "variance to estimate")
    return returns


def _refusal(corr: FloatArray, codes: tuple[str, ...], smallest: float, condition: float) -> InputError:
    # The eigenvector of the smallest eigenvalue shows which series move as one.
    vector = np.linalg.eigh(corr)[1][:, 0]
    top = [codes[int(i)] for i in np.argsort(-np.abs(vector))[:2]]
    shown = "infinite" if math.isinf(condition) else f"{condition:.3g}"
    return InputError("returns", f"the estimated correlation is not positive definite (smallest eigenvalue "
                      f"{smallest:.3g}, condition number {shown}): series such as {top[0]} and {top[1]} move "
                      "together; send repair: true to take the nearest correlation matrix")


def estimate_from_history(
    codes: Sequence[str],
    returns: npt.ArrayLike,
    *,
    frequency: str,
    covariance_method: str = "sample",
    expected_returns: Sequence[float] | None = None,
    repair: bool = False,
    max_condition_number: float = 1e12,
    row_labels: Sequence[str] | None = None,
) -> HistoryEstimate:
    """Annual expected returns, volatilities and correlation from ``returns`` (T x N simple
    returns per period, NaN where a value is missing: refused). ``expected_returns`` given
    (annual) replaces the historical means; ``row_labels`` (dates) name rows in refusals."""
    code_tuple = tuple(codes)
    if not code_tuple:
        raise InputError("returns", "at least one asset series is needed")
    ppy = periods_per_year(frequency)
    if covariance_method not in COVARIANCE_METHODS:
        raise InputError("covariance_method", f"unknown method {covariance_method!r}; one of {', '.join(COVARIANCE_METHODS)}")
    x = np.array(returns, dtype=np.float64)
    if x.ndim != 2 or x.shape[1] != len(code_tuple):
        raise InputError("returns", f"expected one column per asset ({len(code_tuple)}), got shape {x.shape}")
    x = _history(code_tuple, x, row_labels)
    t, n = x.shape

    if covariance_method == "sample":
        per_period, intensity = sample_covariance(x), None
    else:
        per_period, shrink = ledoit_wolf(x)
        intensity = float(shrink)
    covariance = per_period * ppy
    vols = np.sqrt(np.diag(covariance))
    corr = covariance / np.outer(vols, vols)
    corr = 0.5 * (corr + corr.T)
    np.fill_diagonal(corr, 1.0)

    eig = np.linalg.eigvalsh(corr)
    smallest, largest = float(eig[0]), float(eig[-1])
    condition = largest / smallest if smallest > 0.0 else math.inf
    repaired, distance = False, None
    if not condition <= max_condition_number:
        if not repair:
            raise _refusal(corr, code_tuple, smallest, condition)
        near = nearest_correlation(corr, eigenvalue_floor=REPAIR_EIGENVALUE_FLOOR)
        corr = np.array(near.matrix)
        np.fill_diagonal(corr, 1.0)
        repaired, distance = True, near.distance
        covariance = corr * np.outer(vols, vols)

    if expected_returns is None:
        mu = x.mean(axis=0) * ppy
    else:
        mu = np.array(expected_returns, dtype=np.float64)
        if mu.shape != (n,) or not np.isfinite(mu).all():
            raise InputError("expected_returns", f"one finite annual expected return per asset ({n}) is needed")
    cov_eig = np.linalg.eigvalsh(covariance)
    cov_condition = float(cov_eig[-1] / cov_eig[0]) if cov_eig[0] > 0 else math.inf

    def frozen(a: FloatArray) -> FloatArray:
        out = np.array(a, dtype=np.float64, copy=True)
        out.setflags(write=False)
        return out

    return HistoryEstimate(
        codes=code_tuple, expected_returns=frozen(mu), volatilities=frozen(vols), correlation=frozen(corr),
        covariance=frozen(covariance), observations=t, periods_per_year=ppy, covariance_method=covariance_method,
        shrinkage_intensity=intensity, condition_number=cov_condition, repaired=repaired, repair_distance=distance,
    )
