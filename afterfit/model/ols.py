"""Least squares on arrays: the numerical kernel under every fit.

How a fit is computed
---------------------
1. Validation: ``X`` 2-D and finite, ``y`` finite, ``weights`` finite and >= 0, at least as many
   (positively weighted) rows as columns, unique names.  Bad input raises ``ValueError`` saying
   what to do.
2. Scaling: every whitened column ``sqrt(w) * X[:, j]`` and the whitened response are divided by a
   power of two close to their norm.  Powers of two are exact in binary floating point, so the
   scaling changes no digit of the data; it only makes rank decisions and condition numbers
   independent of units and keeps magnitudes near 1e±150 clear of overflow and underflow.
3. Factorisation, one of three paths (``LeastSquares.method`` says which one ran):

   ``"householder"``
       Householder QR in double precision, streamed over row blocks (TSQR: each block is stacked
       under the running triangle and re-factored with LAPACK), so memory stays bounded.  The
       rank is then read from the small triangle (see :func:`_rank_and_reorder`).
   ``"cholqr2"``
       The fast path for tall designs: Cholesky QR applied twice to the Gram matrix, accumulated
       in row blocks.  Used when ``n >= TALL_ROWS``; falls back to ``"householder"`` when the
       Cholesky factor's condition estimate exceeds ``COND_CHOLQR`` (where CholeskyQR2 loses
       accuracy) or the Gram matrix is not numerically positive definite.
   ``"extended"``
       Householder QR carried in ``numpy.longdouble`` (80-bit extended precision on x86-64,
       about 19 significant digits), streamed the same way.  Chosen automatically when the
       scaled design is ill-conditioned (condition number above ``COND_EXTENDED``) or when a
       first-order error estimate says a coefficient may carry fewer than about 10 correct
       digits (see :func:`_needs_extended`).  If the caller can supply the design evaluated in
       extended precision (``X_ext``; e.g. polynomial columns ``x**k`` computed in longdouble),
       the extended path uses it, which removes the rounding of the columns themselves.  When
       the estimate blames large residuals (cond^2 * ||r||), one to three steps of iterative
       refinement follow, with ``X' r`` accumulated in compensated (about double-longdouble)
       arithmetic.  On platforms where ``longdouble`` is plain double the path still runs and
       is then only as accurate as ``"householder"``.

Memory: every path works on row blocks, so besides ``X`` itself a fit allocates a few vectors of
length n (``fitted``, ``resid``) and block-sized scratch.  ``X`` is kept by reference (no copy):
do not modify it while the fit is in use (``leverage()`` and the HC covariances read it lazily).

Rank deficiency is never an error: a column that is (to rounding) a linear combination of the
kept columns before it is reported in ``aliased`` and gets a NaN coefficient; the later of two
collinear columns is the one dropped, as in R's ``lm``.

Zero weights
------------
Rows with weight 0 take no part in the estimate (their whitened rows are zero).  As in R's ``lm``
they are not counted in ``nobs`` or ``df_resid``; they still get a fitted value and a residual
(a prediction), and leverage 0.  Arrays (``fitted``, ``resid``, ``leverage()``) always have one
entry per row of ``X``.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np
import scipy.linalg as sla

__all__ = [
    "LeastSquares",
    "fit_ols",
    "COND_EXTENDED",
    "COND_CHOLQR",
    "TALL_ROWS",
    "LEVERAGE_ONE_TOL",
]

_EPS = float(np.finfo(float).eps)
_LD = np.longdouble
_EPS_LD = float(np.finfo(_LD).eps)

#: Scaled-design condition number above which the extended-precision path is used.
COND_EXTENDED = 1e7
#: Condition estimate of the first Cholesky factor above which CholeskyQR2 is not trusted.
COND_CHOLQR = 1e5
#: Rows from which ``method="auto"`` tries the CholeskyQR2 fast path.
TALL_ROWS = 20_000
#: A coefficient whose estimated relative error exceeds this sends the fit to extended precision.
REL_ERR_EXTENDED = 1e-10
#: Extended precision costs ~n*r^2 longdouble operations (about 0.1 s per 10^6 here, and the
#: Study fits twice); below this budget it is used on a weak signal (the error estimate, which a
#: coefficient near zero always raises), above it only when the condition number demands it.
#: The NIST StRD problems (n*r^2 <= 10^4) and the demos stay well below it; a refit of 10^4 rows
#: and 16 columns no longer pays a quarter of a second for digits of a coefficient near zero.
EXTENDED_BUDGET = 500_000
#: ``1 - leverage`` at or below this counts as leverage one (the row is fitted exactly whatever
#: its response; residual-based measures are undefined there).
LEVERAGE_ONE_TOL = 1e-10

_SPLITTER = _LD(2) ** ((np.finfo(_LD).nmant + 2) // 2) + 1  # Dekker's constant 2^ceil(t/2) + 1
_CHUNK = 65_536  # rows per block in double-precision passes (~6 MB at p = 12)
_CHUNK_LD = 4_096  # rows per block in longdouble passes (numpy loops, no BLAS)
_METHODS = ("auto", "householder", "cholqr2", "extended")
_COV_TYPES = ("nonrobust", "HC0", "HC1", "HC2", "HC3")


@dataclass(frozen=True, eq=False)
class LeastSquares:
    """A least-squares fit on arrays.

    ``params`` has one entry per design column, NaN for aliased ones; ``R`` is the upper triangle
    of the QR factor of ``sqrt(w) * X[:, kept]`` (columns in ``kept`` order, not scaled, positive
    diagonal), so that ``X_k' W X_k = R' R``.

    Attributes
    ----------
    X, y, weights : ndarray
        The data as fitted (float64; ``weights`` is None for ordinary least squares).
    names : tuple of str
        One name per column of ``X``.
    kept : ndarray of int
        Indices of the estimable columns, ascending.
    aliased : tuple of str
        Names of columns dropped for rank deficiency.
    params : ndarray (p,)
        Coefficients; NaN at aliased columns.
    R : ndarray (rank, rank)
        Upper-triangular factor, unscaled, in ``kept`` order.
    fitted, resid : ndarray (n,)
        ``X[:, kept] @ params[kept]`` and ``y - fitted`` (unweighted).
    rank, nobs, df_resid : int
        ``nobs`` counts rows with positive weight; ``df_resid = nobs - rank``.
    ssr : float
        Weighted residual sum of squares.
    cond : float
        2-norm condition number of the whitened design ``X[:, kept]`` with columns scaled to unit
        length (so it measures collinearity, not units; statsmodels' ``condition_number`` is of
        the unscaled design and can be far larger).  NaN when no column is kept.
    method : str
        ``"householder"``, ``"cholqr2"`` or ``"extended"``.
    col_scale : ndarray (p,)
        The power-of-two column scales used internally (``R / col_scale[kept]`` is the scaled
        factor).
    y_scale : float
        The power-of-two scale of the whitened response.
    X_ext : ndarray or None
        Extended-precision design used by the ``"extended"`` path, when one was supplied.
    R_ext : ndarray or None
        The scaled factor in longdouble when ``method == "extended"``.
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
    col_scale: np.ndarray | None = None
    y_scale: float = 1.0
    X_ext: np.ndarray | None = None
    R_ext: np.ndarray | None = None

    # -- scalars ---------------------------------------------------------------------------
    @property
    def sigma2(self) -> float:
        """Residual variance ``ssr / df_resid`` (NaN when ``df_resid == 0``)."""
        return self.ssr / self.df_resid if self.df_resid > 0 else float("nan")

    @cached_property
    def exact_fit(self) -> bool:
        """True when the residuals are indistinguishable from rounding (an exact fit).

        The test is ``||sqrt(w) * resid|| <= 1000 * eps * sqrt(nobs) * ||sqrt(w) * y||``: below
        that the residuals carry no information and residual-based diagnostics are undefined.
        """
        ys = self.wy / self.y_scale
        rs = self.wresid / self.y_scale
        bound = 1e3 * _EPS * np.sqrt(max(self.nobs, 1)) * float(np.sqrt(ys @ ys))
        return bool(float(np.sqrt(rs @ rs)) <= bound)

    # -- whitened data -----------------------------------------------------------------------
    @cached_property
    def sqrt_w(self) -> np.ndarray | None:
        """``sqrt(weights)``, or None without weights."""
        return None if self.weights is None else np.sqrt(self.weights)

    @cached_property
    def wresid(self) -> np.ndarray:
        """Whitened residuals ``sqrt(w) * resid``."""
        return self.resid if self.weights is None else self.resid * self.sqrt_w

    @cached_property
    def wy(self) -> np.ndarray:
        """Whitened response ``sqrt(w) * y``."""
        return self.y if self.weights is None else self.y * self.sqrt_w

    # -- factor-derived matrices ---------------------------------------------------------------
    @cached_property
    def _scale_k(self) -> np.ndarray:
        if self.col_scale is None:
            return np.ones(self.rank)
        return self.col_scale[self.kept]

    @cached_property
    def _Rs_inv(self) -> np.ndarray:
        """Inverse of the scaled factor (well-scaled numbers whatever the data's magnitude)."""
        Rs = self.R / self._scale_k[None, :]
        return sla.solve_triangular(Rs, np.eye(self.rank))

    @cached_property
    def Rinv(self) -> np.ndarray:
        """Inverse of ``R`` (upper triangular, kept order)."""
        return self._Rs_inv / self._scale_k[:, None]

    @cached_property
    def xtx_inv(self) -> np.ndarray:
        """``(X_k' W X_k)^{-1}`` from ``R`` (kept order)."""
        Ri = self._Rs_inv
        return (Ri @ Ri.T) / np.outer(self._scale_k, self._scale_k)

    def _whitened_block(self, s: int, e: int, kept_only: bool = True) -> np.ndarray:
        """Rows s:e of ``sqrt(w) * X`` (kept columns), float64; a view when nothing changes."""
        Xc = self.X[s:e]
        if kept_only and self.rank < self.X.shape[1]:
            Xc = Xc[:, self.kept]
        if self.weights is not None:
            Xc = Xc * self.sqrt_w[s:e, None]
        return Xc

    def _hat_blocks(self):
        """Yield ``(s, e, B)`` with ``B = (sqrt(w) X_k)[s:e] @ R^{-1}`` (rows of Q)."""
        n = self.X.shape[0]
        Ri = self.Rinv  # power-of-two rescaled inverse: entries x_ij * Ri_jk stay O(1)
        for s in range(0, n, _CHUNK):
            e = min(s + _CHUNK, n)
            yield s, e, self._whitened_block(s, e) @ Ri

    def leverage(self) -> np.ndarray:
        """Diagonal of the hat matrix of the whitened design, computed in row blocks.

        ``h_i = ||R^{-T} x_i||^2`` for the whitened row ``x_i``; Q is never formed.  Rows with
        weight 0 get 0.  For ``method == "extended"`` the computation is carried in longdouble.
        """
        return self._leverage.copy()

    @cached_property
    def _leverage(self) -> np.ndarray:
        n = self.X.shape[0]
        out = np.zeros(n)
        if self.rank == 0:
            return out
        if self.method == "extended" and self.R_ext is not None:
            sk = self._scale_k.astype(_LD)
            Ri = _tri_inv_ld(self.R_ext) / sk[:, None]
            src = self.X_ext if self.X_ext is not None else self.X
            for s in range(0, n, _CHUNK_LD):
                e = min(s + _CHUNK_LD, n)
                Xs = np.asarray(src[s:e][:, self.kept], dtype=_LD)
                if self.weights is not None:
                    Xs *= np.sqrt(np.asarray(self.weights[s:e], dtype=_LD))[:, None]
                B = Xs @ Ri
                out[s:e] = np.einsum("ij,ij->i", B, B).astype(float)
            return out
        for s, e, B in self._hat_blocks():
            out[s:e] = np.einsum("ij,ij->i", B, B)
        return out

    # -- covariance ------------------------------------------------------------------------
    def _cov_scaled(self, cov_type: str) -> np.ndarray:
        """Covariance of the scaled coefficients ``b_s = b * col_scale / y_scale``."""
        if cov_type not in _COV_TYPES:
            raise ValueError(
                f"cov_type must be one of {', '.join(_COV_TYPES)}; got {cov_type!r}"
            )
        r = self.rank
        if r == 0:
            return np.empty((0, 0))
        Ri = self._Rs_inv
        V = Ri @ Ri.T
        if cov_type == "nonrobust":
            if self.df_resid <= 0:
                return np.full((r, r), np.nan)
            es = self.wresid / self.y_scale
            return V * (float(es @ es) / self.df_resid)
        es = self.wresid / self.y_scale
        u = es * es
        if cov_type == "HC1":
            if self.df_resid <= 0:
                return np.full((r, r), np.nan)
            u = u * (self.nobs / self.df_resid)
        elif cov_type in ("HC2", "HC3"):
            h = self._leverage
            one_minus = 1.0 - h
            if np.any(one_minus <= LEVERAGE_ONE_TOL):
                # e_i^2 / (1 - h_i) is 0/0 at a leverage-one row: the estimator is undefined.
                return np.full((r, r), np.nan)
            u = u / one_minus if cov_type == "HC2" else u / one_minus**2
        # sandwich through B = X_w R^{-1}: V meat V = R^{-1} (B' diag(u) B) R^{-T}, all O(1) numbers
        core = np.zeros((r, r))
        for s_, e_, B in self._hat_blocks():
            core += (B * u[s_:e_, None]).T @ B
        Ri = self._Rs_inv
        return Ri @ core @ Ri.T

    def cov_params(self, cov_type: str = "nonrobust") -> np.ndarray:
        """Covariance of the kept parameters (kept order).

        Parameters
        ----------
        cov_type : {"nonrobust", "HC0", "HC1", "HC2", "HC3"}
            ``"nonrobust"`` is ``sigma2 * (X'WX)^{-1}``.  The HC estimators are White's sandwich
            and its small-sample variants on the whitened design and residuals (as statsmodels
            does for WLS): HC1 scales HC0 by ``nobs / df_resid``; HC2 and HC3 divide each squared
            residual by ``1 - h_i`` and ``(1 - h_i)^2``.  HC2/HC3 are NaN when a row has leverage
            one (0/0), and every type is NaN when it needs ``df_resid > 0`` and has none.
        """
        Cs = self._cov_scaled(cov_type)
        return Cs * self.y_scale**2 / np.outer(self._scale_k, self._scale_k)

    def bse(self, cov_type: str = "nonrobust") -> np.ndarray:
        """Standard errors, one per design column (NaN at aliased columns)."""
        out = np.full(len(self.names), np.nan)
        if self.rank:
            Cs = self._cov_scaled(cov_type)
            out[self.kept] = np.sqrt(np.diag(Cs)) * self.y_scale / self._scale_k
        return out


# --------------------------------------------------------------------------------------------
# validation
# --------------------------------------------------------------------------------------------
def _pow2(v) -> np.ndarray:
    """Powers of two ``s`` with ``v / s`` in [0.5, 1) (1 where ``v`` is 0 or not finite)."""
    v = np.asarray(v, dtype=float)
    ok = np.isfinite(v) & (v > 0)
    _, ex = np.frexp(np.where(ok, v, 1.0))
    return np.where(ok, np.ldexp(1.0, ex), 1.0)


def _as_float_array(a, what: str) -> np.ndarray:
    try:
        return np.asarray(a, dtype=float)
    except (TypeError, ValueError) as exc:
        raise ValueError(
            f"{what} must be numeric; convert the column(s) to numbers first ({exc})"
        ) from None


def _nonfinite_message(what: str, bad_rows: np.ndarray, cols: list | None) -> str:
    where = f" in column(s) {cols}" if cols else ""
    first = ", ".join(str(i) for i in bad_rows[:5])
    more = "" if len(bad_rows) <= 5 else ", ..."
    return (
        f"{what} has {len(bad_rows)} row(s) with NaN or infinite values{where} "
        f"(row positions {first}{more}); drop or impute those rows before fitting "
        "(Study drops rows with missing values itself)"
    )


def _validate(X, y, weights, names, X_ext):
    """Shapes, names, response and weights; X's values are checked by :func:`_colmax_checked`
    or, on the tall path, through the Gram matrix (one pass instead of two)."""
    X = _as_float_array(X, "X")
    if X.ndim != 2:
        raise ValueError(
            f"X must be a 2-D array (rows x columns), got {X.ndim}-D; "
            "use X.reshape(-1, 1) for a single column"
        )
    n, p = X.shape
    if p == 0:
        raise ValueError("X has no columns: a model needs at least one column (e.g. an intercept)")
    y = _as_float_array(y, "y")
    if y.ndim == 2 and y.shape[1] == 1:
        y = y[:, 0]
    if y.ndim != 1 or y.shape[0] != n:
        raise ValueError(f"y must be 1-D with one value per row of X ({n}), got shape {y.shape}")
    if names is None:
        names = tuple(f"x{i}" for i in range(p))
    else:
        names = tuple(str(nm) for nm in names)
        if len(names) != p:
            raise ValueError(f"names has {len(names)} entries but X has {p} columns")
        if len(set(names)) != p:
            dup = sorted({nm for nm in names if names.count(nm) > 1})
            raise ValueError(f"column names must be unique; repeated: {dup}")
    if not np.isfinite(y).all():
        raise ValueError(_nonfinite_message("y", np.nonzero(~np.isfinite(y))[0], None))

    n_pos = n
    if weights is not None:
        weights = _as_float_array(weights, "weights")
        if weights.ndim != 1 or weights.shape[0] != n:
            raise ValueError(
                f"weights must be 1-D with one value per row of X ({n}), got shape {weights.shape}"
            )
        if not np.isfinite(weights).all():
            raise ValueError(
                _nonfinite_message("weights", np.nonzero(~np.isfinite(weights))[0], None)
            )
        neg = np.nonzero(weights < 0)[0]
        if len(neg):
            raise ValueError(
                f"weights must be >= 0 (they are inverse variances); {len(neg)} negative "
                f"value(s), first at row position {neg[0]}: fix or drop those rows"
            )
        n_pos = int(np.count_nonzero(weights))
        if n_pos == 0:
            raise ValueError("all weights are zero: at least one row needs a positive weight")
    if n_pos < p:
        which = "rows" if weights is None else "rows with positive weight"
        raise ValueError(
            f"{n_pos} {which} cannot estimate {p} coefficients: need at least as many rows as "
            "columns; use fewer terms or more data"
        )

    if X_ext is not None:
        X_ext = np.asarray(X_ext)
        if X_ext.dtype != _LD:
            X_ext = X_ext.astype(_LD)
        if X_ext.shape != X.shape:
            raise ValueError(f"X_ext must have the shape of X {X.shape}, got {X_ext.shape}")
        if not np.isfinite(X_ext).all():
            raise ValueError("X_ext has NaN or infinite values; it must be the same design as X")
        # X_ext is the same design at higher precision: a larger difference is a caller's bug
        with np.errstate(invalid="ignore"):
            diff = np.abs((X_ext - X.astype(_LD)).astype(float))
        if np.any(~(diff <= 1e-12 * np.abs(X) + 1e-300)):
            raise ValueError(
                "X_ext differs from X by more than rounding: pass the same design evaluated in "
                "extended precision"
            )
    return X, y, weights, names, X_ext, n_pos


def _colmax_checked(X: np.ndarray, names: tuple) -> np.ndarray:
    """Largest magnitude per column, in row blocks; raises if X has NaN or inf."""
    n, p = X.shape
    colmax = np.zeros(p)
    for s in range(0, n, _CHUNK):
        blk = X[s:s + _CHUNK]
        if blk.size:
            m = np.maximum(blk.max(axis=0), -blk.min(axis=0))  # NaN propagates, inf stays inf
            if not np.isfinite(m).all():
                break
            np.maximum(colmax, m, out=colmax)
    else:
        return colmax
    fin = np.isfinite(X)
    rows = np.nonzero(~fin.all(axis=1))[0]
    cols = [names[j] for j in np.nonzero(~fin.all(axis=0))[0]]
    raise ValueError(_nonfinite_message("X", rows, cols))


# --------------------------------------------------------------------------------------------
# factorisations (on the scaled, whitened design; all return upper triangles)
# --------------------------------------------------------------------------------------------
def _blocks(X, y, sw, scale, dy, *, kept=None, dtype=float, chunk=_CHUNK):
    """Yield row blocks of the scaled whitened augmented matrix ``[X_s | y_s]`` (F order)."""
    n = X.shape[0]
    k = X.shape[1] if kept is None else len(kept)
    inv = 1 / np.asarray(scale, dtype=dtype)  # powers of two: multiplying is exact
    inv_dy = 1 / dtype(dy)
    for s in range(0, n, chunk):
        e = min(s + chunk, n)
        blk = np.empty((e - s, k + 1), dtype=dtype, order="F")
        Xc = X[s:e] if kept is None else X[s:e][:, kept]
        np.multiply(Xc, inv, out=blk[:, :-1], casting="unsafe")
        blk[:, -1] = np.asarray(y[s:e], dtype=dtype) * inv_dy
        if sw is not None:
            blk *= np.asarray(sw[s:e], dtype=dtype)[:, None]
        yield blk


def _tsqr(blocks, k):
    """Householder QR (LAPACK, double) of a row-blocked matrix with k columns; R (k x k)."""
    T = np.zeros((0, k))
    for blk in blocks:
        T = np.linalg.qr(np.vstack([T, blk]) if len(T) else blk, mode="r")
    if T.shape[0] < k:
        T = np.vstack([T, np.zeros((k - T.shape[0], k))])
    return T


def _house_ld(A: np.ndarray) -> np.ndarray:
    """Householder QR in longdouble of A (m x k); returns the upper triangle (min(m,k) x k)."""
    A = np.array(A, dtype=_LD, order="F")
    m, k = A.shape
    two = _LD(2)
    for j in range(min(m, k)):
        x = A[j:, j]
        normx = np.sqrt(x @ x)
        if normx == 0:
            continue
        alpha = -normx if x[0] >= 0 else normx
        v = x.copy()
        v[0] -= alpha
        beta = v @ v
        if j + 1 < k:
            w = (v @ A[j:, j + 1:]) * (two / beta)
            A[j:, j + 1:] -= np.outer(v, w)
        A[j, j] = alpha
        A[j + 1:, j] = 0
    return np.triu(A[: min(m, k)])


def _tsqr_ld(blocks, k):
    """Householder QR in longdouble of a row-blocked matrix with k columns; R (k x k)."""
    T = np.zeros((0, k), dtype=_LD)
    for blk in blocks:
        T = _house_ld(np.vstack([T, blk]) if len(T) else blk)
    if T.shape[0] < k:
        T = np.vstack([T, np.zeros((k - T.shape[0], k), dtype=_LD)])
    return T


def _back_ld(R: np.ndarray, z: np.ndarray) -> np.ndarray:
    r = R.shape[0]
    b = np.zeros(r, dtype=_LD)
    for i in range(r - 1, -1, -1):
        b[i] = (z[i] - R[i, i + 1:] @ b[i + 1:]) / R[i, i]
    return b


def _forward_ld(L: np.ndarray, z: np.ndarray) -> np.ndarray:
    r = L.shape[0]
    b = np.zeros(r, dtype=_LD)
    for i in range(r):
        b[i] = (z[i] - L[i, :i] @ b[:i]) / L[i, i]
    return b


def _tri_inv_ld(R: np.ndarray) -> np.ndarray:
    """Inverse of an upper-triangular longdouble matrix by back substitution."""
    r = R.shape[0]
    eye = np.eye(r, dtype=_LD)
    return np.column_stack([_back_ld(R, eye[:, j]) for j in range(r)]) if r else eye


def _positive_diag(R: np.ndarray, z: np.ndarray):
    """Flip row signs so R has a non-negative diagonal (a unique, reproducible factor)."""
    sgn = np.where(np.diag(R) < 0, -1, 1).astype(R.dtype)
    return R * sgn[:, None], z * sgn


def estimable_columns(A: np.ndarray, n_rows: int) -> np.ndarray:
    """Indices of the columns of a small triangle that are kept; the rest are aliased.

    Columns are taken in order; one is aliased when what is left of it after projection on the
    kept earlier columns has norm at most ``max(n_rows, p) * eps`` times its own.  Shared by the
    fit and cross-validation so both drop the same columns.
    """
    p = A.shape[1]
    tol = max(n_rows, p) * _EPS
    Q = np.zeros((A.shape[0], 0))
    kept = []
    for j in range(p):
        c = A[:, j]
        cn = float(np.linalg.norm(c))
        if cn == 0:
            continue
        v = c - Q @ (Q.T @ c)
        v = v - Q @ (Q.T @ v)
        vn = float(np.linalg.norm(v))
        if vn > tol * cn:
            Q = np.column_stack([Q, v / vn])
            kept.append(j)
    return np.array(kept, dtype=np.intp)


def _rank_and_reorder(Rfull: np.ndarray, z: np.ndarray, n_rows: int):
    """Rank of the scaled design read from its triangle; R and Q'y of the kept columns.

    Columns are taken in their given order and a column is aliased when what is left of it after
    projection on the kept earlier columns has norm at most ``max(n, p) * eps`` times its own
    (numpy's ``matrix_rank`` tolerance, applied column by column).  So the later of two collinear
    columns is the one dropped (a duplicate, the last level of a full set of dummies beside an
    intercept), as R's ``lm`` does.  ``Rfull`` is the exact factor of a matrix within rounding of
    X (Householder QR is backward stable), so working on the small triangle is as good as
    working on X.  Projections use classical Gram-Schmidt twice (orthogonal to working accuracy).
    """
    p = Rfull.shape[1]
    kept = estimable_columns(Rfull, n_rows)
    r = len(kept)
    if r == p:
        return kept, Rfull, z
    if r == 0:
        return kept, np.zeros((0, 0)), np.zeros(0)
    # X_s[:, kept] = Q_T Rfull[:, kept] = (Q_T Q3) Rk, so its factor is Rk and Q'y is Q3' z
    Q3, Rk = np.linalg.qr(Rfull[:, kept], mode="reduced")
    return kept, Rk, Q3.T @ z


def _gram(X, sw, inv_scale=None):
    """``(sqrt(w) X D^-1)' (sqrt(w) X D^-1)`` accumulated over row blocks."""
    n, p = X.shape
    G = np.zeros((p, p))
    for s in range(0, n, _CHUNK):
        C = X[s:s + _CHUNK]
        if inv_scale is not None:
            C = C * inv_scale
        if sw is not None:
            C = C * sw[s:s + _CHUNK, None]
        G += C.T @ C
    return G


def _cholqr2(X, wy_s, sw, names):
    """CholeskyQR2 of the scaled whitened design.

    Returns ``(R, Q'y_s, col_scale, colmax)``; ``R`` is None when CholeskyQR2 would be
    unreliable (Gram matrix not numerically positive definite, or condition estimate of the
    first factor above ``COND_CHOLQR``).  ``colmax`` is the per-column maximum if it had to be
    computed (None otherwise).
    """
    n, p = X.shape
    colmax = None
    pre = np.ones(p)
    with np.errstate(over="ignore", invalid="ignore", under="ignore"):
        G = _gram(X, sw)
    dg = np.diag(G)
    if not (np.isfinite(G).all() and dg.min() > 1e-250 and dg.max() < 1e250):
        # non-finite data, zero columns, or magnitudes whose squares leave the double range:
        # find out which, and prescale by powers of two if the data are fine
        colmax = _colmax_checked(X, names)
        if np.any(colmax == 0):
            return None, None, None, colmax
        swmax = 1.0 if sw is None else float(sw.max())
        pre = _pow2(colmax * swmax)
        G = _gram(X, sw, 1 / pre)
        dg = np.diag(G)
    d2 = _pow2(np.sqrt(dg))
    col_scale = pre * d2
    Gs = G / np.outer(d2, d2)  # exact: powers of two
    try:
        R1 = np.linalg.cholesky(Gs).T
    except np.linalg.LinAlgError:
        return None, None, None, colmax
    c1 = np.linalg.cond(R1)
    if not np.isfinite(c1) or c1 > COND_CHOLQR:
        return None, None, None, colmax
    # second pass: Q1 = X_s R1^{-1} block by block; fold the column scales into R1^{-1}
    M = sla.solve_triangular(R1, np.eye(p)) / col_scale[:, None]
    G2 = np.zeros((p, p))
    qy = np.zeros(p)
    for s in range(0, n, _CHUNK):
        Q1 = X[s:s + _CHUNK] @ M
        if sw is not None:
            Q1 *= sw[s:s + _CHUNK, None]
        G2 += Q1.T @ Q1
        qy += Q1.T @ wy_s[s:s + _CHUNK]
    try:
        R2 = np.linalg.cholesky(G2).T
    except np.linalg.LinAlgError:
        return None, None, None, colmax
    R = R2 @ R1
    z = sla.solve_triangular(R2, qy, trans="T")
    return R, z, col_scale, colmax


def _relative_error_estimate(Rs: np.ndarray, bs: np.ndarray, rs_norm: float, ys_norm: float,
                             eps: float) -> np.ndarray:
    """First-order forward-error estimate of each scaled coefficient, relative to its size.

    Backward stability says the computed solution is exact for data perturbed by about
    ``eps * ||X_s||`` and ``eps * ||y_s||``.  To first order that moves coefficient j by
    ``eps * (||e_j' (X'X)^{-1}|| ||X_s|| ||r|| + ||e_j' R^{-1}|| (||X_s|| ||b|| + ||y||))``; the
    first term (residual size times cond^2) is what defeats double precision on problems such as
    NIST's Wampler4-5 even at moderate condition numbers.  Coefficients that are exactly 0 get
    an infinite relative estimate.
    """
    r = Rs.shape[0]
    Ri = sla.solve_triangular(np.asarray(Rs, dtype=float), np.eye(r))
    V = Ri @ Ri.T
    xnorm = np.sqrt(r)  # scaled columns have norms below 1
    row_V = np.sqrt((V * V).sum(axis=1))
    row_Ri = np.sqrt((Ri * Ri).sum(axis=1))
    bs = np.asarray(bs, dtype=float)
    est = eps * (row_V * xnorm * rs_norm + row_Ri * (xnorm * np.sqrt(bs @ bs) + ys_norm))
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = est / np.abs(bs)
    return np.where(np.isnan(rel), np.inf, rel)


def _needs_extended(Rs, bs, rs_norm, ys_norm) -> bool:
    """True when some coefficient may have fewer than ~10 correct digits in double precision."""
    return bool(np.any(_relative_error_estimate(Rs, bs, rs_norm, ys_norm, _EPS) > REL_ERR_EXTENDED))


# --------------------------------------------------------------------------------------------
# extended precision helpers
# --------------------------------------------------------------------------------------------
def _split_ld(a):
    """Dekker's split of longdouble values into high and low halves."""
    c = _SPLITTER * a
    hi = c - (c - a)
    return hi, a - hi


def _two_sum(a, b):
    s = a + b
    bb = s - a
    return s, (a - (s - bb)) + (b - bb)


def _dot2_cols(A: np.ndarray, r: np.ndarray):
    """``A' r`` in longdouble with compensated products and sums (about twice the precision).

    Returns (high, low) parts per column.  TwoProduct by Dekker splitting; summation by a
    pairwise tree of TwoSum steps whose rounding errors are accumulated separately.
    """
    P = A * r[:, None]
    Ah, Al = _split_ld(A)
    rh, rl = _split_ld(r)
    err = Al * rl[:, None] - (((P - Ah * rh[:, None]) - Al * rh[:, None]) - Ah * rl[:, None])
    err = err.sum(axis=0)
    while P.shape[0] > 1:
        if P.shape[0] % 2:
            P = np.vstack([P, np.zeros((1, P.shape[1]), dtype=_LD)])
        P, e = _two_sum(P[0::2], P[1::2])
        err += e.sum(axis=0)
    hi = P[0] if P.shape[0] else np.zeros(A.shape[1], dtype=_LD)
    return hi, err


def _refine_ld(src, y, weights, kept, sk, dy, Rl, bs, cond, refine):
    """Residuals in longdouble and, when it contracts, iterative refinement of the solution.

    Each step solves ``R'R db = X_s' r_s`` with ``X_s' r_s`` accumulated in compensated
    arithmetic, so the cond^2 * ||r|| error term of a large-residual problem (NIST Wampler4-5)
    shrinks by a factor of about ``eps_ld * cond^2``.  Steps are taken only when asked
    (``refine``: the longdouble error estimate is above ~1e-16), while that factor is small, and
    while the correction keeps shrinking.  Returns the scaled coefficients and the
    unweighted residuals (longdouble).
    """
    n = src.shape[0]
    skl = sk.astype(_LD)
    dyl = _LD(dy)
    sw = None if weights is None else np.sqrt(weights.astype(_LD))
    refine = refine and _EPS_LD * cond * cond < 1e-3 and _EPS_LD < _EPS
    prev = None
    for _ in range(4):
        b = bs * dyl / skl
        resid = np.empty(n, dtype=_LD)
        g_hi = np.zeros(len(kept), dtype=_LD)
        g_lo = np.zeros(len(kept), dtype=_LD)
        for s in range(0, n, _CHUNK_LD):
            e = min(s + _CHUNK_LD, n)
            Xk = np.asarray(src[s:e][:, kept], dtype=_LD)
            resid[s:e] = y[s:e].astype(_LD) - Xk @ b
            if refine:
                Xs = Xk / skl
                rs = resid[s:e] / dyl
                if sw is not None:
                    Xs = Xs * sw[s:e, None]
                    rs = rs * sw[s:e]
                hi, lo = _dot2_cols(Xs, rs)
                g_hi, e2 = _two_sum(g_hi, hi)
                g_lo += lo + e2
        if not refine:
            break
        db = _back_ld(Rl, _forward_ld(Rl.T, g_hi + g_lo))
        size = float(np.max(np.abs(db / np.where(bs != 0, bs, 1))))
        if prev is not None and size >= prev:
            refine = False  # stopped contracting: keep bs, recompute its residuals
            continue
        bs = bs + db
        prev = size
        if size < 1e-17:
            refine = False  # converged; one more pass computes the final residuals
    return bs, resid


def _matvec_blocks(X, kept, b, dtype=float):
    """``X[:, kept] @ b`` in row blocks (never copies the kept columns of a large X at once)."""
    n, p = X.shape
    out = np.empty(n, dtype=dtype)
    if len(kept) == 0:
        out[:] = 0
        return out
    full = len(kept) == p
    chunk = _CHUNK if dtype is float else _CHUNK_LD
    for s in range(0, n, chunk):
        e = min(s + chunk, n)
        Xc = X[s:e] if full else X[s:e][:, kept]
        out[s:e] = np.asarray(Xc, dtype=dtype) @ b
    return out


def _cond(R: np.ndarray) -> float:
    """2-norm condition number of the design with unit-norm columns, from its triangle."""
    if R.shape[0] == 0:
        return float("nan")
    R = np.asarray(R, dtype=float)
    R = R / np.sqrt((R * R).sum(axis=0))  # column norms of R are those of the design
    sv = np.linalg.svd(R, compute_uv=False)
    return float(sv[0] / sv[-1]) if sv[-1] > 0 else float("inf")


# --------------------------------------------------------------------------------------------
# the public function
# --------------------------------------------------------------------------------------------
def fit_ols(X, y, *, weights=None, names=None, X_ext=None, method="auto") -> LeastSquares:
    """Fit ``y`` on the columns of ``X`` by least squares (weighted when ``weights`` is given).

    Parameters
    ----------
    X : array_like (n, p)
        Design matrix; must be finite.
    y : array_like (n,)
        Response; must be finite.
    weights : array_like (n,), optional
        Non-negative weights (inverse variances) for weighted least squares.  Rows with weight 0
        are left out of the estimate and of ``nobs``/``df_resid`` but still get fitted values.
    names : sequence of str, optional
        Column names (unique); default ``x0, x1, ...``.
    X_ext : array_like (n, p) of longdouble, optional
        The same design evaluated in extended precision (e.g. powers ``x**k`` computed in
        ``numpy.longdouble``).  Used only if the extended-precision path runs; it must agree
        with ``X`` to rounding.  A longdouble ``X`` given without ``X_ext`` serves as both.
    method : {"auto", "householder", "cholqr2", "extended"}
        Force a path (mainly for tests and benchmarks).  ``"cholqr2"`` still falls back to
        ``"householder"`` when it would be inaccurate; the result's ``method`` says what ran.

    Returns
    -------
    LeastSquares

    Raises
    ------
    ValueError
        Non-finite values in ``X``, ``y`` or ``weights``; negative weights; fewer (positively
        weighted) rows than columns; shapes that do not match.  Rank deficiency is not an
        error: it is reported in ``aliased``.
    """
    if method not in _METHODS:
        raise ValueError(f"method must be one of {', '.join(_METHODS)}; got {method!r}")
    if X_ext is None and getattr(X, "dtype", None) == _LD and _LD is not np.float64:
        X_ext = X
    X, y, weights, names, X_ext, n_pos = _validate(X, y, weights, names, X_ext)
    n, p = X.shape
    sw = None if weights is None else np.sqrt(weights)
    wy = y if sw is None else y * sw
    dy = float(_pow2(np.max(np.abs(wy))))  # response scale (power of two; 1 if y is all zero)
    wy_s = wy / dy

    used = None
    colmax = None
    if method == "cholqr2" or (method == "auto" and n >= TALL_ROWS):
        R, z, col_scale, colmax = _cholqr2(X, wy_s, sw, names)
        if R is not None:
            kept = np.arange(p)
            used = "cholqr2"
    if used is None:
        if colmax is None:
            colmax = _colmax_checked(X, names)
        swmax = 1.0 if sw is None else float(sw.max())
        pre = _pow2(colmax * swmax)  # every prescaled entry is <= 1: no overflow in LAPACK
        T = _tsqr(_blocks(X, y, sw, pre, dy), p + 1)
        Rfull, z = T[:p, :p], T[:p, p]
        d2 = _pow2(np.sqrt((Rfull * Rfull).sum(axis=0)))
        col_scale = pre * d2
        kept, R, z = _rank_and_reorder(Rfull / d2, z, n_pos)
        used = "householder"
    r = len(kept)
    R, z = _positive_diag(R, z)
    sk = col_scale[kept]
    cond = _cond(R)
    bs = sla.solve_triangular(R, z) if r else np.zeros(0)
    b = bs * dy / sk
    fitted = _matvec_blocks(X, kept, b)
    resid = y - fitted
    wres_s = (resid if sw is None else resid * sw) / dy

    use_ext = method == "extended"
    if method == "auto" and r:
        if cond > COND_EXTENDED:
            use_ext = True
        elif n * r * r <= EXTENDED_BUDGET:
            use_ext = _needs_extended(
                R, bs, float(np.linalg.norm(wres_s)), float(np.linalg.norm(wy_s))
            )
    R_ext = None
    if use_ext and r:
        src = X if X_ext is None else X_ext
        T = _tsqr_ld(_blocks(src, y, sw, sk, dy, kept=kept, dtype=_LD, chunk=_CHUNK_LD), r + 1)
        R_ext, zl = _positive_diag(T[:r, :r], T[:r, r])
        R = R_ext.astype(float)
        cond = _cond(R)
        bsl = _back_ld(R_ext, zl)
        refine = bool(np.any(_relative_error_estimate(
            R, bsl, float(np.linalg.norm(wres_s)), float(np.linalg.norm(wy_s)), _EPS_LD) > 1e-16))
        bsl, resid_l = _refine_ld(src, y, weights, kept, sk, dy, R_ext, bsl, cond, refine)
        b = (bsl * _LD(dy) / sk.astype(_LD)).astype(float)
        resid = resid_l.astype(float)
        fitted = (y.astype(_LD) - resid_l).astype(float)
        wl = (resid_l if sw is None else resid_l * np.sqrt(weights.astype(_LD))) / _LD(dy)
        ssr = float(wl @ wl) * dy * dy
        used = "extended"
    else:
        ssr = float(wres_s @ wres_s) * dy * dy

    params = np.full(p, np.nan)
    params[kept] = b
    kept_set = set(kept.tolist())
    return LeastSquares(
        X=X, y=y, weights=weights, names=names, kept=kept,
        aliased=tuple(names[j] for j in range(p) if j not in kept_set),
        params=params, R=R * sk[None, :], fitted=fitted, resid=resid, rank=r, nobs=n_pos,
        df_resid=n_pos - r, ssr=ssr, cond=cond, method=used, col_scale=col_scale,
        y_scale=dy, X_ext=X_ext if used == "extended" else None, R_ext=R_ext,
    )
