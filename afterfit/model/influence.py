"""Per-row influence measures of a least-squares fit, in closed form (no leave-one-out refits).

For the whitened residual ``e_i = sqrt(w_i) * resid_i``, leverage ``h_i`` (hat diagonal of the
whitened design), ``s^2 = ssr / df_resid`` and ``p = rank``:

- internally studentized residual ``r_i = e_i / (s * sqrt(1 - h_i))``
- externally studentized residual ``t_i = r_i * sqrt((df - 1) / (df - r_i^2))``, which equals
  ``e_i / (s_(i) * sqrt(1 - h_i))`` with ``s_(i)`` the residual SD after deleting row i
- Cook's distance ``D_i = r_i^2 * h_i / (p * (1 - h_i))``
- DFFITS ``t_i * sqrt(h_i / (1 - h_i))``

A weighted fit gives the measures of ordinary least squares on the whitened data
(``sqrt(w) * X``, ``sqrt(w) * y``), i.e. deleting row i deletes its weighted contribution.
These are R's ``lm.influence``/``influence.measures`` definitions.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from afterfit.model.ols import LEVERAGE_ONE_TOL, LeastSquares

__all__ = ["influence_frame", "FLAG_COLUMNS"]

FLAG_COLUMNS = (
    "flag_leverage",
    "flag_cooks",
    "flag_student",
    "flag_dffits",
    "flag_leverage_one",
)


def influence_frame(ls: LeastSquares, index=None) -> pd.DataFrame:
    """Leverage, studentized residuals, Cook's distance and DFFITS per row, with flags.

    Parameters
    ----------
    ls : LeastSquares
        The fit (ordinary or weighted).
    index : array_like, optional
        Row labels for the result (one per row of ``ls.X``); default 0..n-1.

    Returns
    -------
    pandas.DataFrame
        Columns ``leverage``, ``student_int``, ``student_ext``, ``cooks_d``, ``dffits`` and the
        boolean flags below.  ``df.attrs["rules"]`` maps each flag column to the rule used, with
        its numeric threshold; ``df.attrs["undefined"]`` says why values are NaN, if any are.

    Notes
    -----
    The flag thresholds are common practice, not tests with a stated error rate (sources from
    memory): leverage above ``2p/n`` (Hoaglin & Welsch 1978); Cook's distance above ``4/n``
    (Cook 1977; the cut-off is a convention); ``|student_ext| > 3``; ``|dffits| > 2 sqrt(p/n)``
    (Belsley, Kuh & Welsch 1980).  Here ``p`` is the rank and ``n`` the number of rows with
    positive weight.

    Undefined values are NaN, never a misleading finite number:

    - ``flag_leverage_one``: rows with ``1 - h <= LEVERAGE_ONE_TOL`` are fitted exactly whatever
      their response (e.g. the only row at a distinct x value, or the only row of a group), so
      their residual is 0/0 information: ``student_int``, ``student_ext``, ``cooks_d`` and
      ``dffits`` are NaN there, and the row is also flagged for leverage.
    - An exact fit (``ls.exact_fit``: residuals at rounding level) or ``df_resid == 0`` leaves no
      residual variance to studentize by: all four residual-based measures are NaN.
    - ``df_resid == 1``: deleting a row leaves no degrees of freedom, so ``student_ext`` and
      ``dffits`` are NaN.
    - Rows with weight 0 take no part in the fit: leverage 0, residual-based measures NaN,
      flags False.
    - If deleting row i would leave an exact fit (all remaining residuals zero),
      ``student_ext`` is +-inf (and so is ``dffits``): the row is an infinitely extreme outlier
      relative to the others.
    """
    n_rows = ls.X.shape[0]
    if index is None:
        index = pd.RangeIndex(n_rows)
    else:
        index = pd.Index(index)
        if len(index) != n_rows:
            raise ValueError(f"index has {len(index)} labels but the fit has {n_rows} rows")

    h = ls.leverage()
    np.clip(h, 0.0, 1.0, out=h)  # rounding can push a leverage-one row a hair past 1
    p = ls.rank
    n = ls.nobs
    df = ls.df_resid
    active = np.ones(n_rows, bool) if ls.weights is None else ls.weights > 0
    one_minus = 1.0 - h
    lev_one = active & (one_minus <= LEVERAGE_ONE_TOL)
    ok = active & ~lev_one

    undefined = []
    nan = np.full(n_rows, np.nan)
    student_int, student_ext, cooks, dffits = nan.copy(), nan.copy(), nan.copy(), nan.copy()
    if df <= 0:
        undefined.append("df_resid is 0: no residual variance, residual-based measures are NaN")
        ok[:] = False
    elif ls.exact_fit:
        undefined.append(
            "exact fit (residuals at rounding level): residual-based measures are NaN"
        )
        ok[:] = False
    if lev_one.any():
        undefined.append(
            f"{int(lev_one.sum())} row(s) with leverage 1 (fitted exactly whatever their "
            "response): residual-based measures are NaN there"
        )
    if ls.weights is not None and not active.all():
        undefined.append(f"{int((~active).sum())} row(s) with weight 0: measures are NaN there")

    if ok.any():
        s = np.sqrt(ls.sigma2)
        # whole-array arithmetic (no boolean-index copies of million-row vectors); entries
        # outside ``ok`` may be 0/0 here and are overwritten with NaN just below
        with np.errstate(divide="ignore", invalid="ignore"):
            r = ls.wresid / (s * np.sqrt(one_minus))
            ratio = h / one_minus
            cooks = r * r * ratio / p
            if df > 1:
                t = r * np.sqrt((df - 1) / (df - r * r))
                # df - r^2 >= 0 in exact arithmetic; at 0 the rest of the data fit exactly
                edge = ok & ~(df - r * r > 0)
                t[edge] = np.copysign(np.inf, r[edge])
                dffits = t * np.sqrt(ratio)
                t[~ok] = np.nan
                dffits[~ok] = np.nan
                student_ext = t
            else:
                undefined.append("df_resid is 1: student_ext and dffits are NaN")
        r[~ok] = np.nan
        cooks[~ok] = np.nan
        student_int = r

    lev_cut = 2.0 * p / n
    cook_cut = 4.0 / n
    dffits_cut = 2.0 * np.sqrt(p / n)
    with np.errstate(invalid="ignore"):
        flags = {
            "flag_leverage": active & (h > lev_cut),
            "flag_cooks": cooks > cook_cut,
            "flag_student": np.abs(student_ext) > 3.0,
            "flag_dffits": np.abs(dffits) > dffits_cut,
            "flag_leverage_one": lev_one,
        }
    out = pd.DataFrame(
        {
            "leverage": h,
            "student_int": student_int,
            "student_ext": student_ext,
            "cooks_d": cooks,
            "dffits": dffits,
            **flags,
        },
        index=index,
        copy=False,  # keep the columns as they are: no consolidation copy of n x 5 floats
    )
    out.attrs["rules"] = {
        "flag_leverage": f"leverage > 2p/n = {lev_cut:.4g} (common practice)",
        "flag_cooks": f"Cook's distance > 4/n = {cook_cut:.4g} (common practice)",
        "flag_student": "|externally studentized residual| > 3 (common practice)",
        "flag_dffits": f"|DFFITS| > 2*sqrt(p/n) = {dffits_cut:.4g} (common practice)",
        "flag_leverage_one": (
            f"1 - leverage <= {LEVERAGE_ONE_TOL:g}: the row is fitted exactly whatever its "
            "response; residual-based measures are undefined (NaN)"
        ),
    }
    out.attrs["undefined"] = undefined
    return out
