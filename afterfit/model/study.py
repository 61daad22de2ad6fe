"""Study: the public, headless object behind the workbench.

A Study holds the analyst's data (never modified), declarations, and a timeline of immutable steps.
Each step fixes a model *state* (terms, intercept, excluded rows with reasons); fits are computed
for a state on demand and cached, so undo/redo give back exactly the earlier numbers.
"""
from __future__ import annotations

import datetime as _dt
import functools
import hashlib
import json
import math
import threading
from collections import OrderedDict
from dataclasses import dataclass, field, replace
from functools import cached_property, lru_cache
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import pandas as pd
import patsy
from scipy import stats

from afterfit.model import terms as T
from afterfit.model.design import DesignCache, design_for, working_frame
from afterfit.model.ols import LeastSquares, fit_ols
from afterfit.model.threads import single_blas

__all__ = ["Study", "Fit", "Step", "State"]

_SAVE_VERSION = 1
_SHADOWING = {"C", "I", "Q", "np", "cr", "bs", "cc", "te", "center", "standardize", "scale"}
_COV_TYPES = ("nonrobust", "HC0", "HC1", "HC2", "HC3")


# ---------------------------------------------------------------------------------------------
# results
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Fit:
    """A fitted linear model, labelled like statsmodels and indexed like the user's data.

    ``rmse`` is sqrt(SSR / nobs) (the same scale as cross-validated RMSE); ``sigma`` is
    sqrt(SSR / df_resid), the residual standard error.  Aliased columns (rank deficiency) are
    listed in ``aliased`` and left out of ``params``.
    """

    params: pd.Series
    bse: pd.Series
    tvalues: pd.Series
    pvalues: pd.Series
    fitted: pd.Series
    resid: pd.Series
    rmse: float
    sigma: float
    r2: float
    r2_adj: float
    llf: float
    aic: float
    bic: float
    df_resid: int
    df_model: int
    nobs: int
    cond: float
    rank: int
    aliased: tuple
    cov_type: str
    method: str
    formula: str

    def conf_int(self, alpha: float = 0.05) -> pd.DataFrame:
        """Confidence intervals from the t distribution with df_resid degrees of freedom."""
        q = stats.t.ppf(1 - alpha / 2, self.df_resid) if self.df_resid > 0 else np.nan
        return pd.DataFrame({"lower": self.params - q * self.bse, "upper": self.params + q * self.bse})

    def table(self) -> pd.DataFrame:
        """One row per parameter: estimate, standard error, t, p and 95 % interval."""
        ci = self.conf_int()
        return pd.DataFrame({"estimate": self.params, "std_err": self.bse, "t": self.tvalues,
                             "p": self.pvalues, "lower": ci["lower"], "upper": ci["upper"]})


@dataclass(frozen=True)
class State:
    """What defines a model: its terms, the intercept and the excluded rows (positions -> reason)."""

    terms: tuple
    intercept: bool
    excluded: tuple = ()  # ((position, reason), ...) sorted by position

    @property
    def excluded_positions(self) -> frozenset:
        return frozenset(p for p, _ in self.excluded)


@dataclass(frozen=True)
class Step:
    """One entry of the timeline.  Immutable; ``state`` is the model after the step."""

    index: int
    kind: str  # start | add | remove | exclude | include | holdout
    detail: str
    reason: str
    time: str
    formula: str
    n_rows: int
    tag: str = ""
    examined: int = 0
    after_holdout: bool = False
    state: State = field(default=None, repr=False)
    rows: tuple = field(default=(), repr=False)  # positions touched by exclude/include


# ---------------------------------------------------------------------------------------------
# one fitted state
# ---------------------------------------------------------------------------------------------
class _Model:
    """Everything computed for one State; cached properties fill in on first use."""

    @single_blas
    def __init__(self, study: "Study", state: State, cache: DesignCache, avail: np.ndarray):
        self.study = study
        self.state = state
        self.cache = cache
        self.memo: dict = {}  # per-state results for the view (panel variables, scores, smoothers)
        rhs = [patsy.Term([])] if state.intercept else []
        rhs += [_parse_term(t) for t in state.terms]
        if not rhs:
            raise ValueError("the model has no terms and no intercept: add a term first")
        ordered, names, tcs = design_for(cache, rhs)
        self.term_columns = tcs
        self.names = names
        y = cache.response(study.response)
        blocks = [tc.values for tc in tcs]
        ok = np.isfinite(y)
        for tc in tcs:
            if not tc.all_finite:
                ok &= tc.finite
        w = None
        if study._weights is not None:
            w = study._weights[avail]
            ok &= np.isfinite(w)
        self.finite = ok
        self.all_finite = bool(ok.all())
        self.avail = avail
        self.rows = avail if self.all_finite else avail[ok]  # positions in the user's data
        self.dropped = avail[~ok]
        self._buffer, self.X = self._assemble(tcs, ok, study._last_model)
        if not self.all_finite:
            y = y[ok]
            w = None if w is None else w[ok]
        self.y = np.ascontiguousarray(y)
        self.w = w
        n, p = self.X.shape
        if n < p:
            raise ValueError(
                f"{n} usable rows cannot estimate {p} parameters ({len(self.dropped)} rows were "
                "dropped for missing values): use fewer terms or more data"
            )
        self.ls: LeastSquares = fit_ols(self.X, self.y, weights=w, names=tuple(names))
        if self.ls.method == "extended":
            # ill-conditioned: give the kernel the polynomial columns in extended precision too
            from afterfit.model.design import extended_values

            ext = np.concatenate([extended_values(cache, tc) for tc in tcs], axis=1)
            if not self.all_finite:
                ext = ext[ok]
            self.ls = fit_ols(self.X, self.y, weights=w, names=tuple(names), X_ext=ext)
        study._last_model = self

    def _assemble(self, tcs, ok, parent):
        """The design as a column-major view of a shared buffer.

        A model that extends its parent by columns at the end (the usual "add a term" step, on the
        same rows) writes only its new columns into the parent's spare buffer space; the parent's
        columns are never touched, and a buffer is extended by one child only (``used`` check), so
        every model keeps seeing exactly its own design.
        """
        p = sum(len(tc.names) for tc in tcs)
        n = int(ok.sum())
        start = 0
        buf = None
        if (parent is not None and parent.cache is self.cache and parent._buffer is not None
                and np.array_equal(parent.finite, ok)):
            k = len(parent.term_columns)
            pb = parent._buffer
            if (k <= len(tcs) and all(a is b for a, b in zip(parent.term_columns, tcs[:k]))
                    and pb["used"] == parent.X.shape[1] and pb["data"].shape[1] >= p):
                buf, start = pb, parent.X.shape[1]
        if buf is None:
            buf = {"data": np.empty((n, p + _SPARE), order="F"), "used": 0}
            start = 0
        col = 0
        for tc in tcs:
            q = len(tc.names)
            if col >= start:
                vals = tc.values if self.all_finite else tc.values[ok]
                buf["data"][:, col:col + q] = vals
            col += q
        buf["used"] = p
        return buf, buf["data"][:, :p]

    @cached_property
    def labels(self) -> pd.Index:
        return self.study.data.index[self.rows]

    @cached_property
    def fit(self) -> Fit:
        ls, st = self.ls, self.study
        idx = [nm for i, nm in enumerate(self.names) if i in set(ls.kept.tolist())]
        params = pd.Series(ls.params[ls.kept], index=idx, name="params")
        bse = pd.Series(ls.bse(st.cov_type)[ls.kept], index=idx, name="bse")
        with np.errstate(divide="ignore", invalid="ignore"):
            tv = params / bse
        if st.cov_type == "nonrobust":
            pv = 2 * stats.t.sf(np.abs(tv), ls.df_resid) if ls.df_resid > 0 else np.full(len(tv), np.nan)
        else:  # as statsmodels: robust covariances use the normal reference distribution
            pv = 2 * stats.norm.sf(np.abs(tv))
        n = ls.nobs
        k_const = 1 if self.state.intercept else 0
        df_model = ls.rank - k_const
        if ls.weights is None:
            ybar = ls.y.mean()
            tss = float(((ls.y - ybar) ** 2).sum()) if k_const else float((ls.y**2).sum())
            llf = -n / 2 * (math.log(2 * math.pi) + math.log(ls.ssr / n) + 1) if ls.ssr > 0 else math.inf
        else:
            wy = ls.weights
            ybar = float((wy * ls.y).sum() / wy.sum())
            tss = float((wy * (ls.y - ybar) ** 2).sum()) if k_const else float((wy * ls.y**2).sum())
            llf = (-n / 2 * (math.log(2 * math.pi) + math.log(ls.ssr / n) + 1)
                   + 0.5 * float(np.log(wy).sum())) if ls.ssr > 0 else math.inf
        r2 = 1 - ls.ssr / tss if tss > 0 else float("nan")
        r2_adj = 1 - (1 - r2) * (n - k_const) / ls.df_resid if ls.df_resid > 0 else float("nan")
        aic = -2 * llf + 2 * ls.rank
        bic = -2 * llf + math.log(n) * ls.rank
        lab = self.labels
        return Fit(
            params=params, bse=bse, tvalues=pd.Series(tv, index=idx, name="t"),
            pvalues=pd.Series(pv, index=idx, name="p"),
            fitted=pd.Series(ls.fitted, index=lab, name="fitted"),
            resid=pd.Series(ls.resid, index=lab, name="resid"),
            rmse=math.sqrt(ls.ssr / n), sigma=math.sqrt(ls.sigma2) if ls.df_resid > 0 else float("nan"),
            r2=r2, r2_adj=r2_adj, llf=llf, aic=aic, bic=bic, df_resid=ls.df_resid,
            df_model=df_model, nobs=n, cond=ls.cond, rank=ls.rank, aliased=tuple(ls.aliased),
            cov_type=st.cov_type, method=ls.method, formula=st._formula_for(self.state),
        )

    @cached_property
    @single_blas
    def influence(self) -> pd.DataFrame:
        from afterfit.model.influence import influence_frame

        return influence_frame(self.ls, index=self.labels)

    @cached_property
    def checks(self) -> pd.DataFrame:
        return self.run_checks(None)

    @single_blas
    def run_checks(self, only) -> pd.DataFrame:
        from afterfit.model.checks import run_checks

        order = None
        if self.study._time is not None:
            order = self.study._time[self.rows]
        if only is None:
            return run_checks(self.ls, has_const=self.state.intercept, order=order)
        return run_checks(self.ls, has_const=self.state.intercept, order=order, only=only)

    @cached_property
    @single_blas
    def cv(self):
        from afterfit.model.crossval import cross_validate

        st = self.study
        every = len(self.rows) == len(st._folds)  # every row (so in order): no copy
        folds = st._folds if every else st._folds[self.rows]
        return cross_validate(self.X, self.y, folds, weights=self.w, scheme=st.cv_scheme)

    def extended(self, z: np.ndarray) -> np.ndarray | None:
        """``[X | z]`` written into this design's spare buffer columns, or None when none are free.

        The spare columns belong to no model until a child model claims them (``used``), and
        the child writes its own columns there, so borrowing them for a look changes nothing.
        """
        buf = self._buffer
        p, q = self.X.shape[1], z.shape[1]
        with self.study._lock:
            if buf is None or buf["used"] != p or buf["data"].shape[1] < p + q:
                return None
            buf["data"][:, p:p + q] = z
            return buf["data"][:, :p + q]

    def frame(self) -> pd.DataFrame:
        """The user's columns on the fitted rows (positional index), for candidates and plots."""
        if self.all_finite:  # every row: the working frame itself (nothing copied)
            return self.cache.frame
        return self.cache.frame.iloc[np.nonzero(self.finite)[0]].reset_index(drop=True)

    def term_block(self, term: str) -> tuple[np.ndarray, list[str]]:
        """Columns a term would add to this model (coded as patsy would code it here)."""
        new = [_parse_term(t) for t in T.normalise_term(term)]
        have = [patsy.Term([])] if self.state.intercept else []
        have += [_parse_term(t) for t in self.state.terms]
        new = [t for t in new if t not in have]
        codings = self.cache.codings(have + new)
        cols, names = [], []
        for t in new:
            tc = self.cache.columns(t, codings[t], keep=False)  # a candidate's look only
            cols.append(tc.values if self.all_finite else tc.values[self.finite])
            names.extend(tc.names)
        if not cols:
            return np.empty((len(self.rows), 0)), []
        return np.concatenate(cols, axis=1), names


# spare columns in a design buffer: an added term's columns (and a candidate's, for its change in
# cross-validated error) are written there instead of copying the design
_SPARE = 6


@lru_cache(maxsize=4096)
def _parse_term(name: str) -> patsy.Term:
    desc = patsy.ModelDesc.from_formula("__y__ ~ 0 + " + name)
    ts = [t for t in desc.rhs_termlist if t.factors]
    if len(ts) != 1:
        raise ValueError(f"{name!r} is not a single term")
    return ts[0]


# ---------------------------------------------------------------------------------------------
# the Study
# ---------------------------------------------------------------------------------------------
class Study:
    """A model under examination: fit, diagnostics, candidate terms and a timeline of steps.

    Parameters
    ----------
    df : the data (pandas DataFrame). It is never modified; rows are referred to by its index,
        which must have unique labels.
    formula : a statsmodels/patsy formula such as ``"y ~ x + C(g)"``.
    weights : None, a column name, or an array aligned with ``df`` (WLS weights, > 0).
    time : an ordered column (numeric, or datetime read as decimal years) for time-aware
        candidates, blocked cross-validation and checks in time order.
    period : cycle length(s) in the units of ``time`` (years for datetimes).
    groups : categorical columns whose levels may have their own slopes.
    plausible : columns the analyst has grounds for (a list, or ``{name: "reason"}``).
    cv : number of cross-validation folds (>= 2).
    cv_scheme : "kfold" (shuffled), "blocked" (contiguous in time) or "forward" (forward
        chaining); default "blocked" when ``time`` is given, else "kfold".
    holdout : fraction of rows sealed away before anything is fitted (0 for none).
    seed : seed for folds and the holdout.
    cov_type : "nonrobust" or "HC0".."HC3" for standard errors.
    alpha : level for the candidate tags and check readings.
    multiplicity : "holm" or "bh" (Benjamini–Hochberg) over candidates examined at a step.
    """

    def __init__(self, df, formula, *, weights=None, time=None, period=None, groups=None,
                 plausible=None, cv=10, cv_scheme=None, holdout=0.0, seed=0,
                 cov_type="nonrobust", alpha=0.05, multiplicity="holm"):
        if not isinstance(df, pd.DataFrame):
            raise TypeError(f"Study needs a pandas DataFrame, got {type(df).__name__}")
        if len(df) == 0:
            raise ValueError("the data frame has no rows")
        if not df.columns.is_unique:
            dup = df.columns[df.columns.duplicated()].unique().tolist()
            raise ValueError(f"column names must be unique; duplicated: {dup!r}. Rename them first")
        if not df.index.is_unique:
            raise ValueError(
                "the data frame's index has duplicate labels, so rows could not be named in "
                "exclusions; use df.reset_index(drop=True) (or a unique key) first"
            )
        shadow = [c for c in df.columns if c in _SHADOWING]
        if shadow:
            raise ValueError(
                f"column(s) {shadow!r} have the name of a formula function (patsy reads the data "
                "before its functions, so C(), I(), Q(), np.… or cr() would stop working, in "
                "afterfit and in statsmodels alike); rename them first, e.g. "
                f"df.rename(columns={{{shadow[0]!r}: {shadow[0] + '_value'!r}}})"
            )
        if cov_type not in _COV_TYPES:
            raise ValueError(f"cov_type must be one of {_COV_TYPES}, got {cov_type!r}")
        if multiplicity not in ("holm", "bh"):
            raise ValueError(f"multiplicity must be 'holm' or 'bh', got {multiplicity!r}")
        if not (isinstance(cv, (int, np.integer)) and cv >= 2):
            raise ValueError(f"cv must be a whole number of folds >= 2, got {cv!r}")
        if not (0 <= float(holdout) < 1):
            raise ValueError(f"holdout must be a fraction in [0, 1), got {holdout!r}")
        if not (0 < float(alpha) < 1):
            raise ValueError(f"alpha must be in (0, 1), got {alpha!r}")
        # a shallow copy: pandas' copy-on-write keeps it as it is now, whatever later happens
        # to the user's frame, without copying any values
        self.data = df.copy(deep=False)
        self._fingerprint: str | None = None
        self.cov_type = cov_type
        self.alpha = float(alpha)
        self.multiplicity = multiplicity
        self.seed = int(seed)
        self.k_folds = int(cv)
        self.delta_cv_top = 5  # candidates (best first) whose change in CV RMSE is computed
        self.holdout_fraction = float(holdout)
        self._lock = threading.RLock()
        self._listeners: list[Callable] = []
        self.initial_formula = formula

        response, rhs_terms, intercept = T.split_formula(formula)
        self.response = response
        self.declarations = T.Declarations.build(df.columns, time=time, period=period,
                                                 groups=groups, plausible=plausible)
        # weights
        self.weights_name = None
        self._weights = None
        if weights is not None:
            if isinstance(weights, str):
                if weights not in df.columns:
                    raise ValueError(f"weights= names {weights!r}, which is not a column")
                self.weights_name = weights
                wv = pd.to_numeric(df[weights], errors="coerce").to_numpy(dtype=float)
            else:
                wv = np.asarray(weights, dtype=float).ravel()
                if len(wv) != len(df):
                    raise ValueError(f"weights has {len(wv)} values for {len(df)} rows")
            if np.any(wv[np.isfinite(wv)] <= 0):
                raise ValueError("weights must be positive; drop rows with zero weight or fix them")
            self._weights = wv
        # time: numeric, datetimes as decimal years (a derived column for formulas)
        self.time_column = None
        self._time = None
        extra = {}
        if self.declarations.time is not None:
            tname = self.declarations.time
            s = df[tname]
            if pd.api.types.is_datetime64_any_dtype(s.dtype):
                derived = tname + "_years"
                while derived in df.columns:
                    derived += "_"
                tv = decimal_years(s)
                extra[derived] = tv
                self.time_column = derived
            elif pd.api.types.is_numeric_dtype(s.dtype) and not pd.api.types.is_bool_dtype(s.dtype):
                tv = s.to_numpy(dtype=float)
                self.time_column = tname
            else:
                raise ValueError(
                    f"time= {tname!r} must be numeric or datetime, got dtype {s.dtype}; "
                    "convert it (pd.to_datetime or pd.to_numeric) first"
                )
            self._time = np.asarray(tv, dtype=float)
        self.derived = dict(extra)  # name -> values (also in formulas); written out by to_code
        base = df if not extra else df.assign(**{k: np.asarray(v) for k, v in extra.items()})
        self._frame = working_frame(base)
        n = len(df)
        # sealed holdout: chosen before anything is fitted
        self._holdout_mask = np.zeros(n, dtype=bool)
        if self.holdout_fraction > 0:
            self._holdout_mask[self._holdout_positions()] = True
            if self._holdout_mask.all():
                raise ValueError("the holdout would take every row; use a smaller fraction")
        self._holdout_record = None
        scheme = cv_scheme or ("blocked" if self._time is not None else "kfold")
        if scheme not in ("kfold", "blocked", "forward"):
            raise ValueError(f"cv_scheme must be 'kfold', 'blocked' or 'forward', got {scheme!r}")
        if scheme != "kfold" and self._time is None:
            raise ValueError(f"cv_scheme={scheme!r} needs time= to order the rows")
        self.cv_scheme = scheme

        self._last_model = None
        self._caches: OrderedDict = OrderedDict()
        self._models: OrderedDict = OrderedDict()
        self._cand_cache: dict = {}
        self._summaries: dict = {}  # state -> CV numbers and rank for the meter
        self._by_rows: tuple | None = None  # (rows, {key: result}) for results set by rows alone
        self._examined_terms: set = set()
        state = State(terms=tuple(rhs_terms), intercept=intercept, excluded=())
        self._steps: list[Step] = []
        self._discarded: list[Step] = []
        self._position = -1
        model = self._model(state)  # errors here surface before the Study exists
        self._push(Step(index=0, kind="start", detail=f"start: {self._formula_for(state)}",
                        reason="", time=_now(), formula=self._formula_for(state),
                        n_rows=len(model.rows), state=state))

    @cached_property
    def _folds(self) -> np.ndarray:
        """Fold labels over all rows, made once so a row keeps its fold across steps."""
        from afterfit.model.crossval import make_folds

        order = None if self._time is None else np.where(np.isnan(self._time), np.inf, self._time)
        return make_folds(len(self.data), k=self.k_folds, seed=self.seed, order=order,
                          scheme=self.cv_scheme)

    # -- bookkeeping ----------------------------------------------------------------------------
    def _holdout_positions(self) -> np.ndarray:
        n = len(self.data)
        k = int(math.ceil(self.holdout_fraction * n))
        if self._time is not None:
            # the latest rows in time: a holdout from the future, as the model will be used
            order = pd.Series(self._time).sort_values(kind="stable").index.to_numpy()
            return order[n - k:]
        labels = self.data.sample(frac=self.holdout_fraction, random_state=self.seed).index
        return self.data.index.get_indexer(labels)

    def _cache_for(self, excluded: frozenset) -> tuple[DesignCache, np.ndarray]:
        key = excluded
        hit = self._caches.get(key)
        if hit is not None:
            self._caches.move_to_end(key)
            return hit
        mask = ~self._holdout_mask.copy()
        if excluded:
            mask[list(excluded)] = False
        avail = np.nonzero(mask)[0]
        frame = self._frame if len(avail) == len(self._frame) else \
            self._frame.take(avail).reset_index(drop=True)
        hit = (DesignCache(frame), avail)
        self._caches[key] = hit
        # a cache holds term columns (and, with exclusions, a copy of the frame): fewer on large
        # tables
        keep = 3 if len(self._frame) * max(self._frame.shape[1], 1) < (1 << 24) else 2
        while len(self._caches) > keep:
            self._caches.popitem(last=False)
        return hit

    def _model(self, state: State) -> _Model:
        with self._lock:
            m = self._models.get(state)
            if m is not None:
                self._models.move_to_end(state)
                return m
            cache, avail = self._cache_for(state.excluded_positions)
            m = _Model(self, state, cache, avail)
            self._models[state] = m
            # each model keeps its fit, influence and cross-validation (about 16 columns of
            # rows): keep six for instant undo on small tables, only the last two on large ones
            per_model = 8 * 16 * max(len(m.rows), 1)
            keep = int(min(6, max(2, (1 << 27) // per_model)))
            while len(self._models) > keep:
                self._models.popitem(last=False)
            return m

    def _formula_for(self, state: State) -> str:
        rhs = list(state.terms)
        if not state.intercept:
            rhs = ["0"] + rhs
        return f"{self.response} ~ " + (" + ".join(rhs) if rhs else "1")

    def _push(self, step: Step) -> None:
        with self._lock:
            self._discarded.extend(self._steps[self._position + 1:])
            del self._steps[self._position + 1:]
            step = replace(step, index=len(self._steps),
                           after_holdout=self._holdout_record is not None)
            self._steps.append(step)
            self._position = len(self._steps) - 1
        self._notify(step.kind)

    def _notify(self, event: str) -> None:
        for fn in list(self._listeners):
            fn(self, event)

    def subscribe(self, fn: Callable) -> Callable:
        """Call ``fn(study, event)`` after every change; returns a function that unsubscribes."""
        self._listeners.append(fn)

        def unsubscribe():
            if fn in self._listeners:
                self._listeners.remove(fn)

        return unsubscribe

    # -- current state --------------------------------------------------------------------------
    @property
    def state(self) -> State:
        return self._steps[self._position].state

    @property
    def _current(self) -> _Model:
        return self._model(self.state)

    @property
    def steps(self) -> tuple:
        """The timeline (active branch): immutable Step records."""
        return tuple(self._steps)

    @property
    def position(self) -> int:
        return self._position

    @property
    def terms(self) -> list:
        return list(self.state.terms)

    @property
    def formula(self) -> str:
        return self._formula_for(self.state)

    @property
    def fit(self) -> Fit:
        return self._current.fit

    @property
    def influence(self) -> pd.DataFrame:
        """Leverage, studentized residuals, Cook's distance, DFFITS and flags (common practice)."""
        return self._current.influence

    def checks(self, *, only: Sequence[str] | None = None) -> pd.DataFrame:
        """Specification tests: statistic, df, p-value and a plain reading of each.

        ``only`` names the checks wanted (index labels of the full table, "VIF" for every VIF
        row); the rest are not computed.  Results are cached per model state.
        """
        model = self._current
        if only is None:
            return model.checks
        if isinstance(only, str):
            only = (only,)
        only = tuple(only)
        key = ("checks", only)
        hit = model.memo.get(key)
        if hit is None:
            full = model.__dict__.get("checks")  # the full table, when it has been computed
            if full is None:
                hit = model.run_checks(only)
            else:
                names = [str(t) for t in full.index if not str(t).startswith("VIF: ")] + ["VIF"]
                unknown = [o for o in only if o not in names]
                if unknown:
                    raise ValueError(f"unknown check(s) {unknown}; choose from {names}")
                hit = full.loc[[t for t in full.index
                                if t in only or ("VIF" in only and str(t).startswith("VIF: "))]]
            model.memo[key] = hit
        return hit.copy()

    @property
    def cv(self):
        """Cross-validation of the current model (see afterfit.model.crossval.CVResult)."""
        return self._current.cv

    @property
    def rows(self) -> pd.Index:
        """Index labels of the rows in the current fit."""
        return self._current.labels

    @property
    def dropped(self) -> pd.Index:
        """Labels of rows left out because a value the model needs is missing or non-finite."""
        return self.data.index[self._current.dropped]

    @property
    def excluded(self) -> dict:
        """Rows the analyst excluded: label -> reason."""
        idx = self.data.index
        return {idx[p]: r for p, r in self.state.excluded}

    @property
    def holdout_rows(self) -> pd.Index:
        return self.data.index[np.nonzero(self._holdout_mask)[0]]

    @property
    def time_values(self):
        """Numeric time of each fitted row (decimal years for datetimes), or None."""
        if self._time is None:
            return None
        return pd.Series(self._time[self._current.rows], index=self.rows, name="time")

    @property
    def can_undo(self) -> bool:
        return self._position > 0

    @property
    def can_redo(self) -> bool:
        return self._position < len(self._steps) - 1

    # -- actions --------------------------------------------------------------------------------
    def add(self, term: str, reason: str | None = None) -> "Study":
        """Add a formula term (e.g. ``"I(x ** 2)"`` or ``"C(g):x"``).

        A term tagged *speculative* (neither declared nor evident in the residuals) needs a
        ``reason``; the reason is kept in the timeline and the exported code.
        """
        with self._lock:
            names = T.normalise_term(term)
            state = self.state
            new = [t for t in names if t not in state.terms]
            if not new:
                raise ValueError(f"{term!r} is already in the model ({self.formula})")
            tag, examined = self._tag_for(term)
            reason = (reason or "").strip()
            if tag == "speculative" and not reason:
                raise ValueError(
                    f"{term!r} is speculative: no declaration supports it and the residuals do "
                    "not show it after multiplicity control. Give a one-line reason= to add it "
                    "anyway (it is recorded in the audit)"
                )
            new_state = replace(state, terms=state.terms + tuple(new))
            model = self._model(new_state)
            self._push(Step(index=0, kind="add", detail="add " + " + ".join(new), reason=reason,
                            time=_now(), formula=self._formula_for(new_state),
                            n_rows=len(model.rows), tag=tag, examined=examined, state=new_state))
        return self

    def remove(self, term: str, reason: str | None = None) -> "Study":
        """Remove a term from the model (patsy spelling, e.g. ``"C(g):x"``)."""
        with self._lock:
            names = T.normalise_term(term)
            state = self.state
            missing = [t for t in names if t not in state.terms]
            if missing:
                raise ValueError(
                    f"{', '.join(missing)} is not in the model; its terms are: "
                    f"{', '.join(state.terms) or '(none)'}"
                )
            new_state = replace(state, terms=tuple(t for t in state.terms if t not in names))
            if not new_state.terms and not new_state.intercept:
                raise ValueError("removing it would leave the model empty")
            model = self._model(new_state)
            self._push(Step(index=0, kind="remove", detail="remove " + " + ".join(names),
                            reason=(reason or "").strip(), time=_now(),
                            formula=self._formula_for(new_state), n_rows=len(model.rows),
                            state=new_state))
        return self

    def _positions(self, rows) -> np.ndarray:
        idx = self.data.index
        if isinstance(rows, pd.Series) and rows.dtype == bool:
            rows = rows[rows].index
        elif isinstance(rows, np.ndarray) and rows.dtype == bool:
            if len(rows) != len(idx):
                raise ValueError("a boolean row mask must have one value per row of the data")
            rows = idx[rows]
        elif np.isscalar(rows) or isinstance(rows, (str, tuple)):
            rows = [rows]
        rows = list(rows)
        pos = idx.get_indexer(rows)
        bad = [r for r, p in zip(rows, pos) if p < 0]
        if bad:
            raise ValueError(f"these rows are not in the data's index: {bad[:10]!r}")
        hold = [r for r, p in zip(rows, pos) if self._holdout_mask[p]]
        if hold:
            raise ValueError(f"rows {hold[:10]!r} are in the sealed holdout and cannot be touched")
        return np.unique(pos)

    def exclude(self, rows, reason: str) -> "Study":
        """Leave rows (index labels or a boolean mask) out of the fit, with a reason."""
        if not isinstance(reason, str) or not reason.strip():
            raise ValueError("exclude() needs a reason: say why these rows do not belong")
        with self._lock:
            pos = self._positions(rows)
            state = self.state
            have = state.excluded_positions
            new = [int(p) for p in pos if p not in have]
            if not new:
                raise ValueError("those rows are already excluded")
            excl = tuple(sorted(state.excluded + tuple((p, reason.strip()) for p in new)))
            new_state = replace(state, excluded=excl)
            model = self._model(new_state)
            labels = self.data.index[new]
            self._push(Step(index=0, kind="exclude",
                            detail=f"exclude {len(new)} row(s): {_short_labels(labels)}",
                            reason=reason.strip(), time=_now(),
                            formula=self._formula_for(new_state), n_rows=len(model.rows),
                            state=new_state, rows=tuple(new)))
        return self

    def include(self, rows, reason: str | None = None) -> "Study":
        """Bring excluded rows back into the fit."""
        with self._lock:
            pos = set(int(p) for p in self._positions(rows))
            state = self.state
            back = [p for p, _ in state.excluded if p in pos]
            if not back:
                raise ValueError("none of those rows is excluded")
            new_state = replace(state, excluded=tuple((p, r) for p, r in state.excluded
                                                      if p not in pos))
            model = self._model(new_state)
            self._push(Step(index=0, kind="include",
                            detail=f"include {len(back)} row(s): "
                                   f"{_short_labels(self.data.index[back])}",
                            reason=(reason or "").strip(), time=_now(),
                            formula=self._formula_for(new_state), n_rows=len(model.rows),
                            state=new_state, rows=tuple(back)))
        return self

    def undo(self) -> "Study":
        """Go back one step (the fit is exactly the earlier one)."""
        with self._lock:
            if not self.can_undo:
                raise ValueError("nothing to undo: this is the first step")
            self._position -= 1
        self._notify("undo")
        return self

    def redo(self) -> "Study":
        """Go forward again after an undo."""
        with self._lock:
            if not self.can_redo:
                raise ValueError("nothing to redo")
            self._position += 1
        self._notify("redo")
        return self

    # -- candidates -----------------------------------------------------------------------------
    @single_blas
    def candidates(self) -> pd.DataFrame:
        """Candidate terms for the current model, ranked stated, evident, speculative."""
        from afterfit.model import candidates as C
        from afterfit.model.fastterms import evaluate_block

        with self._lock:
            state = self.state
            hit = self._cand_cache.get(state)
            if hit is not None:
                return hit
            model = self._current
            frame = model.frame()
            skip = {self.response}
            if self.weights_name:
                skip.add(self.weights_name)
            if self.declarations.time is not None and self.time_column != self.declarations.time:
                skip.add(self.declarations.time)  # the datetime itself; its decimal years are used
            cands = C.catalogue(frame, response=self.response, model_terms=list(state.terms),
                                declarations=self.declarations, time=self.time_column,
                                skip=tuple(skip), fit=model.ls)
            failed = {}
            rows = None if model.all_finite else model.finite

            def block_of(c) -> np.ndarray:
                try:
                    # same span as patsy's columns without patsy's per-factor cost; None means a
                    # shape it does not reproduce, which patsy then codes
                    block = evaluate_block(c.term, model.cache.frame, rows,
                                           intercept=state.intercept, model_terms=state.terms)
                    return block if block is not None else model.term_block(c.term)[0]
                except (ValueError, patsy.PatsyError) as exc:
                    failed[c.term] = f"could not be evaluated: {str(exc).splitlines()[0]}"
                    return np.full((len(model.rows), 1), np.nan)

            # a group of candidates' columns at a time, about a third of the design's width, so the
            # candidates never hold much more memory than the design itself
            scores = C.score_candidates_in_groups(
                model.ls, [functools.partial(block_of, c) for c in cands],
                method=self.multiplicity, alpha=self.alpha,
                searched=[c.searched for c in cands], max_columns=max(4, model.X.shape[1] // 3))
            table = C.rank_candidates(cands, scores, alpha=self.alpha)
            if failed:
                table["note"] = [failed.get(t, n) for t, n in zip(table["term"], table["note"])]
            # change in CV RMSE for the leading candidates (each costs about one fit); their
            # columns are made again here, a few at most
            where = {c.term: c for c in cands}
            top = [block_of(where[t]) for t in table["term"][: self.delta_cv_top]]
            change = C.delta_cv(model.X, model.y, self._folds[model.rows], top,
                                top=self.delta_cv_top, weights=model.w,
                                scheme=self.cv_scheme, base=model.cv.rmse_cv,
                                extend=model.extended)
            table["delta_cv"] = np.concatenate([change, np.full(len(table) - len(top), np.nan)])
            table.attrs.setdefault("examined", len(cands))
            self._cand_cache[state] = table
            self._examined_terms.update(c.term for c in cands)
            return table

    def _declared(self, term: str) -> bool:
        """True when every column the term reads is declared (plausible, groups or time)."""
        vars_ = T.term_variables(term, list(self._frame.columns))
        decl = self.declarations
        declared = set(decl.plausible) | set(decl.groups) | ({self.time_column} - {None})
        return bool(vars_) and all(v in declared for v in vars_)

    def _tag_for(self, term: str) -> tuple[str, int]:
        """The tag a term has now, and how many candidates the analyst had in view.

        A declared term is *stated* without screening; otherwise the candidate table decides
        (computed if needed); a term the catalogue does not hold is *speculative*.
        """
        table = self._cand_cache.get(self.state)
        if table is None and self._declared(term):
            return "stated", 0
        if table is None:
            table = self.candidates()
        key = tuple(T.normalise_term(term))
        for cand_term, tag in zip(table["term"], table["tag"]):
            if tuple(T.normalise_term(cand_term)) == key:
                return tag, len(table)
        return ("stated" if self._declared(term) else "speculative"), len(table)

    # -- panels for the view --------------------------------------------------------------------
    def panel_variables(self) -> dict:
        """Every plottable column over the fitted rows (response and weights left out).

        Datetimes are given as decimal years.  A data column called "fitted" is keyed
        "fitted (column)" so it never hides the fitted values.  Kept while the fitted rows stay
        the same (adding or removing a term usually leaves them so).
        """
        model = self._current

        def make() -> dict:
            frame = self.data.iloc[model.rows]
            out = {}
            for c in self.data.columns:
                if c == self.response or c == self.weights_name:
                    continue
                s = frame[c]
                if pd.api.types.is_datetime64_any_dtype(s.dtype):
                    s = pd.Series(decimal_years(s), index=s.index, name=c)
                out["fitted (column)" if c == "fitted" else c] = s
            return out

        return dict(self._for_rows(model, "panel_variables", make))

    def _for_rows(self, model: "_Model", key: Any, make: Callable[[], Any]) -> Any:
        """A result that depends on the fitted rows only, kept while they stay the same."""
        with self._lock:
            entry = self._by_rows
            if entry is None or not (entry[0] is model.rows or np.array_equal(entry[0],
                                                                              model.rows)):
                entry = self._by_rows = (model.rows, {})
            if key not in entry[1]:
                entry[1][key] = make()
            return entry[1][key]

    def _bins(self, model: "_Model", name: str, bins: int):
        """The binning of panel variable ``name`` (kept while the rows stay the same)."""
        from afterfit.model.candidates import bin_values

        pv = self.panel_variables()
        if name not in pv:
            raise ValueError(f"{name!r} is not a plottable variable; choose from {list(pv)}")
        return self._for_rows(model, ("bins", name, bins),
                              lambda: bin_values(pv[name], bins=bins, name=name))

    @single_blas
    def _profiles(self, bins: int = 10) -> tuple:
        """Pattern scores and smoothers of every panel variable, cached per model state."""
        from afterfit.model.candidates import bin_values, residual_profiles

        model = self._current
        key = ("profiles", bins)
        hit = model.memo.get(key)
        if hit is None:
            variables = {"fitted": bin_values(model.ls.fitted, bins=bins, name="fitted")}
            variables.update({name: self._bins(model, name, bins)
                              for name in self.panel_variables()})
            table, smooth = residual_profiles(model.ls.resid, variables, bins=bins,
                                              weights=model.w)
            hit = model.memo[key] = (table.sort_values("score", ascending=False), smooth)
        return hit

    def pattern_scores(self) -> pd.DataFrame:
        """How much structure the residuals still show against each variable (worst first).

        Includes "fitted" (the fitted values).  Cached per model state.
        """
        return self._profiles()[0].copy()

    def binned_means(self, name: str, *, bins: int = 10) -> pd.DataFrame:
        """The smoother of a residual panel: residual means in quantile bins with a band."""
        smooth = self._profiles(bins)[1]
        if name not in smooth:
            raise ValueError(f"{name!r} is not a plottable variable; "
                             f"choose from {list(smooth)}")
        return smooth[name].copy()

    def partial_residuals(self, term: str) -> pd.DataFrame:
        """Partial residuals of a single-column numeric term: x, component + residual."""
        model = self._current
        names = [n for n in model.names if n == term]
        if not names:
            raise ValueError(f"{term!r} is not a single column of the model: {model.names}")
        j = model.names.index(term)
        b = model.ls.params[j]
        x = model.X[:, j]
        return pd.DataFrame({"x": x, "partial": model.ls.resid + b * x}, index=model.labels)

    def acf(self, nlags: int = 24) -> pd.DataFrame:
        """Autocorrelation of residuals in time order, with a ±1.96/√n band (white-noise)."""
        if self._time is None:
            raise ValueError("autocorrelation needs time= to order the rows")
        model = self._current
        e = model.ls.resid[np.argsort(self._time[model.rows], kind="stable")]
        e = e - e.mean()
        n = len(e)
        denom = float(e @ e)
        nl = int(min(nlags, n - 1))
        r = [float(e[k:] @ e[:n - k]) / denom if denom > 0 else np.nan for k in range(1, nl + 1)]
        return pd.DataFrame({"lag": np.arange(1, nl + 1), "acf": r,
                             "band": 1.96 / math.sqrt(n)})

    # -- meter and comparison -------------------------------------------------------------------
    def _summary(self, state: State) -> dict:
        """A state's cross-validation numbers and rank, kept for good (a few numbers), so the
        meter never refits an earlier step whose model has left the cache."""
        with self._lock:
            hit = self._summaries.get(state)
            if hit is None:
                m = self._model(state)
                cv = m.cv
                hit = self._summaries[state] = {
                    "rmse_train": cv.rmse_train, "rmse_cv": cv.rmse_cv,
                    "rmse_cv_se": cv.rmse_cv_se, "rank": m.ls.rank}
            return hit

    def meter(self) -> pd.DataFrame:
        """Training and cross-validated RMSE for every step up to the current one."""
        rows = []
        prev = None
        base_terms = set(self._steps[0].state.terms)
        examined = 0
        for s in self._steps[: self._position + 1]:
            cv = self._summary(s.state)
            examined += s.examined
            terms = set(s.state.terms)
            rows.append({
                "step": s.index, "label": s.detail, "kind": s.kind,
                "rmse_train": cv["rmse_train"], "rmse_cv": cv["rmse_cv"],
                "rmse_cv_se": cv["rmse_cv_se"], "gap": cv["rmse_cv"] - cv["rmse_train"],
                "delta_cv": np.nan if prev is None else cv["rmse_cv"] - prev,
                "n_params": cv["rank"],
                "terms_added": len(terms - base_terms), "terms_removed": len(base_terms - terms),
                "examined": examined,
            })
            prev = cv["rmse_cv"]
        df = pd.DataFrame(rows)
        df["worse"] = df["delta_cv"] > 0
        # one-standard-error rule: the simplest model within one SE of the best CV error
        best = df["rmse_cv"].idxmin()
        limit = df.loc[best, "rmse_cv"] + df.loc[best, "rmse_cv_se"]
        ok = df[df["rmse_cv"] <= limit]
        pick = ok.sort_values(["n_params", "step"]).index[0]
        df["one_se"] = False
        df.loc[pick, "one_se"] = True
        return df

    def compare(self, i: int, j: int) -> dict:
        """Compare steps i and j: nested F test (when nested on the same rows), ΔAIC, ΔBIC, ΔCV."""
        n = len(self._steps)
        for k in (i, j):
            if not (0 <= k < n):
                raise ValueError(f"step {k} does not exist (steps 0..{n - 1})")
        a, b = self._model(self._steps[i].state), self._model(self._steps[j].state)
        fa, fb = a.fit, b.fit
        out = {"step_a": i, "step_b": j, "formula_a": fa.formula, "formula_b": fb.formula,
               "delta_aic": fb.aic - fa.aic, "delta_bic": fb.bic - fa.bic,
               "delta_cv": b.cv.rmse_cv - a.cv.rmse_cv, "f": np.nan, "df_num": np.nan,
               "df_den": np.nan, "pvalue": np.nan, "nested": False}
        same_rows = np.array_equal(a.rows, b.rows)
        ta, tb = set(a.names), set(b.names)
        small, big = (a, b) if ta <= tb else (b, a) if tb <= ta else (None, None)
        if same_rows and small is not None and small is not big and small.ls.rank < big.ls.rank:
            dfn = small.ls.df_resid - big.ls.df_resid
            dfd = big.ls.df_resid
            if dfd > 0 and big.ls.ssr > 0:
                f = ((small.ls.ssr - big.ls.ssr) / dfn) / (big.ls.ssr / dfd)
                out.update(f=f, df_num=dfn, df_den=dfd, pvalue=float(stats.f.sf(f, dfn, dfd)),
                           nested=True)
        elif not same_rows:
            out["note"] = "different rows: AIC/BIC and F are not comparable; only ΔCV is shown"
        return out

    # -- holdout --------------------------------------------------------------------------------
    def open_holdout(self) -> dict:
        """Score the current model once on the sealed holdout and record that it was opened."""
        with self._lock:
            if self._holdout_record is not None:
                rec = dict(self._holdout_record)
                rec["already_opened"] = True
                rec["message"] = (f"the holdout was already opened at step {rec['step']}; "
                                  "this is the same record")
                return rec
            if not self._holdout_mask.any():
                raise ValueError("this Study has no holdout: create it with holdout=0.2 (say)")
            model = self._current
            hpos = np.nonzero(self._holdout_mask)[0]
            hframe = self._frame.take(hpos).reset_index(drop=True)
            cols = [model.cache.evaluate_on(tc, hframe) for tc in model.term_columns]
            Xh = np.concatenate(cols, axis=1)
            yh = model.cache.response_on(self.response, hframe)
            ok = np.isfinite(yh) & np.isfinite(Xh).all(axis=1)
            kept = model.ls.kept
            pred = Xh[ok][:, kept] @ model.ls.params[kept]
            err = yh[ok] - pred
            if self._weights is not None:
                w = self._weights[hpos][ok]
                rmse = math.sqrt(float((w * err**2).sum() / len(err))) if len(err) else np.nan
            else:
                rmse = math.sqrt(float((err**2).mean())) if len(err) else np.nan
            rec = {"step": len(self._steps), "rmse_holdout": rmse, "n_holdout": int(ok.sum()),
                   "n_missing": int((~ok).sum()), "rmse_cv": model.cv.rmse_cv,
                   "rmse_train": model.fit.rmse, "formula": self.formula, "time": _now(),
                   "already_opened": False}
            self._holdout_record = rec
            state = self.state
            self._push(Step(index=0, kind="holdout",
                            detail=f"opened the sealed holdout: RMSE {rmse:.4g} on {int(ok.sum())} "
                                   "rows", reason="final check", time=rec["time"],
                            formula=self.formula, n_rows=len(model.rows), state=state))
            return dict(rec)

    @property
    def holdout_record(self):
        return None if self._holdout_record is None else dict(self._holdout_record)

    # -- export and persistence -----------------------------------------------------------------
    def to_code(self) -> str:
        """Python (pandas + statsmodels only) that refits the current model from ``df``."""
        from afterfit.model.export import to_code

        return to_code(self)

    def audit(self) -> str:
        """A Markdown record of declarations, every step with its reason, CV and checks."""
        from afterfit.model.export import audit

        return audit(self)

    def fingerprint(self) -> str:
        """A hash of the data (values, index and column names) to recognise it on load."""
        if self._fingerprint is None:  # the Study's data cannot change, so hash it once
            h = hashlib.sha256()
            h.update(json.dumps([str(c) for c in self.data.columns]).encode())
            h.update(pd.util.hash_pandas_object(self.data, index=True).to_numpy().tobytes())
            self._fingerprint = h.hexdigest()
        return self._fingerprint

    def save(self, path) -> None:
        """Write the timeline and options as JSON (the data itself is not stored)."""
        doc = {
            "afterfit": _SAVE_VERSION, "fingerprint": self.fingerprint(),
            "formula": self.initial_formula,
            "options": {"weights": self.weights_name, **self.declarations.as_dict(),
                        "cv": self.k_folds, "cv_scheme": self.cv_scheme,
                        "holdout": self.holdout_fraction, "seed": self.seed,
                        "cov_type": self.cov_type, "alpha": self.alpha,
                        "multiplicity": self.multiplicity},
            "steps": [_step_doc(s) for s in self._steps],
            "position": self._position,
            "holdout_record": self._holdout_record,
        }
        if self._weights is not None and self.weights_name is None:
            raise ValueError("weights given as an array cannot be saved; put them in a column")
        with open(path, "w", encoding="utf-8") as fh:
            json.dump(doc, fh, indent=1, default=_json_default)

    @classmethod
    def load(cls, path, df) -> "Study":
        """Rebuild a saved Study on the same data (refused, with a message, for other data)."""
        with open(path, encoding="utf-8") as fh:
            doc = json.load(fh)
        if doc.get("afterfit") != _SAVE_VERSION:
            raise ValueError(f"{path} is not an afterfit study file (version {_SAVE_VERSION})")
        o = dict(doc["options"])
        study = cls(df, doc["formula"], weights=o["weights"], time=o["time"],
                    period=o["period"] or None, groups=o["groups"], plausible=o["plausible"],
                    cv=o["cv"], cv_scheme=o["cv_scheme"], holdout=o["holdout"], seed=o["seed"],
                    cov_type=o["cov_type"], alpha=o["alpha"], multiplicity=o["multiplicity"])
        if study.fingerprint() != doc["fingerprint"]:
            raise ValueError(
                "this data frame is not the one the study was saved with (its fingerprint "
                "differs): load it with the original data, unchanged"
            )
        study._steps = []
        for sd in doc["steps"]:
            st = State(terms=tuple(sd["terms"]), intercept=sd["intercept"],
                       excluded=tuple((int(p), r) for p, r in sd["excluded"]))
            study._steps.append(Step(index=sd["index"], kind=sd["kind"], detail=sd["detail"],
                                     reason=sd["reason"], time=sd["time"], formula=sd["formula"],
                                     n_rows=sd["n_rows"], tag=sd["tag"], examined=sd["examined"],
                                     after_holdout=sd["after_holdout"], state=st,
                                     rows=tuple(sd.get("rows", ()))))
        study._position = int(doc["position"])
        study._holdout_record = doc.get("holdout_record")
        study._notify("load")
        return study

    def __repr__(self) -> str:
        f = self.fit
        return (f"<afterfit.Study {self.formula!r}: {f.nobs} rows, RMSE {f.rmse:.4g}, "
                f"step {self._position} of {len(self._steps) - 1}>")


def _step_doc(s: Step) -> dict:
    return {"index": s.index, "kind": s.kind, "detail": s.detail, "reason": s.reason,
            "time": s.time, "formula": s.formula, "n_rows": s.n_rows, "tag": s.tag,
            "examined": s.examined, "after_holdout": s.after_holdout,
            "terms": list(s.state.terms), "intercept": s.state.intercept,
            "excluded": [[int(p), r] for p, r in s.state.excluded], "rows": list(s.rows)}


def _json_default(o):
    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (np.floating,)):
        return float(o)
    raise TypeError(f"cannot store {type(o).__name__} in a study file")


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _short_labels(labels, k: int = 5) -> str:
    labels = list(labels)
    txt = ", ".join(repr(x) if isinstance(x, str) else str(x) for x in labels[:k])
    return txt + (f" … (+{len(labels) - k})" if len(labels) > k else "")


def decimal_years(s: pd.Series) -> np.ndarray:
    """Datetimes as decimal years: year + (day of year - 1 + time of day) / days in that year.

    The same expression is written into exported code, so results round-trip exactly.
    """
    s = pd.to_datetime(pd.Series(s))
    if getattr(s.dt, "tz", None) is not None:
        s = s.dt.tz_convert("UTC").dt.tz_localize(None)
    frac_day = (s.dt.hour * 3600 + s.dt.minute * 60 + s.dt.second) / 86400.0
    days = np.where(s.dt.is_leap_year, 366.0, 365.0)
    return (s.dt.year + (s.dt.day_of_year - 1 + frac_day) / days).to_numpy(dtype=float)
