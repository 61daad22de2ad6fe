"""Candidate terms after a fit: what to consider next, and on what grounds.

Four steps, each usable on its own:

- :func:`catalogue` lists terms built from the table's variables and from the analyst's
  declarations (linear, curvature, log, hinge, time trend/step/cycles, group levels and slopes,
  interactions).  Each :class:`Candidate` knows whether a declaration grounds it (``stated``).
- :func:`score_candidates` gives each candidate's partial F test against the current fit without
  refitting: the candidate's columns are made orthogonal to the current design (classical
  Gram-Schmidt, run twice) and the residual sum of squares they would remove is read off a small
  QR factor.  The numbers equal a full refit's nested-model F test.  p-values are then adjusted
  for the number of candidates examined (Holm, or Benjamini-Hochberg).
- :func:`rank_candidates` tags each candidate ``stated`` / ``evident`` / ``speculative`` and orders
  the list for the term tray.
- :func:`pattern_scores` and :func:`binned_means` measure and draw what structure the residuals
  still show against each variable (the residual grid's ordering and smoother).

Column names are data: they reach formula text only through :func:`~afterfit.model.terms.quote_name`
and are never evaluated here.
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np
import pandas as pd
import patsy
import scipy.linalg as sla
from scipy import special, stats
from scipy.linalg import lapack

from afterfit.model.terms import Declarations, quote_name, term_variables

__all__ = [
    "Candidate",
    "KINDS",
    "TAGS",
    "RANK_COLUMNS",
    "catalogue",
    "score_candidates",
    "adjust_pvalues",
    "rank_candidates",
    "delta_cv",
    "pattern_scores",
    "binned_means",
]

KINDS = (
    "linear", "power2", "spline", "log", "hinge", "trend", "step", "cycle", "cycle2",
    "group", "group_slope", "interaction",
)
TAGS = ("stated", "evident", "speculative")
RANK_COLUMNS = (
    "term", "label", "kind", "sources", "tag", "statistic", "df_num", "df_den", "pvalue",
    "p_adjusted", "delta_cv", "grounds", "note",
)

# Distinct finite values a variable needs before a shape of that kind is worth proposing.
_MIN_DISTINCT = {"power2": 3, "log": 3, "hinge": 5, "spline": 6}
# A direction counts in a candidate's test only if this squared share of the column's (weighted,
# centred when the model has an intercept) size is new: not explained by the current design and
# the candidate's earlier columns.  1e-10 is a share of 1e-5 of the size, far above rounding.
_NULL_SHARE = 1e-10
# Change-point search: each segment keeps at least this share of the rows (15 % trimming is
# common practice for sup-F change-point tests) and at most this many positions are tried.
_STEP_TRIM = 0.15
_STEP_MAX_POSITIONS = 100
_HINGE_QUANTILES = np.linspace(0.1, 0.9, 9)
# Above this many rows a knot or change point is picked on every k-th row (the test is exact).
_CHOOSE_ROWS = 200_000
# Categoricals with more levels than this share of the rows look like identifiers, not groups.
_MAX_LEVEL_SHARE = 0.5
_NAMED_PERIODS = (
    (1.0, "yearly"), (0.5, "half-yearly"), (0.25, "quarterly"), (1.0 / 12.0, "monthly"),
    (7.0 / 365.25, "weekly"),
)


@dataclass(frozen=True)
class Candidate:
    """One term the analyst might add next.

    Attributes
    ----------
    term : str
        Formula text in patsy/statsmodels syntax (one or more patsy terms joined by ``+``);
        column names appear only through ``quote_name``.
    label : str
        Plain words for the tray, e.g. ``"tree age, curved"``.  Plain text: escape before HTML.
    kind : str
        One of :data:`KINDS`.
    sources : tuple of str
        The table's columns the term is built from.
    stated : bool
        True when a declaration grounds the term (see ``grounds``).
    grounds : str
        Which declaration makes the term stated; ``""`` otherwise.
    searched : int
        How many positions a data-driven choice looked at (a hinge's knot, a step's change
        point); 1 when nothing was chosen from the data.  :func:`score_candidates` multiplies
        the p-value by it (Bonferroni), because the best of several positions always looks
        better than a position fixed in advance.
    """

    term: str
    label: str
    kind: str
    sources: tuple
    stated: bool = False
    grounds: str = ""
    searched: int = 1

    def __post_init__(self):
        if self.kind not in KINDS:
            raise ValueError(f"kind must be one of {', '.join(KINDS)}; got {self.kind!r}")
        if int(self.searched) < 1:
            raise ValueError(
                f"searched counts positions tried and must be >= 1, got {self.searched}"
            )


# --------------------------------------------------------------------------------------------
# catalogue


def catalogue(
    frame: pd.DataFrame,
    *,
    response: str,
    model_terms: Sequence[str],
    declarations: Declarations,
    time: str | None = None,
    skip: Sequence[str] = (),
    resid=None,
    fit=None,
) -> list[Candidate]:
    """List candidate terms for the current model.

    Parameters
    ----------
    frame : DataFrame
        The analysis rows (the rows the current model was fitted on, in the same order).
    response : str
        The response as written in the formula (its columns are never proposed).
    model_terms : sequence of str
        patsy term names now in the model (from :func:`~afterfit.model.terms.split_formula`).
    declarations : Declarations
        What the analyst stated: time, periods, groups, plausible variables with reasons.
    time : str, optional
        Name of the NUMERIC time column of ``frame`` to use in terms (for a datetime the caller
        passes decimal years; ``declarations.period`` is in the same units).  Defaults to
        ``declarations.time`` when that column is numeric.
    skip : sequence of str
        Columns never to propose (weights, identifiers, ...).
    resid : array-like, optional
        Residuals of the current fit, one per row; used only to place a hinge's knot and a
        step's change point where they fit the residuals best.
    fit : LeastSquares, optional
        The current fit (rows as ``frame``).  Preferred over ``resid``: the positions are then
        chosen by the exact partial F given the current design (weights included).

    Returns
    -------
    list of Candidate
        No term already in the model; no candidate of a kind the variable cannot support
        (constant or all-missing columns give none; curvature needs at least 3 distinct values,
        a hinge 5, a spline 6).

    Notes
    -----
    A square is written ``I((x - c) ** 2)`` with a round ``c`` near the median when the
    variable sits far from zero (more than 10 standard deviations): the same model as ``x ** 2``
    next to ``x``, without the cancellation.  The time variable gets no log term.

    A step is proposed only when the time column has no missing values (``I(t >= c)`` would
    read a missing time as "before" the change).

    Data-driven positions: with ``fit`` or ``resid`` given, a hinge's knot is the decile
    (10 %..90 %) and a step's change point the time value (each segment keeping at least 15 % of
    the rows, at most 100 positions) whose column explains the most residual variation.  Picking
    the best of several positions makes the ordinary p-value optimistic, so the candidate records
    how many positions were tried (``searched``) and :func:`score_candidates` multiplies its
    p-value by that number (Bonferroni: conservative, never optimistic).  Without ``fit`` or
    ``resid`` the median is used and nothing is searched.

    A term is stated when all its source variables are declared plausible; a group's level or
    slope term when its group variable is declared in ``groups`` (or plausible); a trend when
    time is declared; a cycle always (cycles are built only for declared periods).  Steps and
    hinges at data-chosen positions are stated only through ``plausible`` like any other shape.
    """
    if not isinstance(frame, pd.DataFrame):
        raise TypeError(f"frame must be a pandas DataFrame, got {type(frame).__name__}")
    if not isinstance(declarations, Declarations):
        raise TypeError(
            "declarations must be an afterfit.model.terms.Declarations; build one with "
            "Declarations.build(df.columns, time=..., period=..., groups=..., plausible=...)"
        )
    n = len(frame)
    columns = list(frame.columns)
    time = _resolve_time(frame, declarations, time)
    chooser = _Chooser(n, resid=resid, fit=fit)

    cols_key = tuple(columns)
    skipped = set(skip)
    skipped.update(_variables(response, cols_key) if isinstance(response, str) else ())
    if isinstance(response, str) and response in columns:
        skipped.add(response)
    if declarations.time is not None and time is not None and time != declarations.time:
        skipped.add(declarations.time)  # the datetime itself: its numeric twin stands in

    model = _TermSet(model_terms)
    in_model: list[str] = []
    for t in model_terms:
        for v in _variables(t, cols_key):
            if v not in in_model:
                in_model.append(v)

    numeric: list[str] = []
    categorical: list[str] = []
    for name in columns:
        if name in skipped:
            continue
        s = frame[name]
        if name in declarations.groups or _is_categorical(s):
            if name != time:
                categorical.append(name)
        elif _is_numeric(s):
            numeric.append(name)
    numeric_in_model = [v for v in in_model if v in numeric]

    out: list[Candidate] = []

    def add(text, *, label, kind, sources, stated, grounds, searched=1):
        new = model.new_terms(text)
        if new:
            out.append(Candidate(" + ".join(new), label, kind, tuple(sources), stated,
                                 grounds if stated else "", int(searched)))

    time_label = declarations.time if declarations.time is not None else time
    for name in numeric:
        x = _as_float(frame[name])
        finite = x[np.isfinite(x)]
        distinct = np.unique(finite)
        if distinct.size < 2:
            continue  # constant or all missing: nothing to learn from it
        q = quote_name(name)
        shown = time_label if name == time else name
        stated, grounds = _plausible_grounds((name,), declarations)
        if name == time:
            t_stated, t_grounds = stated, grounds
            if declarations.time is not None:
                t_stated, t_grounds = True, f"time declared: {declarations.time}"
            add(q, label=f"trend in {shown}", kind="trend", sources=(name,),
                stated=t_stated, grounds=t_grounds)
        else:
            add(q, label=f"{shown}, linear", kind="linear", sources=(name,),
                stated=stated, grounds=grounds)
        lead = "" if model.has(q) else q + " + "
        if distinct.size >= _MIN_DISTINCT["power2"]:
            add(f"{lead}{_square_text(q, finite)}", label=f"{shown}, curved", kind="power2",
                sources=(name,), stated=stated, grounds=grounds)
        if distinct.size >= _MIN_DISTINCT["spline"]:
            add(f'cr({q}, df=4, constraints="center")', label=f"{shown}, smooth curve (spline)",
                kind="spline", sources=(name,), stated=stated, grounds=grounds)
        if distinct.size >= _MIN_DISTINCT["log"] and distinct[0] > 0 and name != time:
            add(f"np.log({q})", label=f"{shown}, log scale", kind="log", sources=(name,),
                stated=stated, grounds=grounds)
        if distinct.size >= _MIN_DISTINCT["hinge"]:
            knots = np.unique(np.quantile(finite, _HINGE_QUANTILES))
            knots = knots[(knots > distinct[0]) & (knots < distinct[-1])]
            if knots.size:
                best, tried = chooser.best(x, knots, "hinge", default=_middle(knots))
                c = float(knots[best])
                add(f"{lead}{_hinge_text(q, c)}", label=f"{shown}, bend near {c:.5g}",
                    kind="hinge", sources=(name,), stated=stated, grounds=grounds,
                    searched=tried)
        if name == time and finite.size == n:
            # only with complete times: I(t >= c) reads a missing time as "before"
            points = _change_points(finite, n_rows=n)
            if points.size:
                best, tried = chooser.best(x, points, "step", default=_middle(points))
                c = float(points[best])
                add(f"I({q} >= {_num(c)})", label=f"step change in {shown} near {c:.5g}",
                    kind="step", sources=(name,), stated=stated, grounds=grounds,
                    searched=tried)
        if name == time:
            derived = declarations.time is not None and time != declarations.time
            for period in declarations.period:
                p_txt = _num(period)
                base = _period_label(period, shown, derived)
                why = f"period {period:g} declared for time {time_label}"
                add(f"np.sin(2 * np.pi * {q} / {p_txt}) + np.cos(2 * np.pi * {q} / {p_txt})",
                    label=base, kind="cycle", sources=(name,), stated=True, grounds=why)
                add(f"np.sin(4 * np.pi * {q} / {p_txt}) + np.cos(4 * np.pi * {q} / {p_txt})",
                    label=f"{base}, second harmonic", kind="cycle2", sources=(name,),
                    stated=True, grounds=why)

    for g in categorical:
        levels = frame[g].dropna().unique()
        if len(levels) < 2 or len(levels) > max(2, _MAX_LEVEL_SHARE * n):
            continue
        qg = f"C({quote_name(g)})"
        if g in declarations.groups:
            stated, grounds = True, f"{g} declared as a group"
        else:
            stated, grounds = _plausible_grounds((g,), declarations)
        add(qg, label=f"{g}-specific level", kind="group", sources=(g,), stated=stated,
            grounds=grounds)
        for x in numeric_in_model:
            shown = time_label if x == time else x
            add(f"{qg}:{quote_name(x)}", label=f"{g}-specific slope on {shown}",
                kind="group_slope", sources=(g, x), stated=stated, grounds=grounds)

    for i, a in enumerate(numeric_in_model):
        for b in numeric_in_model[i + 1:]:
            stated, grounds = _plausible_grounds((a, b), declarations)
            sa = time_label if a == time else a
            sb = time_label if b == time else b
            add(f"{quote_name(a)}:{quote_name(b)}", label=f"{sa} × {sb} interaction",
                kind="interaction", sources=(a, b), stated=stated, grounds=grounds)
    return out


def _resolve_time(frame, declarations, time):
    if time is None:
        time = declarations.time
        if time is None:
            return None
        if time in frame.columns and not _is_numeric(frame[time]):
            raise ValueError(
                f"the declared time column {time!r} is not numeric; pass time= the name of a "
                "numeric column holding the times (for datetimes: decimal years)"
            )
    if time not in frame.columns:
        raise ValueError(
            f"time={time!r} is not a column of the frame; add the numeric time column first"
        )
    if not _is_numeric(frame[time]):
        raise ValueError(
            f"time={time!r} must be a numeric column (for datetimes pass decimal years), "
            f"got dtype {frame[time].dtype}"
        )
    return time


class _TermSet:
    """The model's terms as patsy Term objects, so ``x:C(g)`` and ``C(g):x`` compare equal."""

    def __init__(self, names):
        self.terms = set(_parse_terms(" + ".join(names))) if names else set()

    def has(self, text) -> bool:
        return all(t in self.terms for t in _parse_terms(text))

    def new_terms(self, text) -> list[str]:
        return [t.name() for t in _parse_terms(text) if t not in self.terms]


@functools.lru_cache(maxsize=1024)
def _variables(term: str, columns: tuple) -> tuple:
    return tuple(term_variables(term, columns))


@functools.lru_cache(maxsize=4096)
def _parse_terms(text):
    # patsy's parser is slow next to everything else here, and the same texts recur every refit
    desc = patsy.ModelDesc.from_formula("__y__ ~ 0 + " + text)
    return tuple(t for t in desc.rhs_termlist if t.factors)


def _is_categorical(s: pd.Series) -> bool:
    dt = s.dtype
    return (
        isinstance(dt, pd.CategoricalDtype)
        or pd.api.types.is_bool_dtype(dt)
        or pd.api.types.is_object_dtype(dt)
        or pd.api.types.is_string_dtype(dt)
    )


def _is_numeric(s: pd.Series) -> bool:
    dt = s.dtype
    return (
        pd.api.types.is_numeric_dtype(dt)
        and not pd.api.types.is_bool_dtype(dt)
        and not pd.api.types.is_complex_dtype(dt)
    )


def _as_float(s: pd.Series) -> np.ndarray:
    return s.to_numpy(dtype=float, na_value=np.nan)


def _plausible_grounds(names, declarations):
    pl = declarations.plausible
    if names and all(v in pl for v in names):
        parts = []
        for v in names:
            reason = pl[v].strip()
            parts.append(f"{v} declared plausible" + (f" ({reason})" if reason else ""))
        return True, "; ".join(parts)
    return False, ""


def _num(value: float) -> str:
    """Shortest text that reads back as exactly ``value``."""
    v = float(value)
    if v.is_integer() and abs(v) < 1e15:
        return str(int(v))
    return repr(v)


def _square_text(q: str, x: np.ndarray) -> str:
    """``I(x ** 2)``, or ``I((x - c) ** 2)`` with a round ``c`` when x sits far from zero.

    With the linear term (and an intercept) both span the same columns; centring keeps the
    square from being nearly a copy of the linear term (times in decimal years, say).
    """
    centre, sd = float(np.median(x)), float(np.std(x))
    if not sd > 0 or abs(centre) <= 10 * sd:
        return f"I({q} ** 2)"
    c = round(centre, max(0, -math.floor(math.log10(sd))))
    return f"I(({q} - {_num(c)}) ** 2)" if c > 0 else f"I(({q} + {_num(-c)}) ** 2)"


def _hinge_text(q: str, c: float) -> str:
    if c < 0:
        return f"np.maximum({q} + {_num(-c)}, 0)"
    return f"np.maximum({q} - {_num(c)}, 0)"


def _middle(values: np.ndarray) -> int:
    return (len(values) - 1) // 2


def _period_label(period: float, shown: str, derived: bool) -> str:
    if derived:  # times in decimal years: name the usual calendar cycles
        for value, word in _NAMED_PERIODS:
            if math.isclose(period, value, rel_tol=1e-3):
                return f"{word} cycle"
    return f"cycle of period {period:g} in {shown}"


def _change_points(t: np.ndarray, *, n_rows: int) -> np.ndarray:
    """Time values where a step may start, keeping 15 % of the rows on each side."""
    seg = max(5, math.ceil(_STEP_TRIM * n_rows))
    if n_rows < 2 * seg:
        return np.array([])
    ts = np.sort(t)
    values, first = np.unique(ts, return_index=True)
    ok = (first >= seg) & (first <= n_rows - seg)
    points = values[ok]
    if points.size > _STEP_MAX_POSITIONS:
        pick = np.unique(np.round(np.linspace(0, points.size - 1, _STEP_MAX_POSITIONS)).astype(int))
        points = points[pick]
    return points


class _Chooser:
    """Picks the hinge knot or step position that explains most of the current residuals.

    For every position ``c`` at once: the column ``h_c`` (``max(x - c, 0)`` or ``x >= c``,
    weighted) enters through ``X'h_c``, ``h_c'e`` and ``h_c'h_c``, which are suffix sums over the
    rows sorted by ``x`` -- one sort and one pass per variable, whatever the number of positions.
    The residual variation ``h_c`` explains is ``(h_c'e)^2 / (h_c'h_c - |R^-T X'h_c|^2)``
    (``e`` is orthogonal to ``X``).  This picks a position; the test itself is exact.  Above
    200,000 rows the pick is made on every k-th row, which keeps the catalogue quick at 10^6.
    """

    def __init__(self, n, *, resid, fit):
        self.n = n
        self.e = None
        if fit is not None:
            if fit.X.shape[0] != n:
                raise ValueError(
                    f"fit= was made on {fit.X.shape[0]} rows but the frame has {n}; pass the "
                    "analysis rows"
                )
            self.e = fit.wresid
            self.sw = fit.sqrt_w
            self.fit = fit
        elif resid is not None:
            e = np.asarray(resid, dtype=float).ravel()
            if e.size != n:
                raise ValueError(
                    f"resid= has {e.size} values but the frame has {n} rows; pass the residuals "
                    "of the analysis rows"
                )
            e = np.where(np.isfinite(e), e, 0.0)
            self.e = e - e.mean()  # against the mean only: a simple regression on each column
            self.sw = None
            self.fit = None

    def best(self, x, positions, kind, *, default: int) -> tuple[int, int]:
        """Index of the best position and how many were tried (1 when none were)."""
        k = len(positions)
        if self.e is None or k == 1:
            return (default if self.e is None else 0), 1
        ok = np.isfinite(x)
        if self.sw is not None:
            ok &= self.sw > 0
        rows = np.flatnonzero(ok)
        stride = max(1, rows.size // _CHOOSE_ROWS)
        rows = rows[::stride]  # a position is only picked here; every stride-th row will do
        centre = float(np.median(x[rows]))  # exact shift: keeps the sums below well scaled
        order = rows[np.argsort(x[rows], kind="stable")]
        xs = x[order] - centre
        cs = np.asarray(positions, dtype=float) - centre
        sw = np.ones(order.size) if self.sw is None else self.sw[order]
        es = self.e[order]
        if self.fit is not None and self.fit.rank:
            ls = self.fit
            Xs = ls.X[order][:, ls.kept] * sw[:, None]
            # the sampled rows' X'X is about 1/stride of the whole: rescale the factor's inverse
            Rinv = ls.Rinv * math.sqrt(stride)
        else:
            Xs = sw[:, None]
            Rinv = np.array([[1.0 / math.sqrt(float(sw @ sw))]])
        # rows at or above each position (hinge: above; the difference is a zero term)
        start = np.searchsorted(xs, cs, side="left")

        def suffix(v):
            tot = np.concatenate([np.cumsum(v[::-1], axis=0)[::-1], np.zeros((1,) + v.shape[1:])])
            return tot[start]

        if kind == "step":
            Xh = suffix(Xs * sw[:, None])
            he = suffix(sw * es)
            hh = suffix(sw * sw)
        else:
            Xh = suffix(Xs * (sw * xs)[:, None]) - cs[:, None] * suffix(Xs * sw[:, None])
            he = suffix(sw * es * xs) - cs * suffix(sw * es)
            hh = (suffix(sw * sw * xs * xs) - 2 * cs * suffix(sw * sw * xs)
                  + cs**2 * suffix(sw * sw))
        proj = Xh @ Rinv  # rows: (R^-T X'h_c)'
        norm2 = hh - (proj**2).sum(axis=1)
        good = norm2 > _NULL_SHARE * np.maximum(hh, 0)
        if not good.any():
            return default, 1
        explained = np.full(k, -np.inf)
        explained[good] = he[good] ** 2 / norm2[good]
        return int(np.argmax(explained)), k


# --------------------------------------------------------------------------------------------
# evidence


def score_candidates(
    ls, blocks, *, method: str = "holm", alpha: float = 0.05, searched=None, algorithm: str = "auto"
):
    """Partial F test of each candidate against the current fit, without refitting.

    Parameters
    ----------
    ls : LeastSquares
        The current fit (:func:`~afterfit.model.ols.fit_ols`).
    blocks : sequence of array-like
        ``blocks[i]`` is candidate i's columns over the fitted rows, shape ``(n, q_i)`` (a 1-D
        array is one column).  Columns may repeat what the model already has (``C(g):x`` with
        ``x`` in the model): the test counts only the new directions.
    method : {"holm", "bh"}
        Multiplicity adjustment over the candidates examined in this call: Holm's step-down
        (family-wise error) or Benjamini-Hochberg (false discovery rate).
    alpha : float
        Level recorded in ``attrs["alpha"]`` and used for the ``reject`` column.
    searched : sequence of int, optional
        Positions tried by a data-driven choice, per block (``Candidate.searched``); the p-value
        is multiplied by it before the multiplicity adjustment.  Default: 1 for every block.
    algorithm : {"auto", "rows"}
        ``"auto"`` decides well-separated blocks from one shared Gram pass and residualises the
        others row by row; ``"rows"`` residualises every block row by row (slower, same numbers).

    Returns
    -------
    DataFrame
        One row per block, in order: ``statistic`` (F), ``df_num`` (new columns counted),
        ``df_den``, ``pvalue`` (after the search correction), ``p_adjusted``, ``reject``
        (``p_adjusted < alpha``), ``note`` (why a number is missing, or how it was corrected),
        ``pvalue_raw`` (before the search correction) and ``searched``.
        ``attrs``: ``examined`` (candidates that received a p-value), ``method``, ``alpha``.

    Notes
    -----
    The test is the nested-model F test (current model against current model + term):
    ``F = (ESS / q) / ((SSR - ESS) / (df_resid - q))`` where ESS is the part of the weighted
    residual sum of squares SSR that the term's columns, made orthogonal to the current
    weighted design, explain, and ``q`` counts the term's new directions.  Nothing is refitted:

    1. One pass over the rows gives, for all blocks at once, ``X'Z``, ``Z'e`` and each block's
       own ``Z'Z`` (``e`` the weighted residuals).  With an intercept in the model every block
       is first shifted by a constant, which changes no test (the constant is in the model) but
       removes the cancellation that large column means cause.
    2. With ``sqrt(W) X_kept = Q R``, ``Q'Z = R^-T X'Z`` and the residualised Gram is
       ``Z'Z - (Q'Z)'(Q'Z)``.  A block whose every direction is clearly new (pivoted Cholesky
       pivots, relative to the columns' centred sizes, above ``max(1e-4, 1e6 noise)`` with
       ``noise ~ 16 eps (1 + cond)``) or clearly a repeat (below 1e-10, noise far smaller) is
       decided there.
    3. Any other block -- one that repeats a model direction, like ``C(g):x`` with ``x`` in the
       model or a spline of a model variable -- is residualised row by row:
       ``Z - X C`` with ``C = R^-1 R^-T X'Z``, repeated once on the result (classical
       Gram-Schmidt twice), and the R factor of ``[Z_resid | e]`` is accumulated over row chunks
       (TSQR).  A column-pivoted QR of that small factor drops directions whose new part is
       less than 1e-5 of the column's (centred) size, so the test counts the right degrees of
       freedom.  The Gram path applies the same rule when rounding noise is far below it.

    A block with missing or infinite values gets NaN evidence and a note, never a number.
    """
    if method not in ("holm", "bh"):
        raise ValueError(f"method must be 'holm' or 'bh', got {method!r}")
    if algorithm not in ("auto", "rows"):
        raise ValueError(f"algorithm must be 'auto' or 'rows', got {algorithm!r}")
    if not 0 < alpha < 1:
        raise ValueError(f"alpha must be between 0 and 1, got {alpha!r}")
    mats = _check_blocks(blocks, ls.X.shape[0])
    m = len(mats)
    if searched is None:
        searched = np.ones(m, dtype=int)
    else:
        searched = np.asarray(searched, dtype=int).ravel()
        if searched.size != m or (searched < 1).any():
            raise ValueError(
                f"searched= needs one count >= 1 per block ({m}), got {searched.tolist()}"
            )
    stat = np.full(m, np.nan)
    dfn = np.full(m, np.nan)
    dfd = np.full(m, np.nan)
    pval = np.full(m, np.nan)
    praw = np.full(m, np.nan)
    notes = [""] * m

    todo = []
    for i, z in enumerate(mats):
        if z.shape[1] == 0:
            notes[i] = "the term has no columns"
        else:
            todo.append(i)
    if ls.df_resid <= 0:
        for i in todo:
            notes[i] = "the current model leaves no residual degrees of freedom"
        todo = []
    elif not ls.ssr > 0:
        for i in todo:
            notes[i] = "the current model already fits every row exactly"
        todo = []

    if todo:
        engine = _Engine(ls, mats)
        parts = engine.gram_pass(todo, notes)
        results = {}
        slow = []
        for i, part in parts.items():
            got = engine.from_gram(part) if algorithm == "auto" else None
            if got is None:
                slow.append(i)
            else:
                results[i] = got
        if slow:
            results.update(engine.rows(parts, slow))
        e2 = ls.ssr
        for i, (expl, q) in results.items():
            if q == 0:
                notes[i] = "adds nothing beyond the current model (its columns are already in it)"
                continue
            den_df = ls.df_resid - q
            if den_df <= 0:
                notes[i] = f"{q} new columns leave no residual degrees of freedom"
                continue
            rest = max(e2 - expl, 0.0)
            F = (expl / q) / (rest / den_df) if rest > 0 else np.inf
            stat[i], dfn[i], dfd[i] = F, q, den_df
            p = float(special.fdtrc(q, den_df, F))
            praw[i] = p
            if searched[i] > 1:
                p = min(1.0, p * searched[i])
                notes[i] = (
                    f"position chosen from the data among {searched[i]}; p-value multiplied "
                    f"by {searched[i]} (Bonferroni)"
                )
            pval[i] = p

    padj = adjust_pvalues(pval, method=method)
    out = pd.DataFrame(
        {
            "statistic": stat,
            "df_num": dfn,
            "df_den": dfd,
            "pvalue": pval,
            "p_adjusted": padj,
            "reject": padj < alpha,
            "note": notes,
            "pvalue_raw": praw,
            "searched": searched,
        }
    )
    out.attrs.update(examined=int(np.isfinite(pval).sum()), method=method, alpha=alpha)
    return out


def score_candidates_in_groups(ls, blocks, *, method: str = "holm", alpha: float = 0.05,
                               searched=None, max_columns: int = 16) -> pd.DataFrame:
    """:func:`score_candidates` with the candidates' columns made a group at a time.

    ``blocks`` is a sequence of callables, each returning one candidate's columns (as a block of
    :func:`score_candidates`).  Candidates are scored in groups of at most ``max_columns``
    columns (a larger block forms a group alone), so only one group's columns exist at a time;
    each block's evidence does not depend on the others in its call, and the multiplicity
    adjustment is made once over all of them.  Returns the same table as
    :func:`score_candidates` on all the blocks at once.
    """
    m = len(blocks)
    searched = np.ones(m, dtype=int) if searched is None else np.asarray(searched, dtype=int)
    parts, group, width = [], [], 0

    def flush():
        if group:
            mats = [z for _, z in group]
            idx = [i for i, _ in group]
            parts.append(score_candidates(ls, mats, method=method, alpha=alpha,
                                          searched=searched[idx]))
            group.clear()

    for i, make in enumerate(blocks):
        z = np.asarray(make(), dtype=float)
        z = z[:, None] if z.ndim == 1 else z
        if group and width + z.shape[1] > max_columns:
            flush()
            width = 0
        group.append((i, z))
        width += z.shape[1]
    flush()
    if not parts:
        return score_candidates(ls, [], method=method, alpha=alpha)
    out = pd.concat(parts, ignore_index=True)
    out["p_adjusted"] = adjust_pvalues(out["pvalue"].to_numpy(dtype=float), method=method)
    out["reject"] = out["p_adjusted"].to_numpy() < alpha
    out.attrs.update(examined=int(np.isfinite(out["pvalue"].to_numpy(dtype=float)).sum()),
                     method=method, alpha=alpha)
    return out


def _check_blocks(blocks, n):
    if isinstance(blocks, np.ndarray) and blocks.ndim == 2:
        raise TypeError("blocks must be a sequence of arrays, one per candidate (got one matrix)")
    mats = []
    for i, b in enumerate(blocks):
        z = np.asarray(b, dtype=float)
        if z.ndim == 1:
            z = z[:, None]
        if z.ndim != 2 or z.shape[0] != n:
            raise ValueError(
                f"block {i} has shape {z.shape}; each block needs one row per fitted row ({n}) "
                "and one column per term column"
            )
        mats.append(z)
    return mats


def _chunk_rows(width: int) -> int:
    # about 4 MB of candidate columns per chunk: large enough for BLAS, small enough for cache
    return int(min(131072, max(1024, (1 << 19) // max(width, 1))))


_EPS = float(np.finfo(float).eps)
# Gram path: a block is decided from its Gram quantities only when each of its directions is
# either clearly new (squared share of the column's centred size that is new at least
# _GRAM_MIN_PIVOT and 1e6 times the rounding noise) or clearly repeated (below _NULL_SHARE with
# the noise, amplified by the elimination, 100 times smaller still).  Anything in between goes
# to the row path, which resolves it from the rows themselves.
_GRAM_MIN_PIVOT = 1e-4
_GRAM_NOISE_MARGIN = 1e6


class _Engine:
    """Evidence for many blocks against one fit: one shared Gram pass, rows only when needed.

    Every block is first reduced in ONE pass over the rows to ``X'Z``, ``Z'Z`` (within the block)
    and ``Z'e``.  When the model has an intercept, each block is shifted by a constant first
    (exact: the shift lies in the design's span), which removes the cancellation that large
    column means would cause.  From these the residualised Gram ``Z'Z - (Q'Z)'(Q'Z)`` gives the
    test directly -- provided every direction of the block is clearly new (pivot above
    ``max(1e-4, 1e6 * noise)`` where ``noise ~ eps * (1 + cond)``).  A block with a direction
    that is repeated or nearly repeated in the model (``C(g):x`` with ``x`` in it, a spline of a
    model variable) is instead residualised row by row, classical Gram-Schmidt twice, and its
    R factor accumulated by TSQR; rank is then read from that factor.
    """

    def __init__(self, ls, mats):
        self.ls = ls
        self.mats = mats
        self.n = ls.X.shape[0]
        self.r = ls.rank
        self.X = ls.X if self.r == ls.X.shape[1] else ls.X[:, ls.kept]
        self.sw = ls.sqrt_w
        self.e = ls.wresid
        self.Rinv = ls.Rinv if self.r else np.zeros((0, 0))
        self.unweighted = None
        if self.sw is not None and not (self.sw > 0).all():
            self.unweighted = ~(self.sw > 0)
        cond = ls.cond if np.isfinite(ls.cond) else 1e16
        self.noise = 16.0 * _EPS * (1.0 + cond)

    # -- row chunks ---------------------------------------------------------------------------
    def _layout(self, idx):
        offs = np.cumsum([0] + [self.mats[i].shape[1] for i in idx])
        return offs, int(offs[-1])

    def _chunk(self, idx, offs, width, s, shift, extra=0):
        """Weighted rows s of the design and of the (shifted) blocks, plus ``extra`` columns."""
        Xc = self.X[s]
        # column-major: each block's columns are written (and later read) contiguously
        Zc = np.empty((width + extra, Xc.shape[0])).T
        for j, i in enumerate(idx):
            Zc[:, offs[j]:offs[j + 1]] = self.mats[i][s]
        with np.errstate(invalid="ignore", over="ignore"):  # non-finite blocks: see _bad_note
            if shift is not None:
                Zc[:, :width] -= shift
            if self.sw is not None:
                Xc = Xc * self.sw[s, None]
                Zc[:, :width] *= self.sw[s, None]
                if self.unweighted is not None:
                    # rows with weight 0 take no part, whatever their values
                    Zc[self.unweighted[s], :width] = 0.0
        return Xc, Zc

    def _intercept(self):
        """Index (kept order) of a non-zero constant design column, checked on the first rows."""
        head = self.X[: min(self.n, 4096)]
        if head.shape[0] == 0:
            return None
        const = np.flatnonzero((head == head[0]).all(axis=0) & (head[0] != 0))
        return int(const[0]) if const.size else None

    # -- the shared Gram pass -----------------------------------------------------------------
    def gram_pass(self, todo, notes):
        icol = self._intercept()
        for _ in range(2):
            out = self._gram_pass(todo, notes, icol)
            if out is not None:
                return out
            icol = None  # the "constant" column changed further down: redo without the shift
        raise AssertionError("unreachable")

    def _gram_pass(self, todo, notes, icol):
        offs, width = self._layout(todo)
        r = self.r
        step = _chunk_rows(width + r + 1)
        shift = None
        if icol is not None:
            # any constant works; the first rows' mean removes most of each column's offset
            first = slice(0, min(self.n, step))
            with np.errstate(invalid="ignore", over="ignore"):
                shift = np.concatenate([np.nanmean(self.mats[i][first], axis=0) if np.isfinite(
                    self.mats[i][first]).any() else np.zeros(self.mats[i].shape[1]) for i in todo])
            shift = np.where(np.isfinite(shift), shift, 0.0)
            c0 = self.X[0, icol]
        multi = [(j, i) for j, i in enumerate(todo) if offs[j + 1] - offs[j] > 1]
        A = np.zeros((r, width + 1))
        v = np.zeros(width)
        size2 = np.zeros(width)
        G = {i: 0.0 for _, i in multi}
        for lo in range(0, self.n, step):
            s = slice(lo, lo + step)
            if icol is not None and not (self.X[s, icol] == c0).all():
                return None
            Xc, Z = self._chunk(todo, offs, width, s, shift)
            # [X | e]' Z in one product: X'Z and Z'e with one read of the candidate columns
            XE = np.empty((Xc.shape[0], r + 1))
            XE[:, :r] = Xc
            XE[:, r] = self.e[s]
            # a block with missing or infinite values poisons only its own columns; it is
            # reported below, so the floating-point warnings are expected here
            with np.errstate(invalid="ignore", over="ignore"):
                B = XE.T @ Z
                A[:, :width] += B[:r]
                v += B[r]
                A[:, width] += Xc.T @ XE[:, r]
                size2 += np.einsum("ij,ij->j", Z, Z)
                for j, i in multi:
                    Zb = Z[:, offs[j]:offs[j + 1]]
                    G[i] = G[i] + Zb.T @ Zb
        good = []
        for j, i in enumerate(todo):
            sl = slice(offs[j], offs[j + 1])
            if np.isfinite(size2[sl]).all() and np.isfinite(A[:, sl]).all():
                good.append(i)
            else:
                notes[i] = self._bad_note(i)
        # centred sizes (when there is an intercept) set the scale of "new" for each column
        size2c = size2.copy()
        if icol is not None and r:
            Rcol = self.ls.R[:, icol]
            wsum = float(Rcol @ Rcol)  # = c0^2 * sum(w)
            if wsum > 0:
                with np.errstate(invalid="ignore", over="ignore"):
                    size2c = np.maximum(size2 - A[icol, :width] ** 2 / wsum, 0.0)
        parts = {}
        for j, i in enumerate(todo):
            if i not in good:
                continue
            sl = slice(offs[j], offs[j + 1])
            q = sl.stop - sl.start
            Gb = G[i] if q > 1 else size2[sl].reshape(1, 1)
            with np.errstate(divide="ignore", invalid="ignore"):
                # rounding in Z'Z is relative to the shifted size, the scale is the centred one
                excess = float(np.max(np.where(size2c[sl] > 0, size2[sl] / size2c[sl], np.inf)))
            parts[i] = dict(A=A[:, sl], a_e=A[:, width], G=np.asarray(Gb, dtype=float),
                            v=v[sl], size=np.sqrt(size2c[sl]), excess=excess,
                            shift=None if shift is None else shift[sl])
        return parts

    def _bad_note(self, i):
        bad = ~np.isfinite(self.mats[i]).all(axis=1)
        if self.sw is not None:
            bad &= self.sw > 0
        k = int(bad.sum())
        if k:
            return (f"not computed: the term is missing or infinite on {k} of {self.ls.nobs} rows "
                    "(missing values, or outside its domain such as log of 0)")
        return "not computed: the term's values are too large to square; rescale the variable"

    # -- Gram decision ------------------------------------------------------------------------
    def from_gram(self, part):
        """(ESS, q) from the Gram quantities, or None when the rows must decide."""
        B = self.Rinv.T @ part["A"]
        be = self.Rinv.T @ part["a_e"]
        S = part["G"] - B.T @ B
        u = part["v"] - B.T @ be
        size = part["size"]
        if not (size > 0).all():
            return None  # a constant column: let the rows path count it as nothing new
        Ss = S / np.outer(size, size)
        us = u / size
        noise = self.noise * part["excess"]
        if not np.isfinite(noise):
            return None
        floor = max(_GRAM_MIN_PIVOT, _GRAM_NOISE_MARGIN * noise)
        got = _pivoted_cholesky(Ss, floor=floor, null=_NULL_SHARE, noise=noise)
        if got is None:
            return None
        Lk, piv = got
        if not piv.size:
            return 0.0, 0
        z = np.linalg.solve(Lk, us[piv])  # tiny triangular system: LAPACK gesv is cheapest
        return float(z @ z), len(piv)

    # -- row path (classical Gram-Schmidt twice, TSQR) -----------------------------------------
    def rows(self, parts, idx):
        offs, width = self._layout(idx)
        r = self.r
        step = _chunk_rows(width + r)
        A = np.concatenate([parts[i]["A"] for i in idx], axis=1)
        shift = None
        if parts[idx[0]]["shift"] is not None:
            shift = np.concatenate([parts[i]["shift"] for i in idx])
        C = self.Rinv @ (self.Rinv.T @ A)
        # pass 2: what round-off left of the design in the residualised columns
        A2 = np.zeros((r, width))
        for lo in range(0, self.n, step):
            Xc, Zc = self._chunk(idx, offs, width, slice(lo, lo + step), shift)
            Zc -= Xc @ C
            A2 += Xc.T @ Zc
        C += self.Rinv @ (self.Rinv.T @ A2)
        # pass 3: R factor of [Z_resid | e] per block, stacked chunk by chunk (TSQR)
        factors = {i: np.zeros((offs[j + 1] - offs[j] + 1,) * 2) for j, i in enumerate(idx)}
        bufs = {}
        for lo in range(0, self.n, step):
            s = slice(lo, lo + step)
            Xc, Zc = self._chunk(idx, offs, width, s, shift)
            Zc -= Xc @ C
            ec = self.e[s]
            m = Zc.shape[0]
            for j, i in enumerate(idx):
                q = offs[j + 1] - offs[j]
                buf = bufs.get((q, m))
                if buf is None:
                    buf = bufs[(q, m)] = np.empty((q + 1 + m, q + 1), order="F")
                buf[: q + 1] = factors[i]
                buf[q + 1:, :q] = Zc[:, offs[j]:offs[j + 1]]
                buf[q + 1:, q] = ec
                qr, _, _, _ = lapack.dgeqrf(buf, overwrite_a=1)
                factors[i] = np.triu(qr[: q + 1])
        out = {}
        for i in idx:
            q = parts[i]["A"].shape[1]
            R = factors[i]
            out[i] = _explained(R[:q, :q], R[:q, q], parts[i]["size"])
        return out


def _pivoted_cholesky(S: np.ndarray, *, floor: float, null: float, noise: float):
    """Cholesky factor of the clearly new part of S (diagonal pivoting), or None if unclear.

    Pivots are taken largest first.  Each must be at least ``floor``; once the largest
    remaining one is below ``null`` -- and the rounding noise, amplified by the elimination so
    far (at most ``1 / smallest pivot``), is 100 times smaller still -- the rest are repeats of
    directions already present.  Anything else returns None.  Returns ``(L, kept)`` with
    ``L`` lower triangular over the kept indices ``kept`` (in pivot order).
    """
    S = np.array(S, dtype=float)
    q = S.shape[0]
    perm = np.arange(q)
    L = np.zeros((q, q))
    smallest = 1.0
    for k in range(q):
        d = np.diag(S)[k:] - (L[k:, :k] ** 2).sum(axis=1)
        j = k + int(np.argmax(d))
        top = d[j - k]
        if not top >= floor:
            if top < null and noise / min(smallest, 1.0) <= null / 100:
                return L[:k, :k], perm[:k]
            return None
        if j != k:
            S[[k, j]] = S[[j, k]]
            S[:, [k, j]] = S[:, [j, k]]
            L[[k, j]] = L[[j, k]]
            perm[[k, j]] = perm[[j, k]]
        L[k, k] = math.sqrt(top)
        L[k + 1:, k] = (S[k + 1:, k] - L[k + 1:, :k] @ L[k, :k]) / L[k, k]
        smallest = min(smallest, top)
    return L, perm


def _explained(Rz: np.ndarray, rze: np.ndarray, size: np.ndarray) -> tuple[float, int]:
    """Sum of squares of wresid in the span of the block's new directions, and their number."""
    scale = np.where(size > 0, size, np.inf)
    Rs = Rz / scale[None, :]
    Q2, R2, _ = sla.qr(Rs, pivoting=True)
    d = np.abs(np.diag(R2))
    q = int((d**2 > _NULL_SHARE).sum())
    if q == 0:
        return 0.0, 0
    # pivoted QR orders |diag| decreasingly, so the first q directions are the kept ones
    proj = Q2[:, :q].T @ rze
    return float(proj @ proj), q


def adjust_pvalues(pvalues, *, method: str = "holm") -> np.ndarray:
    """Multiplicity-adjusted p-values; NaN entries stay NaN and are not counted.

    ``"holm"``: Holm's step-down, ``min(1, max_{j<=i} (m - j + 1) p_(j))``; ``"bh"``:
    Benjamini-Hochberg, ``min(1, min_{j>=i} m p_(j) / j)``, over the ``m`` finite p-values.
    """
    p = np.asarray(pvalues, dtype=float)
    out = np.full(p.shape, np.nan)
    ok = np.isfinite(p)
    m = int(ok.sum())
    if m == 0:
        return out
    if ((p[ok] < 0) | (p[ok] > 1)).any():
        raise ValueError("p-values must lie between 0 and 1")
    vals = p[ok]
    order = np.argsort(vals, kind="stable")
    sorted_p = vals[order]
    rank = np.arange(1, m + 1)
    if method == "holm":
        adj = np.maximum.accumulate((m - rank + 1) * sorted_p)
    elif method == "bh":
        adj = np.minimum.accumulate((m * sorted_p / rank)[::-1])[::-1]
    else:
        raise ValueError(f"method must be 'holm' or 'bh', got {method!r}")
    adj = np.minimum(adj, 1.0)
    res = np.empty(m)
    res[order] = adj
    out[ok] = res
    return out


# --------------------------------------------------------------------------------------------
# tags and ranking


def rank_candidates(cands: Sequence[Candidate], scores: pd.DataFrame, *, alpha: float = 0.05):
    """Tag and order candidates for the term tray.

    Parameters
    ----------
    cands : sequence of Candidate
    scores : DataFrame
        From :func:`score_candidates`, one row per candidate in the same order.  A
        ``delta_cv`` column, if present (e.g. from :func:`delta_cv`), is carried over;
        otherwise ``delta_cv`` is NaN.  If the scores were computed without the candidates'
        ``searched`` counts, the search correction and the adjustment are applied here.
    alpha : float
        A candidate that is not stated is ``evident`` when ``p_adjusted < alpha``.

    Returns
    -------
    DataFrame
        Columns :data:`RANK_COLUMNS`.  ``tag`` is ``stated`` (a declaration grounds it),
        ``evident`` (not stated, adjusted p-value below ``alpha``) or ``speculative``.  Order:
        stated, evident, speculative; within each, smaller p-value first, missing last.
    """
    if not 0 < alpha < 1:
        raise ValueError(f"alpha must be between 0 and 1, got {alpha!r}")
    cands = list(cands)
    if len(cands) != len(scores):
        raise ValueError(
            f"{len(cands)} candidates but {len(scores)} score rows; score the candidates' "
            "blocks in the same order"
        )
    sc = _search_corrected(cands, scores.reset_index(drop=True))
    padj = sc["p_adjusted"].to_numpy(dtype=float)
    tags = []
    for c, pa in zip(cands, padj):
        if c.stated:
            tags.append("stated")
        elif np.isfinite(pa) and pa < alpha:
            tags.append("evident")
        else:
            tags.append("speculative")
    delta = sc["delta_cv"].to_numpy(dtype=float) if "delta_cv" in sc else np.full(len(sc), np.nan)
    out = pd.DataFrame(
        {
            "term": [c.term for c in cands],
            "label": [c.label for c in cands],
            "kind": [c.kind for c in cands],
            "sources": [tuple(c.sources) for c in cands],
            "tag": tags,
            "statistic": sc["statistic"].to_numpy(dtype=float),
            "df_num": sc["df_num"].to_numpy(dtype=float),
            "df_den": sc["df_den"].to_numpy(dtype=float),
            "pvalue": sc["pvalue"].to_numpy(dtype=float),
            "p_adjusted": padj,
            "delta_cv": delta,
            "grounds": [c.grounds for c in cands],
            "note": sc["note"].astype(str).tolist() if "note" in sc else [""] * len(cands),
        },
        columns=list(RANK_COLUMNS),
    )
    tag_rank = out["tag"].map({t: i for i, t in enumerate(TAGS)}).to_numpy()
    p = out["pvalue"].to_numpy()
    missing = ~np.isfinite(p)
    # ties in p (both underflow to 0) are broken by the larger F
    stat = np.nan_to_num(out["statistic"].to_numpy(), nan=-np.inf)
    order = np.lexsort((np.arange(len(out)), -stat, np.where(missing, np.inf, p), missing,
                        tag_rank))
    out = out.iloc[order].reset_index(drop=True)
    out.attrs.update(scores.attrs)
    out.attrs["alpha"] = alpha
    return out


def _search_corrected(cands, sc: pd.DataFrame) -> pd.DataFrame:
    """Scores with each candidate's search correction applied, whatever the caller passed.

    A data-chosen position (``Candidate.searched > 1``) must pay its Bonferroni factor; if the
    scores were computed without it (or with other counts), p-values and their adjustment are
    redone here from the uncorrected p-values, so a tag is never based on an optimistic number.
    """
    want = np.array([c.searched for c in cands], dtype=int)
    have = sc["searched"].to_numpy(dtype=int) if "searched" in sc else np.ones(len(sc), int)
    if (want == have).all():
        return sc
    raw = sc["pvalue_raw"] if "pvalue_raw" in sc else sc["pvalue"]
    raw = raw.to_numpy(dtype=float)
    sc = sc.copy()
    sc["pvalue"] = np.minimum(1.0, raw * want)
    sc["p_adjusted"] = adjust_pvalues(sc["pvalue"], method=sc.attrs.get("method", "holm"))
    sc["searched"] = want
    notes = sc["note"].astype(str).tolist() if "note" in sc else [""] * len(sc)
    for i, k in enumerate(want):
        if k > 1 and np.isfinite(raw[i]):
            notes[i] = (f"position chosen from the data among {k}; p-value multiplied "
                        f"by {k} (Bonferroni)")
    sc["note"] = notes
    return sc


def delta_cv(X, y, folds, blocks, *, top: int = 10, weights=None, scheme: str = "kfold",
             base: float | None = None, extend=None):
    """Change in cross-validated RMSE if each of the first ``top`` candidates were added.

    Parameters
    ----------
    X : array-like, shape (n, p)
        The current design (``LeastSquares.X``).
    y : array-like, shape (n,)
    folds : array-like of int
        Fold labels (:func:`afterfit.model.crossval.make_folds`).
    blocks : sequence of array-like
        Candidate columns, as for :func:`score_candidates`, best first.
    top : int
        How many of the leading blocks to cross-validate (each costs one pass over the rows).
    weights : array-like, optional
    scheme : str
        Passed to :func:`~afterfit.model.crossval.cross_validate`.
    base : float, optional
        The current model's ``rmse_cv`` on these folds, when already known.
    extend : callable, optional
        ``extend(z)`` returns ``[X | z]`` (column-major) from space the caller has, or None;
        by default a new array is made for each block.

    Returns
    -------
    ndarray
        ``rmse_cv(current + block) - rmse_cv(current)`` per block (negative is better); NaN for
        blocks after ``top`` and for blocks with missing or infinite values.
    """
    from afterfit.model.crossval import cross_validate

    X = np.asarray(X, dtype=float)
    n, p = X.shape
    mats = _check_blocks(blocks, n)
    out = np.full(len(mats), np.nan)
    if base is None:
        base = cross_validate(X, y, folds, weights=weights, scheme=scheme).rmse_cv
    for i, z in enumerate(mats[: max(int(top), 0)]):
        if z.shape[1] == 0 or not np.isfinite(z).all():
            continue
        Xz = None if extend is None else extend(z)
        if Xz is None:
            # column-major, as the Study's designs: cross-validation reads it window by window
            Xz = np.empty((n, p + z.shape[1]), order="F")
            Xz[:, :p] = X
            Xz[:, p:] = z
        cv = cross_validate(Xz, y, folds, weights=weights, scheme=scheme)
        out[i] = cv.rmse_cv - base
        del Xz
    return out


# --------------------------------------------------------------------------------------------
# residual patterns


def pattern_scores(resid, variables, *, bins: int = 10, weights=None) -> pd.DataFrame:
    """How much structure the residuals still show against each variable.

    Parameters
    ----------
    resid : array-like, shape (n,)
        Residuals (the caller chooses raw, weighted or studentized).
    variables : DataFrame or mapping of name to array-like or Bins
        One entry per panel, each of length n.  Pass fitted values as a variable named
        ``"fitted"``.  A :class:`Bins` (from :func:`bin_values`, same ``bins``) is used as
        given, so a caller can keep the binning of a variable that does not change.
    bins : int
        Quantile bins for numeric variables (a variable with at most ``bins`` distinct values
        gets one bin per value).
    weights : array-like, optional
        Case weights for the means and sums of squares.

    Returns
    -------
    DataFrame
        Indexed by variable name (input order): ``score`` = share of residual variation explained
        by bin means (numeric, quantile bins) or level means (categorical), i.e. eta squared;
        ``pvalue`` from the one-way F test of between- against within-bin mean squares;
        ``bins_used``; ``kind`` ("numeric" or "categorical"); ``n_used`` (rows with both values
        present).  A variable with a single value scores 0 with a missing p-value.

    Notes
    -----
    With more bins the score grows by chance (about ``(bins - 1) / n`` under no structure); the
    p-value accounts for that, so rank panels by p-value when their bin counts differ.
    """
    return residual_profiles(resid, variables, bins=bins, weights=weights, smoothers=False)[0]


def binned_means(x, resid, *, bins: int = 10) -> pd.DataFrame:
    """Mean residual per quantile bin of ``x`` (or per level), with a ~95 % band: the smoother.

    ``x`` may be a :class:`Bins` from :func:`bin_values` (same ``bins``), which keeps the
    binning and the per-bin x summaries of a variable that does not change between fits.

    Returns
    -------
    DataFrame
        One row per non-empty bin in order: ``centre`` (mean of x in the bin; the level for a
        categorical), ``mean``, ``lower`` and ``upper`` (mean ± t(0.975, count - 1) · sd /
        √count; NaN for a bin of one row), ``count``, and the bin's ``left``/``right`` x range
        (NaN for categoricals).  Datetimes are binned as numbers: ``centre``, ``left`` and
        ``right`` are then nanoseconds since 1970 (``pd.to_datetime`` turns them back).
    """
    e = _vector(resid, "resid")
    b = x if isinstance(x, Bins) else bin_values(x, bins=bins)
    if b.codes.size != e.size:
        raise ValueError(f"x has {b.codes.size} values but resid has {e.size}")
    return residual_profiles(e, {"x": b}, bins=bins, scores=False)[1]["x"]


def residual_profiles(resid, variables, *, bins: int = 10, weights=None, scores: bool = True,
                      smoothers: bool = True) -> tuple[pd.DataFrame | None, dict]:
    """Pattern scores and smoothers of the residuals against each variable, in one pass each.

    The table is :func:`pattern_scores`'s and each smoother :func:`binned_means`'s (the smoother
    is unweighted, as there).  Both come from per-bin sums of the residuals and their squares
    (taken about the overall mean, so nothing cancels), two ``bincount`` passes per variable.

    Returns
    -------
    (DataFrame or None, dict of name to DataFrame)
        The scores table (None when ``scores=False``) and the smoothers (empty when
        ``smoothers=False``).
    """
    e = _vector(resid, "resid")
    n = e.size
    w = None if weights is None else _vector(weights, "weights", n)
    if isinstance(variables, pd.DataFrame):
        items = [(c, variables[c]) for c in variables.columns]
    elif isinstance(variables, Mapping):
        items = list(variables.items())
    else:
        raise TypeError("variables must be a DataFrame or a mapping of name to values")
    fin = np.isfinite(e)
    good = fin if w is None else fin & np.isfinite(w) & (w > 0)
    all_fin, all_good = bool(fin.all()), bool(good.all())
    # about the overall mean, so per-bin sums of squares do not cancel
    centre = float(np.mean(e[fin])) if fin.any() else 0.0
    ec = e - centre
    ec2 = ec * ec
    wec = wec2 = None
    if w is not None:
        wec, wec2 = w * ec, w * ec2
    rows, smooth = [], {}
    for name, values in items:
        b = values if isinstance(values, Bins) else bin_values(values, bins=bins, name=name)
        if b.codes.size != n:
            raise ValueError(f"variable {name!r} has {b.codes.size} values but resid has {n}")
        plain = None  # unweighted sums, shared by the smoother when the scores are unweighted
        if scores:
            mask = None if (all_good and b.complete) else (b.codes >= 0) & good
            if w is None:
                plain = _bin_sums(b, mask, None, ec, ec2)
                used_rows, wsum, s1, s2 = plain
            else:
                used_rows, wsum, s1, s2 = _bin_sums(b, mask, w, wec, wec2)
            score, pvalue, used = _eta_from_sums(wsum, s1, s2, used_rows)
            rows.append({"score": score, "pvalue": pvalue, "bins_used": used, "kind": b.kind,
                         "n_used": used_rows})
        if smoothers:
            mask = None if (all_fin and b.complete) else (b.codes >= 0) & fin
            if plain is None:  # weighted scores (or none): the smoother is unweighted
                plain = _bin_sums(b, mask, None, ec, ec2)
            smooth[name] = _smoother_from_sums(b, centre, mask, *plain[1:])
    table = None
    if scores:
        table = pd.DataFrame(rows, index=pd.Index([name for name, _ in items], name="variable"),
                             columns=["score", "pvalue", "bins_used", "kind", "n_used"])
    return table, smooth


def _bin_sums(b, mask, weight, first, second):
    """Rows used and per-bin totals of ``weight`` (a count when None), ``first`` and ``second``
    over the rows in ``mask`` (None: every row)."""
    k = b.n_bins
    if mask is None:
        codes, pick = b.codes, (lambda v: v)
        total = b.summary()[0] if weight is None else None
    else:
        codes, pick = b.codes[mask], (lambda v: v[mask])
        total = np.bincount(codes, minlength=k).astype(float) if weight is None else None
    if total is None:
        total = np.bincount(codes, weights=pick(weight), minlength=k)
    return (int(codes.size), total, np.bincount(codes, weights=pick(first), minlength=k),
            np.bincount(codes, weights=pick(second), minlength=k))


def _eta_from_sums(wsum, s1, s2, rows):
    """Eta squared and the one-way F p-value from per-bin weight, sum and sum of squares."""
    used = wsum > 0
    k = int(used.sum())
    if k == 0:
        return np.nan, np.nan, 0
    ws, t1, t2 = wsum[used], s1[used], s2[used]
    sst = float(t2.sum() - t1.sum() ** 2 / ws.sum())
    ssw = float(np.sum(np.maximum(t2 - t1 * t1 / ws, 0.0)))
    ssb = max(sst - ssw, 0.0)
    if k < 2:
        return 0.0, np.nan, k
    if not sst > 0:
        return np.nan, np.nan, k
    score = min(ssb / sst, 1.0)
    if rows - k < 1:
        return score, np.nan, k
    F = (ssb / (k - 1)) / (ssw / (rows - k)) if ssw > 0 else np.inf
    return score, float(special.fdtrc(k - 1, rows - k, F)), k


def _smoother_from_sums(b, centre, kept, count, s1, s2) -> pd.DataFrame:
    _, xc, left, right = b.summary(kept)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_c = s1 / count
        dev2 = np.maximum(s2 - s1 * mean_c, 0.0)
        sd = np.sqrt(dev2 / (count - 1))
        half = stats.t.ppf(0.975, np.maximum(count - 1, 1)) * sd / np.sqrt(count)
    half[count < 2] = np.nan
    mean = mean_c + centre
    centre_col = xc if b.kind == "numeric" else np.asarray(b.labels, dtype=object)
    out = pd.DataFrame({"centre": centre_col, "mean": mean, "lower": mean - half,
                        "upper": mean + half, "count": count.astype(int), "left": left,
                        "right": right})
    return out[out["count"] > 0].reset_index(drop=True)


@dataclass(frozen=True, eq=False)
class Bins:
    """The bins of one variable: a bin per row and what each bin holds.

    Made by :func:`bin_values`; :func:`pattern_scores` and :func:`binned_means` accept it in
    place of the values, so a variable that does not change between fits is binned once.

    Attributes
    ----------
    codes : ndarray of intp
        Bin of each row, ``0 .. n_bins - 1``; -1 where the value is missing.
    kind : {"numeric", "categorical"}
    labels : list
        One label per bin: the value (few distinct values), the bin's upper-edge index
        (quantile bins) or the level.
    values : ndarray of float or None
        The numeric values (NaN where missing), for the per-bin x summaries; None for
        categoricals.
    """

    codes: np.ndarray
    kind: str
    labels: list
    values: np.ndarray | None = None

    def __post_init__(self):
        # the smallest signed integers that hold every bin: a Study keeps one array per variable
        k = len(self.labels)
        small = np.int8 if k < 127 else np.int16 if k < 32767 else np.int32
        if self.codes.dtype != small:
            object.__setattr__(self, "codes", self.codes.astype(small))

    @property
    def n_bins(self) -> int:
        return len(self.labels)

    @functools.cached_property
    def complete(self) -> bool:
        """Whether every row has a bin (no missing values)."""
        return bool(self.codes.size == 0 or self.codes.min() >= 0)

    @functools.cached_property
    def _summary_all(self):
        return self._summarise(self.codes, None if self.values is None else self.values)

    def summary(self, kept: np.ndarray | None = None):
        """Per bin: row count, mean x, smallest and largest x (NaN for categoricals)."""
        if kept is None:
            return self._summary_all
        return self._summarise(self.codes[kept], None if self.values is None
                               else self.values[kept])

    def _summarise(self, codes, xv):
        k = self.n_bins
        count = np.bincount(codes, minlength=k).astype(float)
        if xv is None:
            nan = np.full(k, np.nan)
            return count, nan, nan, nan
        centre = np.bincount(codes, weights=xv, minlength=k) / np.maximum(count, 1)
        left = np.full(k, np.inf)
        right = np.full(k, -np.inf)
        np.minimum.at(left, codes, xv)
        np.maximum.at(right, codes, xv)
        return count, centre, left, right


def bin_values(x, *, bins: int = 10, name: str = "x") -> Bins:
    """Bin a variable as :func:`pattern_scores` and :func:`binned_means` do.

    Numbers and datetimes (as nanoseconds) get quantile bins, or one bin per value when they
    have at most ``bins`` distinct values; anything else gets one bin per level (sorted).
    """
    if int(bins) < 2:
        raise ValueError(f"bins must be at least 2, got {bins!r}")
    s = x.reset_index(drop=True) if isinstance(x, pd.Series) else pd.Series(x, name=name)
    if pd.api.types.is_datetime64_any_dtype(s.dtype):
        # times bin like numbers (nanoseconds); missing times stay missing
        s = pd.Series(np.where(s.isna(), np.nan, s.to_numpy().astype("datetime64[ns]")
                               .astype(np.int64).astype(float)))
    if not _is_numeric(s):
        codes, uniques = pd.factorize(s, sort=True)
        return Bins(np.asarray(codes, dtype=np.intp), "categorical", list(uniques))
    v = _as_float(s)
    fin = np.isfinite(v)
    all_fin = bool(fin.all())
    xf = v if all_fin else v[fin]
    codes = np.full(v.size, -1, dtype=np.intp)
    if xf.size == 0:
        return Bins(codes, "numeric", [], v)
    q = np.linspace(0, 1, int(bins) + 1)
    # bins + 1 distinct order statistics prove there are more than ``bins`` distinct values, so
    # the full sort that counts them is needed only when some of these coincide
    at = np.unique(np.floor(q * (xf.size - 1)).astype(np.intp))
    order_stats = np.partition(xf, at)
    if np.unique(order_stats[at]).size < q.size:
        distinct = np.unique(xf)
        if distinct.size <= bins:
            found = np.searchsorted(distinct, xf)
            if all_fin:
                codes = found.astype(np.intp, copy=False)
            else:
                codes[fin] = found
            return Bins(codes, "numeric", list(distinct), v)
    edges = np.unique(np.quantile(order_stats, q))
    raw = np.searchsorted(edges[1:-1], xf, side="right")
    # keep only bins that hold rows, numbered in order
    present = np.bincount(raw, minlength=edges.size - 1) > 0
    remap = np.cumsum(present) - 1
    found = remap[raw]
    if all_fin:
        codes = found.astype(np.intp, copy=False)
    else:
        codes[fin] = found
    return Bins(codes, "numeric", list(np.flatnonzero(present)), v)


def _vector(values, what, n=None) -> np.ndarray:
    v = np.asarray(values, dtype=float).ravel()
    if n is not None and v.size != n:
        raise ValueError(f"{what} has {v.size} values, expected {n}")
    return v
