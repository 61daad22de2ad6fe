"""Specification checks on a least-squares fit, each with a plain-language reading.

Every check works from a :class:`~afterfit.model.ols.LeastSquares` (its ``R`` factor, residuals
and design) and never refits the model.  Statistics follow the conventions of R, gretl and
statsmodels so that results can be compared with theirs:

======================  ===================================================================
row                     convention
======================  ===================================================================
RESET                   fitted values squared and cubed, F form (gretl; statsmodels
                        ``linear_reset(power=3, use_f=True)``)
Breusch-Pagan (Koenker) n R^2 of squared residuals on the regressors (R ``lmtest::bptest``)
Breusch-Pagan           original form, half the explained sum of squares of
(original)              e^2 / mean(e^2) (``bptest(studentize=FALSE)``)
White                   n R^2 on regressors, squares and cross products (statsmodels
                        ``het_white``)
Durbin-Watson           sum of squared successive differences over sum of squares
Ljung-Box               Q at one lag, no model degrees of freedom subtracted (R ``Box.test``)
Jarque-Bera             skewness and kurtosis from biased moments (statsmodels, R ``tseries``)
Harvey-Collier          t test on the mean of recursive residuals (R ``lmtest::harvtest``)
VIF: <name>             variance inflation factor from ``xtx_inv`` (statsmodels
                        ``variance_inflation_factor``)
======================  ===================================================================

Weighted fits
    Under weights ``w`` the model says ``sqrt(w) * e`` has constant variance, so the residual
    based checks (Breusch-Pagan, White, Durbin-Watson, Ljung-Box, Jarque-Bera) use those
    whitened residuals; RESET and Harvey-Collier work on the whitened design and response (a
    weighted F test and weighted recursive residuals).  Breusch-Pagan and White regress the
    squared whitened residuals on the *unweighted* regressors, so they ask "does spread still
    depend on the variables after weighting?".  VIF uses the weighted cross products, i.e. it
    describes the precision of the weighted estimates.  Rows with zero weight carry no
    information and are left out of every check.
"""
from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.linalg as sla
from scipy import stats
from scipy.linalg import lapack

from .ols import LeastSquares

__all__ = ["CHECK_NAMES", "run_checks", "vif"]

# What ``run_checks(only=...)`` accepts, in the order of the full table's rows ("VIF" stands for
# every "VIF: <name>" row).
CHECK_NAMES = ("RESET", "Breusch-Pagan (Koenker)", "Breusch-Pagan (original)", "White",
               "Durbin-Watson", "Ljung-Box", "Jarque-Bera", "Harvey-Collier", "VIF")

# Rows per chunk for the passes over the data.
_CHUNK = 16384
# Entries per chunk of the Breusch-Pagan and White auxiliary blocks (8 MB: about 9,000 rows x
# 115 columns for White with 14 regressors; at most _CHUNK rows).  Forming the columns costs
# about the same from 2,000 to 36,000 rows; fewer, larger matrix products suffer less on a busy
# machine when OpenBLAS runs them on several threads (each product waits for its slowest one).
_CHUNK_ELEMS = 1 << 20
# A column is treated as a duplicate of the others (or as a constant) when the part of it the
# others do not explain is below this fraction of its size, in squared (Gram) terms: about
# 3e-5 in norm terms.  Exactly dependent columns such as a 0/1 indicator squared sit at rounding
# level (~1e-15), far below; genuinely distinct columns sit far above.
_DEP_TOL = 1e-9
# Sample-size wording (our choice, not a published rule): below these the readings say the
# p-value is a rough guide because every test here relies on a large-sample approximation.
_SMALL_N = 30
_SMALL_N_JB = 100  # the chi-square behind Jarque-Bera is known to be poor well past n = 30
# VIF above this is called high: common practice (Marquardt 1970), not a test.
_VIF_HIGH = 10.0
# Recursive residuals (see _recursive_residuals): rows per inner block (one Cholesky
# factorisation of k + _HC_BLOCK + 1 columns each), the most rows per outer block, and the
# bound on the sum of the block's whitened squared row lengths (its information matrices then
# have condition numbers below 1 + _HC_TAU).
_HC_BLOCK = 32
_HC_OUTER = 8192
_HC_TAU = 32.0

_COLUMNS = ["statistic", "df", "pvalue", "reading", "note"]
# the dtype pandas gives a column of Python strings (``str`` from pandas 3, ``object`` before)
_TEXT = pd.Series(["x"]).dtype


@dataclass(frozen=True)
class _Row:
    """One check as it will appear in the result frame."""

    name: str
    statistic: float
    df: str
    pvalue: float
    reading: str
    note: str = ""


@dataclass(frozen=True, eq=False)
class _Data:
    """What the checks share: rows with positive weight, kept columns, time order."""

    X: np.ndarray            # (n, k) kept design columns, unweighted
    y: np.ndarray            # response, unweighted
    fitted: np.ndarray       # unweighted fitted values
    sw: np.ndarray | None    # sqrt of weights, None when unweighted
    e: np.ndarray            # whitened residuals, row order
    perm: np.ndarray | None  # row indices in time order, None = row order
    R: np.ndarray            # (k, k) with Xw'Xw = R'R
    const_cols: np.ndarray   # positions (in kept order) of columns with one value
    colmean: np.ndarray      # (k,) unweighted column means of X
    names: tuple             # names of the kept columns
    n: int
    k: int
    exact: bool
    order_note: str
    base_note: str


# --------------------------------------------------------------------------------------------
# public API


def run_checks(
    ls: LeastSquares,
    *,
    has_const: bool = True,
    order=None,
    lags: int | None = None,
    alpha: float = 0.05,
    large_n: int = 50_000,
    only: Iterable[str] | None = None,
) -> pd.DataFrame:
    """Run the specification checks on a fit and read each result in plain words.

    Parameters
    ----------
    ls : LeastSquares
        The fit, from :func:`afterfit.model.ols.fit_ols`.
    has_const : bool, default True
        Whether the model contains an intercept, as an explicit column or implied by its
        columns (e.g. indicators for every group).  It decides whether RESET may centre the
        fitted values and whether VIF is centred.  ``True`` for a design whose columns cannot
        reproduce a constant is an error.
    order : array-like, one value per row of ``ls.X``, optional
        Values to sort the rows by (e.g. the time column; numbers or datetimes), used by
        Durbin-Watson, Ljung-Box and Harvey-Collier.  Ties keep row order.  To pass a
        permutation ``perm`` (rows in the order ``perm[0], perm[1], ...``) pass
        ``np.argsort(perm)``.  Without it those checks use row order and say so in ``note``.
    lags : int, optional
        Ljung-Box lag.  Default ``max(1, min(10, n // 5))``, the default of statsmodels
        ``acorr_ljungbox``.  The statistic is reported at this one lag (joint over lags
        ``1..lags``) with ``lags`` degrees of freedom, as R ``Box.test(type="Ljung-Box")``.
    alpha : float, default 0.05
        Level at which readings call a result a finding.
    large_n : int, default 50_000
        Above this many rows, readings of significant results add that a tiny departure is
        enough for a small p-value.
    only : iterable of str, optional
        Names of the checks to compute, from ``CHECK_NAMES``: the row labels below, with
        ``"VIF"`` standing for all ``"VIF: <name>"`` rows.  Only those checks are computed and
        only their rows returned, in the full table's order, with the same values as in the
        full table.  Costs differ widely: at a million rows and a dozen columns, Jarque-Bera,
        Breusch-Pagan, Ljung-Box and Durbin-Watson together take about a tenth of a second;
        White and Harvey-Collier most of the rest.

    Returns
    -------
    pandas.DataFrame
        One row per check, index ``test`` (``"RESET"``, ``"Breusch-Pagan (Koenker)"``,
        ``"Breusch-Pagan (original)"``, ``"White"``, ``"Durbin-Watson"``, ``"Ljung-Box"``,
        ``"Jarque-Bera"``, ``"Harvey-Collier"``, then ``"VIF: <name>"`` for each non-constant
        regressor); columns ``statistic``, ``df`` (text: ``"2, 197"`` for F, ``"2"`` for
        chi-square, ``"198"`` for t, empty when the check has no reference distribution),
        ``pvalue``, ``reading`` (plain words) and ``note`` (how it was computed, where that
        matters).  A check that is undefined for this fit (an exact fit, too few rows, no
        non-constant regressor) has NaN statistic and p-value and a reading that says why.

    Notes
    -----
    Cost is a few passes over the rows in chunks; nothing of size n x (number of White columns)
    is held at once.

    * White: the auxiliary regression has a constant, the non-constant regressors, and all
      their squares and cross products.  Regressors are centred and scaled first; with the
      constant included this spans the same space, so the statistic is unchanged but the Gram
      matrix (accumulated in chunks) is far better conditioned.  Columns that duplicate others
      are dropped: exact repeats known from the data (a 0/1 indicator squared, the product of
      two levels of one factor) before the Gram matrix is formed, the rest by a pivoted
      Cholesky factorisation; the degrees of freedom count the columns kept, as statsmodels'
      rank-based ``df_model`` does.  When the model has no intercept, statsmodels'
      ``het_white`` uses only products of the given columns; here the auxiliary regression
      still has a constant and the linear terms (the textbook form), so results differ for
      such models.  The same holds for Breusch-Pagan: its auxiliary regression always has a
      constant (R's ``bptest`` uses the model matrix as is).
    * Durbin-Watson has no p-value here (its exact null distribution depends on the design);
      Ljung-Box gives the test for residual autocorrelation.
    * Harvey-Collier: recursive residuals are computed by blocks.  Given the fit to the rows
      before a block, the block's prediction errors have covariance
      ``sigma^2 (I + V V')`` with ``V = X_block R^{-1}``; the recursive residuals are those
      errors whitened by the Cholesky factor of that matrix (the one-step innovations), so the
      sequential loop runs over blocks, not rows, at O(n p^2 + n b^2) cost for blocks of b
      rows.  Blocks are limited so that the matrices inside them stay well conditioned,
      whatever the design's own conditioning; the factor ``R`` is carried from block to
      block, and columns far from zero for their spread are centred first (with a constant
      column this changes no recursive residual).  The recursion starts from the first ``k``
      rows in order, as R ``recresid`` does; if those rows cannot determine all coefficients
      it starts from the shortest prefix that can, and says so in ``note``.  It runs on all
      rows at any n.
    * An exact fit leaves nothing to test: every test row is NaN with a reading saying so.  A
      fit counts as exact when ``ls.exact_fit`` says so, or when the residual norm is below
      ``max(1e-10, 100 eps cond)`` times the norm of the centred (without intercept, uncentred)
      whitened response.
    """
    if not isinstance(ls, LeastSquares):
        raise TypeError(f"run_checks needs a LeastSquares from fit_ols, got {type(ls).__name__}")
    alpha = float(alpha)
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha must be between 0 and 1 (e.g. 0.05), got {alpha}")
    if isinstance(large_n, bool) or not isinstance(large_n, (int, np.integer)) or large_n < 1:
        raise ValueError(f"large_n must be a positive whole number of rows, got {large_n!r}")
    want = _selection(only)
    d = _prepare(ls, has_const=bool(has_const), order=order)
    if lags is None:
        lags = max(1, min(10, d.n // 5))
    elif isinstance(lags, bool) or not isinstance(lags, (int, np.integer)) or lags < 1:
        raise ValueError(f"lags must be a whole number >= 1, got {lags!r}")
    elif lags >= d.n - 1:
        raise ValueError(
            f"lags={lags} needs more than {lags + 1} rows; this fit has {d.n}: pass a smaller lags"
        )
    rows = []
    if "RESET" in want:
        rows.append(_reset(d, has_const=bool(has_const), alpha=alpha))
    if want.intersection(_BP_NAMES):
        rows += [r for r in _breusch_pagan(d, alpha=alpha) if r.name in want]
    if "White" in want:
        rows.append(_white(d, alpha=alpha))
    if "Durbin-Watson" in want:
        rows.append(_durbin_watson(d))
    if "Ljung-Box" in want:
        rows.append(_ljung_box(d, lags=int(lags), alpha=alpha))
    if "Jarque-Bera" in want:
        rows.append(_jarque_bera(d, alpha=alpha))
    if "Harvey-Collier" in want:
        rows.append(_harvey_collier(d, alpha=alpha))
    if "VIF" in want:
        v = _vif_values(d, ls, has_const=bool(has_const))
        for name, value in v.items():
            rows.append(_vif_row(name, value))
    rows = [_with_size_caveat(r, d.n, alpha, large_n) for r in rows]
    frame = pd.DataFrame(
        {
            "statistic": np.array([r.statistic for r in rows], dtype=float),
            # text columns typed as pandas types them for the full table, also when empty
            "df": pd.array([r.df for r in rows], dtype=_TEXT),
            "pvalue": np.array([r.pvalue for r in rows], dtype=float),
            "reading": pd.array([r.reading for r in rows], dtype=_TEXT),
            "note": pd.array([_join(r.note, d.base_note) if not r.name.startswith("VIF")
                              else r.note for r in rows], dtype=_TEXT),
        },
        index=pd.Index([r.name for r in rows], name="test"),
    )
    return frame[_COLUMNS]


def vif(ls: LeastSquares, *, has_const: bool = True) -> pd.Series:
    """Variance inflation factor of each non-constant regressor.

    Computed as ``xtx_inv[j, j] * sum((x_j - mean)^2)`` (uncentred sum of squares without an
    intercept), which equals ``1 / (1 - R_j^2)`` for the regression of ``x_j`` on the other
    columns, with no auxiliary regressions.  Under weights the sums are weighted.  Aliased
    columns (dropped from the fit as exact combinations of others) get ``inf``.

    Parameters
    ----------
    ls : LeastSquares
        The fit.
    has_const : bool, default True
        Whether the model contains an intercept (explicitly or implied); centred VIF if so,
        as statsmodels ``variance_inflation_factor`` with a constant column.

    Returns
    -------
    pandas.Series
        Index: regressor names (constant column left out), name ``"vif"``.
    """
    if not isinstance(ls, LeastSquares):
        raise TypeError(f"vif needs a LeastSquares from fit_ols, got {type(ls).__name__}")
    d = _prepare(ls, has_const=bool(has_const), order=None)
    return _vif_values(d, ls, has_const=bool(has_const))


def _selection(only) -> frozenset:
    """The check names asked for through ``run_checks(only=...)``, validated."""
    if only is None:
        return frozenset(CHECK_NAMES)
    valid = ", ".join(repr(nm) for nm in CHECK_NAMES)
    if isinstance(only, str):
        raise ValueError(f"only takes a collection of check names, e.g. only=({only!r},); got "
                         f"the single string {only!r}. Valid names: {valid}")
    try:
        names = list(only)
    except TypeError:
        raise TypeError(f"only must be a collection of check names (valid: {valid}), got "
                        f"{type(only).__name__}") from None
    bad = [nm for nm in names if not isinstance(nm, str) or nm not in CHECK_NAMES]
    if bad:
        extra = ""
        if any(isinstance(nm, str) and nm.startswith("VIF") for nm in bad):
            extra = ' ("VIF" selects every VIF row)'
        listed = ", ".join(repr(nm) for nm in bad)
        raise ValueError(f"unknown check name{'s' if len(bad) > 1 else ''} {listed} in only; "
                         f"valid names: {valid}{extra}")
    return frozenset(names)


# --------------------------------------------------------------------------------------------
# shared preparation


def _prepare(ls: LeastSquares, *, has_const: bool, order) -> _Data:
    n_all = int(ls.X.shape[0])  # every row, zero-weight ones too (ls.nobs counts w > 0)
    kept = np.asarray(ls.kept, dtype=int)
    mask = None
    notes = []
    if ls.weights is not None:
        w = np.asarray(ls.weights, dtype=float)
        if not np.all(np.isfinite(w)) or np.any(w < 0):
            raise ValueError("weights must be finite and non-negative; fix them and refit")
        if np.any(w == 0):
            mask = w > 0
            notes.append(f"{int((~mask).sum())} rows with zero weight left out")
    full_cols = kept.size == ls.X.shape[1] and np.array_equal(kept, np.arange(kept.size))
    if mask is None:
        X = ls.X if full_cols else ls.X[:, kept]
        y, fitted = ls.y, ls.fitted
        sw = None if ls.weights is None else np.sqrt(np.asarray(ls.weights, dtype=float))
    else:
        X = ls.X[mask][:, kept]
        y, fitted = ls.y[mask], ls.fitted[mask]
        sw = np.sqrt(np.asarray(ls.weights, dtype=float)[mask])
    if sw is not None:
        notes.append("weighted fit: whitened residuals sqrt(w)*e")
    n, k = X.shape
    resid = y - fitted
    e = resid if sw is None else resid * sw
    R = np.asarray(ls.R, dtype=float)

    # Constant columns (one value in every row) are found directly; checking that the design
    # can reproduce a constant covers intercepts implied by indicator sets too.
    const_cols = _constant_columns(X)
    colmean = X.mean(axis=0)
    if has_const and k:
        s = colmean * n if sw is None else _colsum_weighted(X, sw)  # X' W 1
        Rt_s = np.linalg.solve(R.T, s)  # not a triangular solve: see _recursive_residuals
        explained = float(Rt_s @ Rt_s)
        total = float(n) if sw is None else _dot(sw, sw)
        if not explained >= total * (1 - 1e-8):
            raise ValueError(
                "has_const=True but the model's columns cannot reproduce a constant; pass "
                "has_const=False for a model without intercept, or add an intercept column"
            )
    elif has_const:
        raise ValueError("has_const=True but the fit has no estimable columns; pass has_const=False")

    # exact fit: residuals at rounding level relative to the response's own variation
    yw = y if sw is None else y * sw
    if has_const:
        ref = yw - yw.mean() if sw is None else yw - sw * (_dot(sw, yw) / _dot(sw, sw))
    else:
        ref = yw
    ref_norm = math.sqrt(_dot(ref, ref))
    e_norm = math.sqrt(_dot(e, e))
    cond = float(ls.cond) if np.isfinite(ls.cond) else 1e16
    tol = max(1e-10, 100 * np.finfo(float).eps * cond)
    # the kernel's own verdict (relative to the uncentred response) or ours (relative to the
    # response's variation, scaled by the conditioning): either means nothing is left to test
    exact = ((not e_norm > tol * ref_norm) or ls.df_resid <= 0
             or bool(getattr(ls, "exact_fit", False)))

    perm, order_note = _order(order, n_all, mask)
    names = tuple(ls.names[i] for i in kept)
    return _Data(
        X=X, y=y, fitted=fitted, sw=sw, e=e, perm=perm, R=R, const_cols=const_cols,
        colmean=colmean, names=names, n=n, k=k, exact=exact, order_note=order_note,
        base_note="; ".join(notes),
    )


def _order(order, n_all: int, mask) -> tuple[np.ndarray | None, str]:
    if order is None:
        return None, "row order (no time order given)"
    key = np.asarray(order)
    if key.ndim != 1 or key.shape[0] != n_all:
        raise ValueError(
            f"order must be one value per row of the fit ({n_all}), got shape {key.shape}"
        )
    if key.dtype.kind == "M" or key.dtype.kind == "m":
        bad = np.isnat(key)
    elif key.dtype.kind in "fc":
        bad = np.isnan(key)
    elif key.dtype.kind in "iub":
        bad = np.zeros(n_all, bool)
    else:
        raise ValueError(
            f"order must hold numbers or datetimes to sort by (got dtype {key.dtype}); convert "
            "it first, e.g. pd.to_datetime(...) or pd.factorize(...)[0]"
        )
    if bad.any():
        raise ValueError(f"order has {int(bad.sum())} missing values; fill or drop those rows")
    if mask is not None:
        key = key[mask]
    perm = np.argsort(key, kind="stable")
    sorted_key = key[perm]
    ties = int(np.count_nonzero(sorted_key[1:] == sorted_key[:-1])) if key.size > 1 else 0
    note = "time order from `order`"
    if ties:
        note += f" ({ties} rows tie with the previous row and keep row order)"
    return perm, note


def _colsum_weighted(X: np.ndarray, sw: np.ndarray | None) -> np.ndarray:
    """X' w (with w = sw^2), i.e. the whitened design times the whitened constant."""
    if sw is None:
        return X.sum(axis=0)
    out = np.zeros(X.shape[1])
    for sl in _chunks(X.shape[0]):
        out += np.einsum("i,ij->j", sw[sl] * sw[sl], X[sl])
    return out


def _dot(a: np.ndarray, b: np.ndarray) -> float:
    """Inner product of two long vectors.

    Not ``a @ b``: OpenBLAS threads its vector routines above a few thousand entries, and on a
    busy machine each such call can take milliseconds instead of microseconds.
    """
    return float(np.einsum("i,i->", a, b))


def _constant_columns(X: np.ndarray) -> np.ndarray:
    """Positions of columns with one value in every row (the intercept, usually)."""
    if X.shape[0] == 0:
        return np.array([], dtype=int)
    # screen on the first rows, then confirm the few candidates on all rows
    head = X[:64]
    cand = np.flatnonzero(np.all(head == head[:1], axis=0))
    return np.array([j for j in cand if np.all(X[:, j] == X[0, j])], dtype=int)


def _chunks(n: int, size: int = _CHUNK):
    for s in range(0, n, size):
        yield slice(s, min(n, s + size))


def _whiten(Xc: np.ndarray, sw: np.ndarray | None, sl) -> np.ndarray:
    return Xc if sw is None else Xc * sw[sl, None]


def _gram_quad(G: np.ndarray, c: np.ndarray, ref: np.ndarray) -> tuple[float, int]:
    """``c' G^- c`` over a maximal set of columns of ``G`` that are not duplicates of others.

    ``G`` is a Gram matrix (possibly after removing a projection), ``c`` the matching cross
    products with the response, ``ref`` each column's squared size before that removal.  A
    column whose diagonal fell below ``_DEP_TOL * ref`` (nothing of it left) is dropped first;
    the rest go through a pivoted Cholesky factorisation of the correlation form, which drops
    columns that are combinations of the others.  Returns the quadratic form (the explained sum
    of squares) and the number of columns used.
    """
    diag = np.diag(G)
    keep = diag > _DEP_TOL * ref
    if not keep.any():
        return 0.0, 0
    G = G[np.ix_(keep, keep)]
    c = c[keep]
    s = np.sqrt(np.diag(G))
    C = G / np.outer(s, s)
    cs = c / s
    U, piv, rank, info = lapack.dpstrf(C, tol=_DEP_TOL, lower=0)
    if info < 0:  # pragma: no cover - LAPACK argument error, cannot happen with a square input
        raise RuntimeError(f"pivoted Cholesky failed (info={info})")
    sel = piv[:rank] - 1
    U11 = np.triu(U[:rank, :rank])
    z = np.linalg.solve(U11.T, cs[sel])  # not a triangular solve: see _recursive_residuals
    return float(z @ z), int(rank)


# --------------------------------------------------------------------------------------------
# readings


def _fmt_p(p: float) -> str:
    return "p < 0.001" if p < 0.001 else f"p = {p:.3f}"


def _fmt(x: float) -> str:
    if not np.isfinite(x):
        return "inf" if x > 0 else "nan"
    return f"{x:.2f}" if abs(x) < 100 else f"{x:,.0f}"


def _join(*parts: str) -> str:
    return "; ".join(p for p in parts if p)


def _undefined(name: str, why: str, note: str = "") -> _Row:
    return _Row(name, math.nan, "", math.nan, f"Undefined: {why}", note)


_EXACT = "the model fits these rows exactly (the residuals are all zero), so there is nothing left to test."


def _with_size_caveat(r: _Row, n: int, alpha: float, large_n: int) -> _Row:
    if not np.isfinite(r.pvalue):
        return r
    limit = _SMALL_N_JB if r.name == "Jarque-Bera" else _SMALL_N
    if n < limit:
        extra = f" Small sample (n = {n}): treat the p-value as a rough guide."
    elif n > large_n and r.pvalue < alpha:
        extra = (f" With {n:,} rows even a negligible departure gives a small p-value: judge its "
                 "size in the residual panels before acting.")
    else:
        return r
    return _Row(r.name, r.statistic, r.df, r.pvalue, r.reading + extra, r.note)


# --------------------------------------------------------------------------------------------
# RESET


def _reset(d: _Data, *, has_const: bool, alpha: float) -> _Row:
    name = "RESET"
    if d.exact:
        return _undefined(name, _EXACT)
    f = d.fitted
    # RESET is unchanged by rescaling the fitted values, and (with an intercept) by shifting
    # them; standardising keeps the powers well scaled whatever the response's units.
    if has_const:
        centre = float(f.mean())
        spread = float(np.sqrt(np.mean((f - centre) ** 2)))
    else:
        centre = 0.0
        spread = float(np.sqrt(np.mean(f * f)))
    if not spread > 0 or not np.isfinite(spread) or spread <= 1e-13 * max(abs(centre), 1e-300):
        return _undefined(name, "the fitted values are constant (no non-constant regressor), "
                                "so their powers add nothing to test.")
    n, k = d.n, d.k
    R = d.R

    rows = min(n, _CHUNK)
    buf = np.empty((rows, 3), order="F")  # the two powers, then the residuals

    def powers(sl) -> np.ndarray:
        c = sl.stop - sl.start
        g = buf[:c, 2]
        np.subtract(f[sl], centre, out=g)
        g /= spread
        Z = buf[:c, :2]
        np.multiply(g, g, out=Z[:, 0])
        np.multiply(Z[:, 0], g, out=Z[:, 1])
        if d.sw is not None:
            Z *= d.sw[sl, None]
        return Z

    # two passes: project the powers off the design using R, then correct once more with the
    # residual cross products (one step of iterative refinement), so columns nearly in the
    # design's span do not lose their remainder to cancellation
    T = np.zeros((k, 2))
    ref = np.zeros(2)
    # products with the design go column by column: OpenBLAS is about twice as fast on a
    # matrix-vector product as on a matrix product with two or three columns
    for sl in _chunks(n):
        Z = powers(sl)
        Xw = _whiten(d.X[sl], d.sw, sl)
        for j in range(2):
            T[:, j] += Xw.T @ Z[:, j]
        ref += np.einsum("ij,ij->j", Z, Z)
    B = sla.cho_solve((R, False), T)
    M = np.zeros((3, 3))
    T3 = np.zeros((k, 3))
    for sl in _chunks(n):
        Xw = _whiten(d.X[sl], d.sw, sl)
        Y = buf[:sl.stop - sl.start]
        Z1 = powers(sl)
        for j in range(2):
            Z1[:, j] -= Xw @ B[:, j]
        Y[:, 2] = d.e[sl]
        M += Y.T @ Y  # [Z1 e]'[Z1 e]
        for j in range(3):
            T3[:, j] += Xw.T @ Y[:, j]
    G1, c1 = M[:2, :2], M[:2, 2]
    T2, te = T3[:, :2], T3[:, 2]
    B2 = sla.cho_solve((R, False), T2)
    G = G1 - B2.T @ T2
    G = (G + G.T) / 2
    c = c1 - B2.T @ te
    delta, q = _gram_quad(G, c, ref)
    ssr0 = _dot(d.e, d.e)
    df2 = n - k - q
    if q == 0:
        return _undefined(name, "the fitted values take so few distinct values that their square "
                                "and cube are already combinations of the regressors.")
    if df2 < 1:
        return _undefined(name, f"{n} rows leave no residual degrees of freedom after adding "
                                f"{q} columns to {k}.")
    ssr1 = ssr0 - delta
    if not ssr1 > 1e-14 * ssr0:
        F = math.inf
    else:
        F = (delta / q) / (ssr1 / df2)
    p = float(stats.f.sf(F, q, df2))
    note = "" if q == 2 else "the cube of the fitted values adds nothing beyond the square; 1 column tested"
    if p < alpha:
        reading = (f"Curvature not captured: the fitted values squared and cubed still explain "
                   f"the response (RESET {_fmt_p(p)}). Try a curved term for the variable whose "
                   "residual panel bends, or a transformed response.")
    else:
        reading = (f"No sign of missed curvature: the fitted values squared and cubed add little "
                   f"to the model (RESET {_fmt_p(p)}).")
    return _Row(name, float(F), f"{q}, {df2}", p, reading, note)


# --------------------------------------------------------------------------------------------
# Breusch-Pagan and White


_BP_NAMES = ("Breusch-Pagan (Koenker)", "Breusch-Pagan (original)")


@dataclass(frozen=True, eq=False)
class _Aux:
    """Centred cross products of an auxiliary regression of ``u = e^2 / mean(e^2)``."""

    G: np.ndarray    # (q, q) centred Gram of the auxiliary columns
    c: np.ndarray    # (q,) centred cross products with u
    tss: float       # centred sum of squares of u
    ref: np.ndarray  # (q,) uncentred sums of squares of the auxiliary columns
    u_ref: float     # uncentred sum of squares of u
    m: int           # number of non-constant regressors
    skipped: int     # products left out as exact duplicates of the regressors


def _aux_cross_products(d: _Data, *, products: bool) -> _Aux | None:
    """One chunked pass: Gram of [regressors, (their products,) u, 1], centred afterwards.

    Regressors are centred at their means and scaled by powers of two (exact), so squares and
    products are not nearly collinear with the linear terms; with the constant in the auxiliary
    regression this changes neither statistic.  Each chunk is shifted by the first chunk's
    column means before its product, so the centring at the end cancels little.  A column of
    ones carried along gives the column sums from the same matrix product.  Returns None when
    the model has no non-constant regressor.
    """
    nc = np.setdiff1d(np.arange(d.k), d.const_cols)
    m = nc.size
    if m == 0:
        return None
    n = d.n
    X = d.X
    mu = d.colmean[nc]
    # a slice keeps each chunk a view of the (column-major) design; a gather only if needed
    cols = slice(int(nc[0]), int(nc[-1]) + 1) if np.all(np.diff(nc) == 1) else nc
    # products to form: for each i, the columns j >= i whose product with i is not known to
    # repeat other columns exactly
    plan = []
    nprod = 0
    if products:
        dup = _exact_duplicate_products(X, nc)
        for i in range(m):
            js = [j for j in range(i, m) if (i, j) not in dup]
            if js:
                sel = slice(js[0], js[-1] + 1) if js[-1] - js[0] + 1 == len(js) else np.array(js)
                plan.append((i, sel, m + nprod, len(js)))
                nprod += len(js)
    q = m + nprod
    K = q + 2  # auxiliary columns, u, ones
    rows = min(_CHUNK, max(256, _CHUNK_ELEMS // K))
    sigma2 = _dot(d.e, d.e) / n  # ML variance: the original Breusch-Pagan scale
    G = np.zeros((K, K))
    # column-major like the design: every column operation below runs on contiguous memory
    Z = np.empty((min(rows, n), K), order="F")
    Z[:, -1] = 1.0
    scale = shift = None
    for sl in _chunks(n, rows):
        c = sl.stop - sl.start
        Zc = Z[:c]
        xs = Zc[:, :m]
        np.subtract(X[sl, cols], mu, out=xs)
        if scale is None:
            # powers of two near each column's spread: exact, and they keep the products
            # away from overflow whatever the units
            rms = np.sqrt(np.einsum("ij,ij->j", xs, xs) / c)
            rms[~(rms > 0) | ~np.isfinite(rms)] = 1.0
            scale = np.exp2(-np.round(np.log2(rms)))
        xs *= scale
        for i, sel, off, cnt in plan:
            np.multiply(xs[:, sel], xs[:, i:i + 1], out=Zc[:, off:off + cnt])
        es = d.e[sl]
        np.multiply(es, es, out=Zc[:, q])
        Zc[:, q] /= sigma2
        if shift is None:
            shift = Zc[:, :-1].mean(axis=0)
        Zc[:, :-1] -= shift
        # one large product per chunk: OpenBLAS runs it near peak speed (many small products
        # cost several times more per multiply-add)
        G += Zc.T @ Zc
    sums = G[:-1, -1]
    Gs = G[:-1, :-1]
    mean_dev = sums / n
    Gc = Gs - n * np.outer(mean_dev, mean_dev)
    raw_sq = np.diag(Gs) + 2 * shift * sums + n * shift**2  # uncentred sums of squares
    return _Aux(G=Gc[:q, :q], c=Gc[:q, q], tss=float(Gc[q, q]), ref=raw_sq[:q],
                u_ref=float(raw_sq[q]), m=m, skipped=m * (m + 1) // 2 - nprod if products else 0)


def _exact_duplicate_products(X: np.ndarray, nc: np.ndarray) -> set:
    """Products of regressors that are exact affine combinations of the regressors themselves.

    A column with two distinct values (an indicator, say) squared is such a combination, and so
    is the product of two such columns whose value pairs take at most three of their four
    possible combinations (indicators of levels of one factor, which never both equal 1): a
    function on three corners of a rectangle is affine.  White's auxiliary regression would
    drop these columns as duplicates anyway; leaving them out spares their share of the Gram
    matrix (most of it for a factor with many levels) and does not depend on a tolerance.
    Returns pairs ``(i, j)``, ``i <= j``, of positions in ``nc``.
    """
    n = X.shape[0]
    ind = {}
    for pos, col in enumerate(nc):
        x = X[:, col]
        if np.unique(x[:64]).size > 2:  # screen on the first rows, confirm on all
            continue
        a = x[0]
        second = x != a
        if not second.any():
            continue
        b = x[int(np.argmax(second))]
        if np.all(second == (x == b)):
            ind[pos] = (second, int(np.count_nonzero(second)))
    dup = {(p, p) for p in ind}
    keys = sorted(ind)
    for a_i, p in enumerate(keys):
        for q in keys[a_i + 1:]:
            both = int(np.count_nonzero(ind[p][0] & ind[q][0]))
            n_p, n_q = ind[p][1], ind[q][1]
            if both == 0 or both == n_p or both == n_q or n_p + n_q - both == n:
                dup.add((p, q))
    return dup


_NO_REGRESSOR = ("the model has no regressor besides the constant, so there is nothing for the "
                 "spread to depend on.")
_EQUAL_U = "the squared residuals are all equal, so their variation cannot be explained."


def _breusch_pagan(d: _Data, *, alpha: float) -> list[_Row]:
    names = _BP_NAMES
    if d.exact:
        return [_undefined(nm, _EXACT) for nm in names]
    aux = _aux_cross_products(d, products=False)
    if aux is None:
        return [_undefined(nm, _NO_REGRESSOR) for nm in names]
    if not aux.tss > 1e-14 * aux.u_ref:
        return [_undefined(nm, _EQUAL_U) for nm in names]
    n = d.n
    ess, r = _gram_quad(aux.G, aux.c, aux.ref)
    rows = []
    # Koenker (studentized): n R^2; original: ESS / 2 of e^2 / sigma2 (R bptest)
    for nm, label, stat in ((names[0], "Breusch-Pagan, Koenker form,", n * ess / aux.tss),
                            (names[1], "Breusch-Pagan, original form,", ess / 2)):
        if n - r - 1 < 1:
            rows.append(_undefined(nm, f"{n} rows are too few for an auxiliary regression on "
                                       f"{r} variables."))
            continue
        p = float(stats.chi2.sf(stat, r))
        if p < alpha:
            reading = (f"Spread changes with the regressors: the squared residuals track the "
                       f"model's variables ({label} {_fmt_p(p)}). Consider robust (HC) standard "
                       "errors, weights, or a transformed response; the spread panel shows where.")
        else:
            reading = (f"No sign that the residual spread changes with the model's variables "
                       f"({label} {_fmt_p(p)}).")
        note = "" if nm == names[0] else "assumes normal errors; the Koenker form does not"
        rows.append(_Row(nm, float(stat), str(r), p, reading, note))
    return rows


def _white(d: _Data, *, alpha: float) -> _Row:
    name = "White"
    if d.exact:
        return _undefined(name, _EXACT)
    aux = _aux_cross_products(d, products=True)
    if aux is None:
        return _undefined(name, _NO_REGRESSOR)
    if not aux.tss > 1e-14 * aux.u_ref:
        return _undefined(name, _EQUAL_U)
    n, m = d.n, aux.m
    ess, r = _gram_quad(aux.G, aux.c, aux.ref)
    ncols_aux = aux.ref.size + aux.skipped
    note = f"{ncols_aux} auxiliary columns from {m} regressor{'s' if m > 1 else ''}"
    if r < ncols_aux:
        note += f", {ncols_aux - r} dropped as duplicates of others"
    if n - r - 1 < 1:
        return _undefined(name, f"{n} rows are too few for White's auxiliary regression on {r} "
                                "columns.", note)
    stat = n * ess / aux.tss
    p = float(stats.chi2.sf(stat, r))
    if p < alpha:
        reading = (f"Spread changes with the regressors, their squares or their products "
                   f"(White {_fmt_p(p)}). Consider robust (HC) standard errors or weights, and "
                   "look at the spread panel for its shape.")
    else:
        reading = (f"No sign that the residual spread depends on the regressors, their squares "
                   f"or products (White {_fmt_p(p)}).")
    return _Row(name, float(stat), str(r), p, reading, note)


# --------------------------------------------------------------------------------------------
# ordered checks


def _ordered_resid(d: _Data) -> np.ndarray:
    return d.e if d.perm is None else d.e[d.perm]


_ORDER_ONLY = "It only means something when the rows have an order (time, position)"


def _durbin_watson(d: _Data) -> _Row:
    name = "Durbin-Watson"
    if d.exact:
        return _undefined(name, _EXACT, d.order_note)
    if d.n < 2:
        return _undefined(name, "it needs at least two rows.", d.order_note)
    e = _ordered_resid(d)
    diff = np.diff(e)
    dw = _dot(diff, diff) / _dot(e, e)
    r1 = 1 - dw / 2
    where = "; these are in row order, as no time order was given." if d.perm is None else "."
    if dw < 1.5:
        look = (f"Durbin-Watson d = {dw:.3f} is well below 2: neighbouring residuals move together "
                f"(lag-1 correlation about {r1:.2f}); see Ljung-Box for a test and consider a "
                "lagged or trend term.")
    elif dw > 2.5:
        look = (f"Durbin-Watson d = {dw:.3f} is well above 2: neighbouring residuals alternate in "
                f"sign (lag-1 correlation about {r1:.2f}); see Ljung-Box for a test.")
    else:
        look = (f"Durbin-Watson d = {dw:.3f} is near 2, the value for no lag-1 correlation "
                f"(about {r1:.2f} here; common practice treats 1.5 to 2.5 as unremarkable).")
    reading = f"{look} {_ORDER_ONLY}{where}"
    return _Row(name, dw, "", math.nan, reading, _join(d.order_note, "no p-value: see Ljung-Box"))


def _ljung_box(d: _Data, *, lags: int, alpha: float) -> _Row:
    name = "Ljung-Box"
    if d.exact:
        return _undefined(name, _EXACT, d.order_note)
    n = d.n
    if lags >= n - 1:
        return _undefined(name, f"{n} rows are too few for lags 1-{lags}.", d.order_note)
    e = _ordered_resid(d)
    x = e - e.mean()
    c0 = _dot(x, x)
    if not c0 > 0:
        return _undefined(name, "the residuals do not vary.", d.order_note)
    ks = np.arange(1, lags + 1)
    r = np.array([_dot(x[k:], x[:-k]) for k in ks]) / c0
    q = float(n * (n + 2) * np.sum(r * r / (n - ks)))
    p = float(stats.chi2.sf(q, lags))
    where = "rows in row order, as no time order was given" if d.perm is None else "rows in time order"
    if p < alpha:
        reading = (f"Residual memory: residuals are correlated with their own past at lags 1-{lags} "
                   f"more than chance allows (Ljung-Box {_fmt_p(p)}; {where}). For ordered data, "
                   "try a lagged, trend or seasonal term, or errors that allow correlation. "
                   f"{_ORDER_ONLY}.")
    else:
        reading = (f"No sign of residual memory at lags 1-{lags} (Ljung-Box {_fmt_p(p)}; "
                   f"{where}). {_ORDER_ONLY}.")
    return _Row(name, q, str(lags), p, reading, _join(d.order_note, f"lags 1-{lags}"))


def _jarque_bera(d: _Data, *, alpha: float) -> _Row:
    name = "Jarque-Bera"
    if d.exact:
        return _undefined(name, _EXACT)
    e = d.e
    x = e - e.mean()
    # products rather than powers (np.power is several times slower); means stay pairwise sums
    x2 = x * x
    m2 = float(np.mean(x2))
    if not m2 > 0:
        return _undefined(name, "the residuals do not vary.")
    np.multiply(x2, x, out=x)
    m3 = float(np.mean(x))
    np.multiply(x2, x2, out=x2)
    m4 = float(np.mean(x2))
    skew = m3 / m2**1.5
    kurt = m4 / m2**2
    jb = d.n / 6.0 * (skew**2 + (kurt - 3.0) ** 2 / 4.0)
    p = float(stats.chi2.sf(jb, 2))
    if p < alpha:
        reading = (f"Residuals look non-normal: skewness {skew:.2f} and kurtosis {kurt:.2f} differ "
                   f"from a normal curve's 0 and 3 (Jarque-Bera {_fmt_p(p)}). Check the Q-Q plot "
                   "for outliers or a skewed response; estimates stay unbiased, but small-sample "
                   "intervals may mislead.")
    else:
        reading = (f"No sign of non-normal residuals: skewness {skew:.2f} and kurtosis {kurt:.2f} "
                   f"are close to a normal curve's 0 and 3 (Jarque-Bera {_fmt_p(p)}).")
    return _Row(name, float(jb), "2", p, reading, f"skewness {skew:.3g}, kurtosis {kurt:.3g}")


# --------------------------------------------------------------------------------------------
# Harvey-Collier


def _harvey_collier(d: _Data, *, alpha: float) -> _Row:
    name = "Harvey-Collier"
    if d.exact:
        return _undefined(name, _EXACT, d.order_note)
    n, k = d.n, d.k
    if n - k < 2:
        return _undefined(name, f"it needs at least {k + 2} rows for {k} coefficients.", d.order_note)
    w, start = _recursive_residuals(d)
    note = d.order_note
    if w is None:
        return _undefined(name, "no stretch of rows at the start determines all coefficients.", note)
    if start > k:
        note = _join(note, f"recursion starts after {start} rows (the first {k} rows in order do "
                           "not determine all coefficients)")
    m = w.size
    if m < 2:
        return _undefined(name, "too few recursive residuals.", note)
    mean = float(w.mean())
    sd = float(np.sqrt(np.sum((w - mean) ** 2) / (m - 1)))
    if not sd > 0:
        return _undefined(name, "the recursive residuals do not vary.", note)
    t = math.sqrt(m) * mean / sd
    p = float(2 * stats.t.sf(abs(t), m - 1))
    if d.perm is None:
        along = "row order"
        caveat = (" The rows were taken as they come, so this speaks only to whatever that order "
                  "follows; pass a time order if there is one.")
    else:
        along, caveat = "time order", ""
    if p < alpha:
        reading = (f"The one-step-ahead prediction errors drift to one side along {along} "
                   f"(Harvey-Collier {_fmt_p(p)}): a straight-line form may not hold across that "
                   "ordering; try a curved or trend term for what the rows are sorted by." + caveat)
    else:
        reading = (f"No drift in the one-step-ahead prediction errors along {along} "
                   f"(Harvey-Collier {_fmt_p(p)})." + caveat)
    return _Row(name, float(t), str(m - 1), p, reading, note)


def _recursive_residuals(d: _Data) -> tuple[np.ndarray | None, int]:
    """Recursive residuals of the whitened model in time order, by blocks (see run_checks).

    Each outer block starts from the fit to all earlier rows: its triangular factor ``R`` and
    coefficients ``b``.  In coordinates whitened by ``R`` that fit is the identity information
    matrix with zero cross products.  A block takes rows while the sum of their whitened squared
    lengths ``|x R^-1|^2`` stays below ``_HC_TAU``, which bounds the condition number of every
    information matrix inside it by ``1 + _HC_TAU`` whatever the design's own conditioning; a
    single row beyond that bound is handled alone by the one-row formula.  The block is cut into
    inner blocks of ``_HC_BLOCK`` rows whose recursive residuals all come from one stack of
    Cholesky factorisations (see ``_inner_recursive``), so the Python loop runs once per outer
    block (about ``n / _HC_OUTER`` times on ordinary data).  ``R`` is then updated through the
    whitened information matrix, which the bound keeps as accurate as a Householder update (on
    a degree-5 polynomial in time, the residuals agree with a row-by-row Givens update in
    80-bit arithmetic to 4e-13 of their typical size; without the bound the first ones were off
    by 2e-3).
    """
    n, k = d.n, d.k
    perm, sw = d.perm, d.sw
    # Recursive residuals depend on the columns only through the spaces that the leading rows
    # span, so with a constant column the others may be moved by a multiple of it.  A column
    # far from zero for its spread (a calendar year, a timestamp) is centred: it then no longer
    # nearly repeats the constant.  Only columns whose every value lies on the mean's side
    # beyond half the mean are moved; for them x - mean is no larger than x, so no digit of the
    # data is lost (centring values near zero, such as a power of time, would lose them).
    centre = None
    if d.const_cols.size and n:
        mean = d.colmean
        lossless = ((d.X.min(axis=0) >= mean / 2) & (mean > 0)) | (
            (d.X.max(axis=0) <= mean / 2) & (mean < 0))
        lossless[d.const_cols] = False
        if lossless.any():
            centre = np.where(lossless, mean, 0.0)

    def rows(a: int, b: int):
        idx = slice(a, b) if perm is None else perm[a:b]
        Xb = d.X[idx] if centre is None else d.X[idx] - centre
        yb = d.y[idx]
        if sw is not None:
            s = sw[idx]
            Xb = Xb * s[:, None]
            yb = yb * s
        return Xb, yb

    start = _full_rank_start(rows, n, k)
    if start is None:
        return None, 0
    X0, y0 = rows(0, start)
    Ra = np.linalg.qr(np.column_stack([X0, y0]), mode="r")
    R, z = np.triu(Ra[:k, :k]), Ra[:k, k]
    eye = np.eye(k)
    m = _HC_BLOCK
    # one bordered matrix per inner block (see _inner_recursive), allocated once
    B = np.zeros((-(-_HC_OUTER // m), k + m + 1, k + m + 1))
    B[:, np.arange(k, k + m), np.arange(k, k + m)] = 1.0
    out = np.empty(n - start)
    s = start
    ask = m
    # Every product in this loop is small enough that OpenBLAS keeps it on one thread: on a
    # busy machine a threaded call, and the helper thread spinning after it, can cost
    # milliseconds where the work takes microseconds.
    while s < n:
        # np.linalg.inv and solve (LU; no row exchanges for an upper triangular matrix) rather
        # than triangular solves, which OpenBLAS threads even for 15 x 15
        Rinv = np.linalg.inv(R)
        b = Rinv @ z
        Xb, yb = rows(s, min(n, s + ask))
        V = _stacked_product(Xb, Rinv, m)  # Xb R^-1
        q = np.einsum("ij,ij->i", V, V)
        size = min(Xb.shape[0], max(1, int(np.searchsorted(np.cumsum(q), _HC_TAU, side="right"))))
        Xb, yb, V = Xb[:size], yb[:size], V[:size]
        # prediction errors from the fit to the rows before the block
        r = yb - np.einsum("ij,j->i", Xb, b)
        # a power of two brings r near 1 (exact): the bordered matrix holds its squares
        big = float(np.max(np.abs(r)))
        rs = math.ldexp(1.0, -math.frexp(big)[1]) if 0 < big < math.inf else 1.0
        r = r * rs
        if size == 1:
            out[s - start] = r[0] / math.sqrt(1.0 + q[0]) / rs
            info, cross = eye + np.outer(V[0], V[0]), V[0] * r[0]
        else:
            w, info, cross = _inner_recursive(V, r, B)
            out[s - start:s - start + size] = w / rs
        # Fold the block into the fit.  [R z; Xb yb] = [I 0; V r] [R z; 0 1], and the QR
        # factor of [I 0; V r] comes from the Cholesky factor C of info = I + V'V (condition
        # number below 1 + _HC_TAU, so this is as accurate as a Householder update):
        # R <- C'R, z <- C'z + C^-1 V'r.
        C = np.linalg.cholesky(info)
        z = C.T @ z + np.linalg.solve(C, cross) / rs
        R = C.T @ R
        s += size
        ask = min(_HC_OUTER, max(m, 2 * size))
    return out, start


def _stacked_product(A: np.ndarray, M: np.ndarray, rows: int) -> np.ndarray:
    """``A @ M`` as a stack of products of ``rows`` rows each (each small enough for one thread)."""
    c = A.shape[0]
    J = -(-c // rows)
    P = np.zeros((J * rows, A.shape[1]))
    P[:c] = A
    return np.matmul(P.reshape(J, rows, -1), M).reshape(J * rows, -1)[:c]


def _inner_recursive(V: np.ndarray, r: np.ndarray,
                     B: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Recursive residuals of rows ``V`` (whitened) with prediction errors ``r`` (see below).

    The prior is the identity information with zero cross products.  For an inner block with
    rows ``W``, errors ``e`` and prior information ``G`` with cross products ``h`` (sums over
    the earlier inner blocks), the block's recursive residuals are ``L^-1 (e - W G^-1 h)`` with
    ``L L' = I + W G^-1 W'``.  With ``A = G + W'W``, ``a = h + W'e`` and ``F`` the row reversal,
    the Schur complement of ``A`` in ``[[A, W'F], [FW, I]]`` is ``F (I + W G^-1 W')^-1 F``,
    whose Cholesky factor is ``F L^-T F``; bordering with ``[a, Fe]`` makes the last row of the
    Cholesky factor of::

        [[A,    W'F,  a ],
         [FW,   I,    Fe],
         [a',   e'F,  c ]]

    equal to ``[*, F L^-1 (e - W G^-1 h), *]``: the recursive residuals, reversed.  ``c`` only
    has to keep the matrix positive definite: ``2 (h'h + e'e) + 1`` does, since ``a'A^-1 a``
    plus the squared recursive residuals is at most ``h'G^-1 h + e'e``.  ``B`` is the
    buffer for the bordered matrices, its identity blocks already set; the rest is overwritten.
    Returns the recursive residuals, ``I + V'V`` and ``V'r``.
    """
    size, k = V.shape
    m = _HC_BLOCK
    J = -(-size // m)
    # rows of zeros pad the last inner block at its end: later rows never change earlier ones
    Vs = np.zeros((J * m, k))
    Vs[:size] = V
    Vs = Vs.reshape(J, m, k)
    es = np.zeros(J * m)
    es[:size] = r
    es = es.reshape(J, m)
    U = np.matmul(Vs.transpose(0, 2, 1), Vs)
    hv = np.einsum("jik,ji->jk", Vs, es)
    A = np.cumsum(U, axis=0)
    A[:, np.arange(k), np.arange(k)] += 1.0
    a = np.cumsum(hv, axis=0)
    h_before = a - hv
    Wf = Vs[:, ::-1, :]
    ef = es[:, ::-1]
    B = B[:J]
    B[:, :k, :k] = A
    B[:, k:k + m, :k] = Wf
    B[:, :k, k:k + m] = Wf.transpose(0, 2, 1)
    B[:, -1, :k] = a
    B[:, :k, -1] = a
    B[:, -1, k:k + m] = ef
    B[:, k:k + m, -1] = ef
    B[:, -1, -1] = 2.0 * (np.einsum("jk,jk->j", h_before, h_before)
                          + np.einsum("ji,ji->j", es, es)) + 1.0
    # LAPACK factorises each matrix of the stack on one thread (OpenBLAS threads its Cholesky
    # factorisation only from 64 columns: keep k + _HC_BLOCK + 1 below that for k <= 30)
    L = np.linalg.cholesky(B)
    return L[:, -1, k:k + m][:, ::-1].reshape(-1)[:size], A[-1], a[-1]


def _full_rank_start(rows, n: int, k: int) -> int | None:
    """Shortest prefix (in time order) whose columns are linearly independent."""

    def full(t: int) -> bool:
        Xb, _ = rows(0, t)
        norms = np.sqrt(np.einsum("ij,ij->j", Xb, Xb))
        if np.any(norms == 0):
            return False
        r = sla.qr(Xb / norms, mode="r", pivoting=True)[0]
        dg = np.abs(np.diag(r))
        return bool(dg.size == k and dg.min() > 1e-8 * dg.max())

    if full(k):
        return k
    lo, hi = k, k
    while not full(hi):
        if hi >= n:
            return None
        lo, hi = hi, min(n, 2 * hi)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if full(mid):
            hi = mid
        else:
            lo = mid
    return hi


# --------------------------------------------------------------------------------------------
# VIF


def _vif_values(d: _Data, ls: LeastSquares, *, has_const: bool) -> pd.Series:
    kept = np.asarray(ls.kept, dtype=int)
    V = ls.xtx_inv
    const = set(d.const_cols.tolist())
    out = {}
    wts = None if d.sw is None else d.sw * d.sw
    for pos, col in enumerate(kept):
        if pos in const:
            continue
        x = d.X[:, pos]
        if has_const:
            centre = d.colmean[pos] if wts is None else _dot(wts, x) / float(wts.sum())
            dev = x - centre
        else:
            dev = x
        ss = _dot(dev, dev) if wts is None else _dot(wts, dev * dev)
        out[ls.names[col]] = float(V[pos, pos]) * ss
    for nm in ls.aliased:
        out[nm] = math.inf
    order = [nm for nm in ls.names if nm in out]
    return pd.Series([out[nm] for nm in order], index=pd.Index(order, dtype=object), name="vif",
                     dtype=float)


def _vif_row(name, value: float) -> _Row:
    label = f"VIF: {name}"
    if math.isinf(value):
        return _Row(label, value, "", math.nan,
                    f"{name} is an exact combination of other columns, so the fit dropped it "
                    "(aliased); remove it or the columns it repeats.",
                    "aliased")
    if value > _VIF_HIGH:
        reading = (f"High collinearity: VIF {_fmt(value)} for {name} (above 10, common practice) "
                   "means its coefficient is poorly determined because the other regressors "
                   "nearly reproduce it. Consider dropping or combining related variables, or "
                   "centring it if it enters a polynomial or interaction.")
    else:
        reading = (f"VIF {_fmt(value)} for {name}: not strongly collinear with the other regressors "
                   "(common practice flags values above 10).")
    return _Row(label, value, "", math.nan, reading, "rule of thumb, not a test")
