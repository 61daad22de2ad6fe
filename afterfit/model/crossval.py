"""Cross-validated prediction error of a linear model, from one pass over the rows.

Every fold is reduced once to the small upper-triangular factor ``R_f`` of its weighted, augmented
rows ``sqrt(w) [X_f | y_f]`` (Householder QR, LAPACK ``geqrf``, on tiles of at most 16 MiB whose
factors are stacked and re-factored, so the data are never copied whole).  Because ``R_f' R_f``
equals that fold's Gram matrix exactly, the factor of any union of folds is the QR of the
stacked factors of its folds: a matrix with at most ``2 (p + 1)`` rows here, since the training
set of fold ``j`` is assembled from a running prefix (folds before ``j``) and suffix (folds after
``j``).  So ten-fold
cross-validation costs one QR of the data plus ``O(k p^3)`` small work, not ten fits; and, unlike
summing Gram blocks, it never squares the condition number of the design.

Rank deficiency of a training set (for example a dummy column that is all zero outside the
held-out fold) is handled by the rule :func:`afterfit.model.ols.fit_ols` uses: columns are taken
in order and one is aliased when what is left of it after projection on the kept earlier columns
is at most ``max(n, p) * eps`` of its norm (so the later of two collinear columns is dropped).
An aliased column is dropped for that fold and contributes nothing to the fold's predictions (its
coefficient is taken as 0, which for a column that is all zero on the training rows is also the
minimum-norm answer); ``per_fold`` reports the rank and the dropped names.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.linalg as sla
from scipy.linalg import lapack

__all__ = ["CVResult", "make_folds", "cross_validate"]

SCHEMES = ("kfold", "blocked", "forward")
# rows per tile x columns: 16 MiB of doubles.  Smaller, cache-sized tiles were as fast on a quiet
# machine but many times slower on a busy one, where every small threaded BLAS call waits for
# its threads; larger tiles only add memory
_TILE_ELEMENTS = 1 << 21
# up to this many folds, predictions come from one matrix product over X
_GEMM_FOLDS = 64
_GEMM_LOOKUP = 1 << 16


@dataclass(frozen=True, eq=False)
class CVResult:
    """Cross-validated prediction error of one model.

    Errors are root mean squared errors over rows, all with the same normalisation so that the
    fit meter can put them side by side.  With weights ``w`` every mean is a weighted mean,
    ``sqrt(sum(w * e**2) / sum(w))``, which does not change when all weights are multiplied by a
    constant.

    Attributes
    ----------
    scheme : str
        ``"kfold"``, ``"blocked"`` or ``"forward"``.
    k : int
        Number of held-out folds (label ``-1``, "train only", is not counted).
    folds : ndarray of int
        Fold label of every row used; ``-1`` marks rows that are only ever trained on.
    rmse_train : float
        RMSE of the fit to all rows: ``sqrt(SSR / n)`` (no degrees-of-freedom correction, so it
        is directly comparable with ``rmse_cv``).
    rmse_cv : float
        Pooled over held-out rows: ``sqrt(sum of squared held-out errors / number of held-out
        rows)``, not the mean of per-fold RMSEs.
    rmse_cv_se : float
        Standard error of the per-fold RMSEs across folds, ``std(rmse_test, ddof=1) / sqrt(k)``,
        as used by the one-standard-error rule (common practice).  ``n_train`` and ``n_test``
        count rows, including any of weight 0.
    per_fold : DataFrame
        One row per held-out fold: ``fold``, ``n_train``, ``n_test``, ``rmse_test``,
        ``rmse_train`` (in-sample RMSE of that fold's training fit), ``rank`` and ``aliased``
        (tuple of column names dropped for rank deficiency in that training set).
    predictions : ndarray
        Held-out prediction for every row, from the fit to its fold's training set; NaN for
        train-only rows.
    params : ndarray, shape (k, p)
        Coefficients of each fold's training fit; NaN at columns dropped for that fold.
    names : tuple of str
        Column names of ``X``.
    """

    scheme: str
    k: int
    folds: np.ndarray
    rmse_train: float
    rmse_cv: float
    rmse_cv_se: float
    per_fold: pd.DataFrame
    predictions: np.ndarray
    params: np.ndarray
    names: tuple


def make_folds(n, *, k=10, seed=0, order=None, scheme="kfold") -> np.ndarray:
    """Assign ``n`` rows to cross-validation folds.

    Parameters
    ----------
    n : int
        Number of rows (at least 2).
    k : int
        Number of held-out folds, at least 2.
    seed : int
        Seed of the shuffle for ``"kfold"``; the other schemes are deterministic.
    order : array-like of length n, optional
        Sort key giving time order (times, datetimes or any sortable values; ties keep row order).
        Used by ``"blocked"`` and ``"forward"``; ``None`` means the rows are already in time
        order.  To pass a permutation ``perm`` listing rows in time order, pass
        ``np.argsort(perm)``.
    scheme : {"kfold", "blocked", "forward"}
        ``"kfold"``: rows shuffled with ``seed`` and dealt into k folds whose sizes differ by at
        most one.  ``"blocked"``: k contiguous blocks in time order, labelled 0..k-1 from the
        earliest.  ``"forward"`` (forward chaining): k + 1 contiguous blocks in time order; the
        first is labelled ``-1`` ("train only": never held out), the others 0..k-1; fold ``j`` is
        then predicted from the train-only block and folds before ``j`` only.

    Returns
    -------
    ndarray of int, length n
        Fold label of each row.
    """
    n = _as_count(n, "n")
    k = _as_count(k, "k")
    scheme = _check_scheme(scheme)
    if k < 2:
        raise ValueError(f"k={k}: cross-validation needs at least 2 folds; use k=5 or k=10")
    blocks = k + 1 if scheme == "forward" else k
    if blocks > n:
        if scheme == "forward":
            raise ValueError(
                f"forward chaining with k={k} needs k + 1 = {blocks} time blocks but there are "
                f"only n={n} rows; use k <= {n - 1}"
            )
        raise ValueError(
            f"k={k} folds need at least k rows but there are only n={n}; use k <= {n} "
            "(k = n is leave-one-out)"
        )
    if scheme == "kfold":
        rng = np.random.default_rng(seed)
        return rng.permutation(np.arange(n) % k).astype(np.intp)
    rank_to_row = np.arange(n) if order is None else _time_order(order, n)
    # block of sorted position i: floor(i * blocks / n) gives sizes that differ by at most one
    block = (np.arange(n) * blocks) // n
    labels = np.empty(n, dtype=np.intp)
    labels[rank_to_row] = block - 1 if scheme == "forward" else block
    return labels


def cross_validate(X, y, folds, *, weights=None, scheme="kfold", names=None) -> CVResult:
    """Cross-validate the least-squares fit of ``y`` on ``X`` over the given folds.

    Parameters
    ----------
    X : array-like, shape (n, p)
        Design matrix (include the intercept column if the model has one).
    y : array-like, shape (n,)
        Response.
    folds : array-like of int, shape (n,)
        Fold labels, as from :func:`make_folds`: ``0..`` are held-out folds, ``-1`` rows are only
        trained on.  For ``"forward"`` the numeric order of labels is time order.
    weights : array-like, shape (n,), optional
        Non-negative case weights (as in weighted least squares).  Fits minimise
        ``sum(w * e**2)`` and every RMSE is the weighted one, ``sqrt(sum(w * e**2) / sum(w))``.
        As in ``fit_ols``, rows of weight 0 take no part in any fit and add nothing to the
        errors, but still get a held-out prediction; a fold whose rows all have weight 0 gets
        ``rmse_test`` NaN and is left out of ``rmse_cv_se``.
    scheme : {"kfold", "blocked", "forward"}
        How training sets are formed: for ``"kfold"`` and ``"blocked"`` fold ``j`` is predicted
        from every other row; for ``"forward"`` only from rows labelled ``-1`` and folds whose
        label is below ``j``.
    names : sequence of str, optional
        Column names (default ``x0, x1, ...``), used in ``per_fold["aliased"]``.

    Returns
    -------
    CVResult

    Notes
    -----
    One pass over the rows builds each fold's R factor; training sets are combined from those
    factors (see the module docstring), then each held-out fold is predicted from its training
    coefficients.  A training set that cannot estimate every column (collinear or all-zero
    columns on its rows) drops the aliased ones by :func:`~afterfit.model.ols.fit_ols`'s rule
    (the later of collinear columns goes); they predict nothing for that fold (coefficient 0,
    which equals the minimum-norm answer for a column that is all zero on the training rows).
    A training set with fewer rows than columns is an error.
    """
    X, y, folds, sw, names = _check_inputs(X, y, folds, weights, names)
    scheme = _check_scheme(scheme)
    n, p = X.shape
    if folds.min() < -1:
        raise ValueError(
            f"fold labels must be -1 (train only) or 0, 1, 2, ...; found {folds.min()}"
        )
    small = folds.max() < np.iinfo(np.int16).max
    # small labels: counting instead of sorting, and numpy's radix sort for the stable argsort
    labels = np.flatnonzero(np.bincount(folds + 1)) - 1 if small else np.unique(folds)
    test_labels = labels[labels >= 0]
    k = len(test_labels)
    if k < 2:
        raise ValueError(
            f"cross-validation needs at least 2 held-out folds, found {k}; "
            "make labels with make_folds(n, k=10)"
        )
    has_train_only = labels[0] == -1
    if scheme == "forward" and not has_train_only:
        raise ValueError(
            "forward chaining needs rows labelled -1 (train only) before the first held-out fold, "
            "or the first fold has nothing to learn from; make labels with "
            "make_folds(n, k=k, order=times, scheme='forward')"
        )

    # one stable sort lists each fold's rows (ascending, so gathers walk X forwards); no copy of X
    perm = np.argsort(folds.astype(np.int16) if small else folds, kind="stable")
    bounds = np.searchsorted(folds[perm], np.concatenate([labels, [labels[-1] + 1]]))
    fold_rows = [perm[bounds[i]:bounds[i + 1]] for i in range(len(labels))]
    counts = np.diff(bounds)
    fold_r = _fold_factors(X, y, sw, folds, labels, fold_rows)
    if sw is None:
        wsum, npos = counts.astype(float), counts
    else:
        # zero-weight rows take no part in fits or weighted errors, as in fit_ols
        wsum = np.add.reduceat((sw**2)[perm], bounds[:-1])
        npos = np.add.reduceat((sw > 0)[perm].astype(np.intp), bounds[:-1])

    head = 1 if has_train_only else 0
    base = fold_r[0] if has_train_only else None
    base_n = int(counts[0]) if has_train_only else 0
    base_w = float(wsum[0]) if has_train_only else 0.0
    base_pos = int(npos[0]) if has_train_only else 0
    tr, tn, tw, tpos = fold_r[head:], counts[head:], wsum[head:], npos[head:]
    # prefix[j]: train-only rows and folds before j; suffix[j]: folds j and after
    prefix = [base]
    for r in tr:
        prefix.append(_stack_r(prefix[-1], r))
    suffix = [None] * (k + 1)
    for j in range(k - 1, -1, -1):
        suffix[j] = _stack_r(tr[j], suffix[j + 1])
    w_total = float(wsum.sum())

    params = np.full((k, p), np.nan)
    sols = []
    for j in range(k):
        if scheme == "forward":
            r_train = prefix[j]
            n_train = base_n + int(tn[:j].sum())
            n_fit = base_pos + int(tpos[:j].sum())
        else:
            r_train = _stack_r(prefix[j], suffix[j + 1])
            n_train = n - int(tn[j])
            n_fit = int(npos.sum()) - int(tpos[j])
        if n_fit < p:
            raise ValueError(
                f"held-out fold {test_labels[j]} leaves {n_fit} training rows (with positive "
                f"weight) for {p} columns; use fewer folds, fewer terms, or (forward chaining) "
                "a larger first block"
            )
        sol = _solve_small(r_train, n_fit)
        params[j, sol.kept] = sol.coef
        sols.append((sol, n_train))
    coef = np.where(np.isnan(params), 0.0, params)
    predictions = _predict(X, folds, test_labels, coef, fold_rows[head:])
    we2 = (y - predictions) ** 2
    if sw is not None:
        we2 *= sw**2
    sse = np.array([we2[rows].sum() for rows in fold_rows[head:]])
    if scheme == "forward":
        w_train = base_w + np.concatenate([[0.0], np.cumsum(tw)[:-1]])
    else:
        w_train = w_total - tw
    rows = []
    for j, (sol, n_train) in enumerate(sols):
        kept = set(sol.kept.tolist())
        rows.append(
            {
                "fold": int(test_labels[j]),
                "n_train": n_train,
                "n_test": int(tn[j]),
                "rmse_test": float(np.sqrt(sse[j] / tw[j])) if tw[j] > 0 else np.nan,
                "rmse_train": float(np.sqrt(sol.ssr / w_train[j])),
                "rank": sol.rank,
                "aliased": tuple(names[i] for i in range(p) if i not in kept),
            }
        )
    full = _solve_small(prefix[k], int(npos.sum()))
    scored = int(np.sum(tw > 0))
    per_fold = pd.DataFrame(rows)
    for arr in (folds, predictions, params):
        arr.flags.writeable = False  # results are immutable, like the dataclass holding them
    return CVResult(
        scheme=scheme,
        k=k,
        folds=folds,
        rmse_train=float(np.sqrt(full.ssr / w_total)),
        rmse_cv=float(np.sqrt(sse.sum() / tw.sum())) if tw.sum() > 0 else np.nan,
        rmse_cv_se=(float(per_fold["rmse_test"].std(ddof=1) / np.sqrt(scored))
                    if scored else np.nan),
        per_fold=per_fold,
        predictions=predictions,
        params=params,
        names=names,
    )


# --- internals -------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Small:
    kept: np.ndarray
    coef: np.ndarray
    rank: int
    ssr: float


def _fold_r(X, y, sw, rows):
    """R factor of the weighted augmented rows ``sqrt(w) [X | y]`` of one fold (<= p+1 rows).

    Rows are factored in bounded tiles (TSQR: each tile's R is stacked onto the running R and
    re-factored), so no copy of the whole fold is made.
    """
    p = X.shape[1]
    R = None
    tile = max(_TILE_ELEMENTS // (p + 1), p + 1)
    buf = np.empty((min(tile, len(rows)), p + 1), order="F")
    by_column = X.flags.f_contiguous and not X.flags.c_contiguous
    for start in range(0, len(rows), tile):
        ii = rows[start:start + tile]
        # Fortran order so LAPACK factors in place
        Z = buf if len(ii) == len(buf) else np.empty((len(ii), p + 1), order="F")
        if by_column:
            for c in range(p):  # a 1-D gather per column is several times faster here
                np.take(X[:, c], ii, out=Z[:, c])
        else:
            Z[:, :p] = X.take(ii, axis=0)
        np.take(y, ii, out=Z[:, p])
        if sw is not None:
            Z *= sw[ii, None]
        qr, _tau, _work, info = lapack.dgeqrf(Z, overwrite_a=1)
        if info != 0:  # pragma: no cover - LAPACK argument error, not data dependent
            raise RuntimeError(f"LAPACK dgeqrf failed with info={info}")
        R = _stack_r(R, np.triu(qr[: min(len(ii), p + 1)]))
    return R


def _fold_factors(X, y, sw, folds, labels, fold_rows):
    """R factor of every fold, as :func:`_fold_r`, from one pass over the rows of ``X``.

    For a column-major ``X`` the rows are read window by window: each window's rows are
    gathered once, grouped by fold (a cache-resident gather per column), and each fold's block
    is factored and stacked onto that fold's R.  Gathering each fold from the whole of ``X``
    instead reads all of ``X`` once per fold when folds are shuffled.
    """
    n, p = X.shape
    k = len(labels)
    if k < 2 or k > _GEMM_FOLDS or not (X.flags.f_contiguous and not X.flags.c_contiguous):
        return [_fold_r(X, y, sw, rows) for rows in fold_rows]
    lookup = np.full(int(labels[-1]) + 2, -1, dtype=np.int16)
    lookup[labels + 1] = np.arange(k)
    window = max(_TILE_ELEMENTS // 2 // (p + 1), 4 * (p + 1))
    R = [None] * k
    for s in range(0, n, window):
        e = min(s + window, n)
        fw = lookup[folds[s:e] + 1]
        order = np.argsort(fw, kind="stable")  # radix sort of small labels
        order += s
        bounds = np.concatenate([[0], np.cumsum(np.bincount(fw, minlength=k))])
        Z = np.empty((e - s, p + 1), order="F")
        for c in range(p):
            np.take(X[:, c], order, out=Z[:, c])
        np.take(y, order, out=Z[:, p])
        if sw is not None:
            Z *= sw[order, None]
        for j in range(k):
            a, b = bounds[j], bounds[j + 1]
            if a == b:
                continue
            block = np.array(Z[a:b], order="F")  # contiguous, so LAPACK factors it in place
            qr, _tau, _work, info = lapack.dgeqrf(block, overwrite_a=1)
            if info != 0:  # pragma: no cover - LAPACK argument error, not data dependent
                raise RuntimeError(f"LAPACK dgeqrf failed with info={info}")
            R[j] = _stack_r(R[j], np.triu(qr[: min(b - a, p + 1)]))
    return R


def _predict(X, folds, test_labels, coef, test_rows):
    """Held-out prediction of every row from its fold's coefficients (NaN for train-only rows)."""
    n, p = X.shape
    k = len(test_labels)
    out = np.full(n, np.nan)
    if k > _GEMM_FOLDS:
        for j, rows in enumerate(test_rows):
            out[rows] = X[rows] @ coef[j]
        return out
    # few folds: one sequential pass of X @ coef.T (a matrix product) beats k random gathers
    lookup = None
    if test_labels[-1] < _GEMM_LOOKUP:
        lookup = np.full(int(test_labels[-1]) + 2, -1)
        lookup[test_labels + 1] = np.arange(k)
    step = max(_TILE_ELEMENTS // (p + k), 1)
    for s in range(0, n, step):
        f = folds[s:s + step]
        if lookup is not None:
            c = lookup[f + 1]
            held = c >= 0
        else:
            c = np.minimum(np.searchsorted(test_labels, f), k - 1)
            held = test_labels[c] == f
        P = X[s:s + step] @ coef.T
        out[s:s + step][held] = P[np.flatnonzero(held), c[held]]
    return out


def _stack_r(a, b):
    """R factor of the union of two row sets given their R factors (None = no rows)."""
    if a is None:
        return b
    if b is None:
        return a
    S = np.vstack([a, b])
    return np.triu(np.linalg.qr(S, mode="r"))[: min(S.shape)]


def _solve_small(Rt, n_rows):
    """Least squares on an augmented R factor, dropping aliased columns by ``fit_ols``'s rule.

    Columns are taken in their given order; a column is aliased when what is left of it after
    projection on the kept earlier columns has norm at most ``max(n, p) * eps`` times its own, so
    the later of two collinear columns is the one dropped.  The triangle is the exact factor of a
    matrix within rounding of the training rows, so deciding on it is as good as on the rows.
    """
    from afterfit.model.ols import estimable_columns

    A = Rt[:, :-1]
    c = Rt[:, -1]
    kept = estimable_columns(A, n_rows)
    if len(kept) == 0:
        return _Small(kept=kept, coef=np.zeros(0), rank=0, ssr=float(c @ c))
    # unit-norm columns keep the small solve as well conditioned as the problem allows
    norms = np.linalg.norm(A[:, kept], axis=0)
    Q, R = np.linalg.qr(A[:, kept] / norms)
    coef = sla.solve_triangular(R, Q.T @ c) / norms
    res = c - A[:, kept] @ coef
    return _Small(kept=kept, coef=coef, rank=len(kept), ssr=float(res @ res))


def _as_count(value, name):
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        raise ValueError(f"{name} must be a whole number, got {value!r}")
    value = int(value)
    if name == "n" and value < 2:
        raise ValueError(f"n={value}: cross-validation needs at least 2 rows")
    return value


def _check_scheme(scheme):
    if scheme not in SCHEMES:
        raise ValueError(f"scheme must be one of {', '.join(map(repr, SCHEMES))}, got {scheme!r}")
    return scheme


def _time_order(order, n):
    """Row indices sorted by ``order`` (stable), with a clear error for bad keys."""
    key = pd.Series(np.asarray(order) if not isinstance(order, (pd.Series, pd.Index)) else order)
    if key.ndim != 1 or len(key) != n:
        raise ValueError(f"order must have one value per row ({n}), got length {len(key)}")
    missing = key.isna().to_numpy()
    if missing.any():
        raise ValueError(
            f"order has {int(missing.sum())} missing values (first at row "
            f"{int(np.flatnonzero(missing)[0])}); fill them or drop those rows first"
        )
    key = key.reset_index(drop=True)
    try:
        return key.sort_values(kind="stable").index.to_numpy()
    except TypeError as exc:
        raise ValueError(
            f"order must hold sortable values of one kind (times or numbers): {exc}"
        ) from None


def _check_inputs(X, y, folds, weights, names):
    try:
        X = np.asarray(X, dtype=float)
        y = np.asarray(y, dtype=float)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"X and y must be numeric: {exc}") from None
    if X.ndim != 2:
        raise ValueError(
            f"X must be 2-D (rows x columns), got {X.ndim}-D; for one column use X.reshape(-1, 1)"
        )
    n, p = X.shape
    if n < 2:
        raise ValueError(f"X has {n} rows; cross-validation needs at least 2")
    if y.ndim == 2 and y.shape[1] == 1:
        y = y[:, 0]
    if y.ndim != 1 or len(y) != n:
        raise ValueError(f"y must be 1-D with one value per row of X ({n}), got shape {y.shape}")
    if p == 0:
        raise ValueError("X has no columns; include at least an intercept column of ones")
    for name, arr in (("X", X), ("y", y)):
        # a column sum is finite unless the column holds NaN/inf (or overflows): cheap first test
        if np.isfinite(arr.sum(axis=0)).all():
            continue
        bad = ~np.isfinite(arr)
        if bad.any():
            row = int(np.flatnonzero(bad.reshape(n, -1).any(axis=1))[0])
            raise ValueError(
                f"{name} has missing or infinite values (first at row {row}); "
                "drop or fill those rows before cross-validating"
            )
    folds = np.asarray(folds)
    if folds.shape != (n,):
        raise ValueError(f"folds must have one label per row ({n}), got shape {folds.shape}")
    whole = np.issubdtype(folds.dtype, np.integer) or (
        np.issubdtype(folds.dtype, np.floating)
        and np.all(np.isfinite(folds))
        and np.all(folds == np.round(folds))
    )
    if not whole:
        raise ValueError("folds must be whole-number labels (-1 for train only, 0, 1, ...)")
    folds = folds.astype(np.intp)
    sw = None
    if weights is not None:
        w = np.asarray(weights, dtype=float)
        if w.shape != (n,):
            raise ValueError(f"weights must have one value per row ({n}), got shape {w.shape}")
        if not np.all(np.isfinite(w)) or np.any(w < 0) or not np.any(w > 0):
            raise ValueError(
                "weights must be finite and non-negative with at least one positive; "
                "check the weight column for missing or negative values"
            )
        sw = np.sqrt(w)
    if names is None:
        names = tuple(f"x{i}" for i in range(p))
    else:
        names = tuple(str(v) for v in names)
        if len(names) != p:
            raise ValueError(f"names has {len(names)} entries for {p} columns of X")
    return X, y, folds, sw, names
