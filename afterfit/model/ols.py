"""Least squares on arrays: the numerical kernel under every fit.

INITIAL VERSION (contract placeholder): column-scaled pivoted Householder QR from scipy.
The kernel task replaces the internals (extended precision, tall fast path) keeping this interface.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np
import scipy.linalg as sla

__all__ = ["LeastSquares", "fit_ols"]


@dataclass(frozen=True, eq=False)
class LeastSquares:
    """A least-squares fit on arrays.

    ``params`` has one entry per design column, NaN for aliased ones; ``R`` is the upper triangle
    of the QR factor of ``sqrt(w) * X[:, kept]`` (columns in ``kept`` order, not scaled), so that
    ``X_k' W X_k = R' R``.
    """

    X: np.ndarray
    y: np.ndarray
    weights: np.ndarray | None
    names: tuple
    kept: np.ndarray
    aliased: tuple
    params: np.ndarray
    R: np.ndarray
    fitted: np.ndarray
    resid: np.ndarray
    rank: int
    nobs: int
    df_resid: int
    ssr: float
    cond: float
    method: str

    @property
    def sigma2(self) -> float:
        return self.ssr / self.df_resid if self.df_resid > 0 else float("nan")

    @cached_property
    def sqrt_w(self) -> np.ndarray | None:
        return None if self.weights is None else np.sqrt(self.weights)

    @cached_property
    def wresid(self) -> np.ndarray:
        return self.resid if self.weights is None else self.resid * self.sqrt_w

    @cached_property
    def Rinv(self) -> np.ndarray:
        return sla.solve_triangular(self.R, np.eye(self.rank))

    @cached_property
    def xtx_inv(self) -> np.ndarray:
        Ri = self.Rinv
        return Ri @ Ri.T

    def leverage(self) -> np.ndarray:
        """Diagonal of the hat matrix of the weighted design, without forming Q whole."""
        Ri = self.Rinv
        out = np.empty(self.nobs)
        step = 65536
        for s in range(0, self.nobs, step):
            Xs = self.X[s:s + step][:, self.kept]
            if self.weights is not None:
                Xs = Xs * self.sqrt_w[s:s + step, None]
            out[s:s + step] = np.einsum("ij,ij->i", Xs @ Ri, Xs @ Ri)
        return out

    def cov_params(self, cov_type: str = "nonrobust") -> np.ndarray:
        """Covariance of the kept parameters: nonrobust or HC0-HC3."""
        V = self.xtx_inv
        if cov_type == "nonrobust":
            return self.sigma2 * V
        Xk = self.X[:, self.kept]
        if self.weights is not None:
            Xk = Xk * self.sqrt_w[:, None]
        e = self.wresid
        if cov_type == "HC0":
            u = e**2
        elif cov_type == "HC1":
            u = e**2 * self.nobs / self.df_resid
        elif cov_type in ("HC2", "HC3"):
            h = self.leverage()
            u = e**2 / (1 - h) if cov_type == "HC2" else e**2 / (1 - h) ** 2
        else:
            raise ValueError(f"cov_type must be 'nonrobust' or 'HC0'..'HC3', got {cov_type!r}")
        meat = (Xk * u[:, None]).T @ Xk
        return V @ meat @ V

    def bse(self, cov_type: str = "nonrobust") -> np.ndarray:
        out = np.full(len(self.names), np.nan)
        out[self.kept] = np.sqrt(np.diag(self.cov_params(cov_type)))
        return out


def fit_ols(X, y, *, weights=None, names=None) -> LeastSquares:
    """Fit y on X by column-scaled, pivoted QR; aliased columns are reported, not an error."""
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float)
    n, p = X.shape
    if names is None:
        names = tuple(f"x{i}" for i in range(p))
    if n < p:
        raise ValueError(f"{n} rows cannot estimate {p} parameters: need at least as many rows")
    sw = None
    if weights is not None:
        weights = np.asarray(weights, dtype=float)
        sw = np.sqrt(weights)
    Xw = X if sw is None else X * sw[:, None]
    yw = y if sw is None else y * sw
    scale = np.sqrt((Xw**2).sum(axis=0))
    scale[scale == 0] = 1.0
    Q, R, piv = sla.qr(Xw / scale, mode="economic", pivoting=True)
    d = np.abs(np.diag(R))
    tol = d[0] * max(n, p) * np.finfo(float).eps if p else 0.0
    r = int((d > tol).sum())
    kept = np.sort(piv[:r])
    Xk = Xw[:, kept]
    sk = scale[kept]
    Q2, R2 = np.linalg.qr(Xk / sk)
    b = sla.solve_triangular(R2, Q2.T @ yw) / sk
    params = np.full(p, np.nan)
    params[kept] = b
    fitted = X[:, kept] @ b
    resid = y - fitted
    wres = resid if sw is None else resid * sw
    sv = np.linalg.svd(R2, compute_uv=False)
    return LeastSquares(
        X=X, y=y, weights=weights, names=tuple(names), kept=kept,
        aliased=tuple(names[i] for i in range(p) if i not in set(kept.tolist())),
        params=params, R=R2 * sk[None, :], fitted=fitted, resid=resid, rank=r, nobs=n,
        df_resid=n - r, ssr=float(wres @ wres), cond=float(sv[0] / sv[-1]) if r else np.inf,
        method="householder",
    )
