"""The nearest correlation matrix in the Frobenius norm (Higham 2002).

N. J. Higham, "Computing the nearest correlation matrix - a problem from finance", IMA Journal of
Numerical Analysis 22 (2002) 329-343, Algorithm 3.3 with W = I: alternating projections onto
the positive semi-definite matrices S and the unit-diagonal matrices U, with Dykstra's correction
on the S step (U is affine and needs none). Projecting onto {X : X - floor I is positive
semi-definite} instead of S, as the paper suggests for a positive definite answer, keeps every
eigenvalue at least ``eigenvalue_floor``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

__all__ = ["NearestCorrelation", "nearest_correlation"]

FloatArray = npt.NDArray[np.float64]


@dataclass(frozen=True, eq=False)
class NearestCorrelation:
    matrix: FloatArray       # symmetric, unit diagonal, eigenvalues >= the floor (to rounding)
    distance: float          # Frobenius norm of matrix - the input
    iterations: int


def _psd_part(a: FloatArray, floor: float) -> FloatArray:
    values, vectors = np.linalg.eigh(a)
    out: FloatArray = (vectors * np.maximum(values, floor)) @ vectors.T
    return 0.5 * (out + out.T)


def nearest_correlation(
    a: FloatArray, *, eigenvalue_floor: float = 0.0, tol: float = 1e-12, max_iterations: int = 10_000
) -> NearestCorrelation:
    """The correlation matrix nearest to the symmetric matrix ``a``.

    Raises ValueError for a non-square or non-finite ``a`` and RuntimeError if the iteration
    does not settle within ``max_iterations`` (it converges for every symmetric input; the
    limit only guards against a pathological tolerance).
    """
    a = np.asarray(a, dtype=np.float64)
    if a.ndim != 2 or a.shape[0] != a.shape[1]:
        raise ValueError(f"a correlation matrix is square, got shape {a.shape}")
    if not np.isfinite(a).all():
        raise ValueError("the matrix has entries that are not finite")
    sym = 0.5 * (a + a.T)
    y = sym.copy()
    correction = np.zeros_like(sym)
    x = y
    for k in range(1, max_iterations + 1):
        r = y - correction
        x_new = _psd_part(r, eigenvalue_floor)
        correction = x_new - r
        y_new = x_new.copy()
        np.fill_diagonal(y_new, 1.0)
        scale = max(float(np.linalg.norm(y_new)), 1.0)
        settled = (
            float(np.linalg.norm(x_new - x)) <= tol * scale
            and float(np.linalg.norm(y_new - y)) <= tol * scale
            and float(np.linalg.norm(y_new - x_new)) <= tol * scale
        )
        x, y = x_new, y_new
        if settled:
            out = 0.5 * (y + y.T)
            out.setflags(write=False)
            return NearestCorrelation(matrix=out, distance=float(np.linalg.norm(out - sym)), iterations=k)
    raise RuntimeError(f"nearest correlation did not settle in {max_iterations} iterations")
