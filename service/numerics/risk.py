"""The covariance of a mix as an operator: a dense matrix, or a factor model B F B' + diag(d^2).

The solvers ask it for three things only: products S x, the rows S[j] they need to update
S c when an asset reaches a bound, and solves with the free block S_FF. A factor model
answers all three without the n x n matrix: F = Q L Q' (k x k, eigenvalues clipped at 0)
gives the root G = B Q L^1/2 with B F B' = G G', so S x = G (G' x) + d^2 x costs O(n k),
and S_FF y = r is solved by the Woodbury identity through the k x k capacitance matrix
I + G_F' D_F^-1 G_F in O(f k^2). The dense matrix of a factor model is formed only when
something asks for it (the numerical cross-checks, tests).
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy.linalg.lapack import dpotrf as _potrf
from scipy.linalg.lapack import dpotrs as _potrs

__all__ = ["DenseRisk", "FactorModel", "FactorRisk", "FreeBlock", "Risk", "as_risk"]

FloatArray = npt.NDArray[np.float64]
IndexArray = npt.NDArray[np.intp]


def _frozen(a: FloatArray) -> FloatArray:
    out = np.array(a, dtype=np.float64, copy=True)
    out.setflags(write=False)
    return out


@dataclass(frozen=True, eq=False)
class FactorModel:
    """Covariance B F B' + diag(specific_volatility^2), as published (validated arrays)."""

    loadings: FloatArray             # (n, k) B
    factor_covariance: FloatArray    # (k, k) F, symmetric positive semi-definite
    specific_volatility: FloatArray  # (n,) d > 0

    @property
    def k(self) -> int:
        return int(self.loadings.shape[1])


class FreeBlock(ABC):
    """Solves with one free block S_FF and spreads free vectors back over every asset."""

    @abstractmethod
    def solve(self, rhs: FloatArray) -> FloatArray:
        """S_FF^-1 rhs for rhs of shape (f,) or (f, m)."""
        raise NotImplementedError

    @abstractmethod
    def spread(self, x: FloatArray) -> FloatArray:
        """S[:, F] x for x of shape (f,): an (n,) vector."""
        raise NotImplementedError


class Risk(ABC):
    """What every solver needs of a covariance; see DenseRisk and FactorRisk."""

    n: int
    diagonal: FloatArray
    factor_model: FactorModel | None = None

    @abstractmethod
    def dense(self) -> FloatArray:
        raise NotImplementedError

    @abstractmethod
    def times(self, x: FloatArray) -> FloatArray:
        """S x for x of shape (n,), or x S for rows x of shape (m, n) (S is symmetric)."""
        raise NotImplementedError

    @abstractmethod
    def columns_times(self, idx: IndexArray, x: FloatArray) -> FloatArray:
        """S[:, idx] x for x of shape (len(idx),)."""
        raise NotImplementedError

    @abstractmethod
    def row(self, j: int) -> FloatArray:
        """S[j] (a fresh array)."""
        raise NotImplementedError

    @abstractmethod
    def block(self, idx: IndexArray) -> FreeBlock | None:
        """A solver for S[idx][:, idx]; None when the block is numerically singular."""
        raise NotImplementedError

    def variance(self, w: FloatArray) -> float:
        return float(w @ self.times(w))


def _cho_solve(chol: FloatArray, rhs: FloatArray) -> FloatArray:
    """Solve with a lower Cholesky factor from LAPACK potrf; rhs (m,) or (m, p)."""
    out, info = _potrs(chol, rhs if rhs.ndim == 2 else rhs[:, None], lower=1)
    if info != 0:
        raise RuntimeError(f"LAPACK potrs failed (info {info})")
    result: FloatArray = out if rhs.ndim == 2 else out[:, 0]
    return result


class _DenseBlock(FreeBlock):
    def __init__(self, rows: FloatArray, chol: FloatArray) -> None:
        self.rows = rows
        self.chol = chol

    def solve(self, rhs: FloatArray) -> FloatArray:
        return _cho_solve(self.chol, rhs)

    def spread(self, x: FloatArray) -> FloatArray:
        out: FloatArray = x @ self.rows
        return out


class DenseRisk(Risk):
    def __init__(self, covariance: FloatArray) -> None:
        self.matrix = np.ascontiguousarray(covariance)
        self.n = int(covariance.shape[0])
        self.diagonal = _frozen(np.diag(covariance))

    def dense(self) -> FloatArray:
        return self.matrix

    def times(self, x: FloatArray) -> FloatArray:
        out: FloatArray = x @ self.matrix
        return out

    def columns_times(self, idx: IndexArray, x: FloatArray) -> FloatArray:
        if idx.size == 0:
            return np.zeros(self.n)
        out: FloatArray = x @ self.matrix.take(idx, axis=0)
        return out

    def row(self, j: int) -> FloatArray:
        return np.array(self.matrix[j], copy=True)

    def block(self, idx: IndexArray) -> FreeBlock | None:
        rows = self.matrix.take(idx, axis=0)
        # The free block is symmetric: its C-ordered copy read as Fortran is the same matrix.
        chol, info = _potrf(rows[:, idx].T, lower=1, clean=0, overwrite_a=1)
        if info != 0:
            return None
        return _DenseBlock(rows, chol)


class _WoodburyBlock(FreeBlock):
    """S_FF = D_F + G_F G_F': S_FF^-1 r = D^-1 r - D^-1 G_F C^-1 G_F' D^-1 r, C = I + G_F' D^-1 G_F.

    One step of iterative refinement follows every solve (O(f k) more): the identity
    subtracts two nearly equal terms when the specific variances are small."""

    def __init__(self, risk: FactorRisk, idx: IndexArray, g_f: FloatArray, d2_f: FloatArray,
                 chol: FloatArray) -> None:
        self.risk = risk
        self.idx = idx
        self.g_f = g_f
        self.d2_f = d2_f
        self.chol = chol

    def _once(self, rhs: FloatArray) -> FloatArray:
        scaled = rhs / (self.d2_f if rhs.ndim == 1 else self.d2_f[:, None])
        inner = _cho_solve(self.chol, self.g_f.T @ scaled)
        back = self.g_f @ inner
        out: FloatArray = scaled - (back / (self.d2_f if rhs.ndim == 1 else self.d2_f[:, None]))
        return out

    def _apply(self, x: FloatArray) -> FloatArray:
        d2 = self.d2_f if x.ndim == 1 else self.d2_f[:, None]
        out: FloatArray = self.g_f @ (self.g_f.T @ x) + d2 * x
        return out

    def solve(self, rhs: FloatArray) -> FloatArray:
        x = self._once(rhs)
        return x + self._once(rhs - self._apply(x))

    def spread(self, x: FloatArray) -> FloatArray:
        out: FloatArray = self.risk.g @ (self.g_f.T @ x)
        out[self.idx] += self.d2_f * x
        return out


class FactorRisk(Risk):
    def __init__(self, model: FactorModel) -> None:
        self.factor_model = model
        b, f, d = model.loadings, model.factor_covariance, model.specific_volatility
        self.n = int(b.shape[0])
        values, vectors = np.linalg.eigh(0.5 * (f + f.T))
        keep = values > 0.0
        # F = 0 (no factor risk at all) keeps one zero column, so every shape stays k >= 1.
        root = vectors[:, keep] * np.sqrt(values[keep]) if keep.any() else np.zeros((f.shape[0], 1))
        self.g: FloatArray = np.ascontiguousarray(b @ root)   # (n, r), B F B' = G G'
        self.d2: FloatArray = _frozen(d * d)
        self.diagonal = _frozen(np.einsum("ij,ij->i", self.g, self.g) + self.d2)
        self._dense: FloatArray | None = None

    def __getstate__(self) -> dict[str, object]:
        # The dense matrix is a cache (32 MB at n = 2,000): never shipped to another process.
        return {**self.__dict__, "_dense": None}

    @property
    def rank(self) -> int:
        return int(self.g.shape[1])

    def dense(self) -> FloatArray:
        if self._dense is None:
            full = self.g @ self.g.T
            full[np.diag_indices(self.n)] += self.d2
            full.setflags(write=False)
            self._dense = full
        return self._dense

    def times(self, x: FloatArray) -> FloatArray:
        out: FloatArray = (x @ self.g) @ self.g.T + x * self.d2
        return out

    def columns_times(self, idx: IndexArray, x: FloatArray) -> FloatArray:
        out: FloatArray = self.g @ (x @ self.g.take(idx, axis=0))
        out[idx] += self.d2[idx] * x
        return out

    def row(self, j: int) -> FloatArray:
        out: FloatArray = self.g @ self.g[j]
        out[j] += self.d2[j]
        return out

    def block(self, idx: IndexArray) -> FreeBlock | None:
        g_f = self.g.take(idx, axis=0)
        d2_f = self.d2.take(idx)
        capacitance = g_f.T @ (g_f / d2_f[:, None])
        capacitance[np.diag_indices(self.rank)] += 1.0
        chol, info = _potrf(capacitance, lower=1, clean=0, overwrite_a=1)
        if info != 0:
            return None
        return _WoodburyBlock(self, idx, g_f, d2_f, chol)


def as_risk(covariance: FloatArray | Risk) -> Risk:
    """A Risk for a dense matrix (or the Risk itself)."""
    if isinstance(covariance, Risk):
        return covariance
    return DenseRisk(np.asarray(covariance, dtype=np.float64))

