"""Design matrices from a formula, one term at a time.

patsy decides how every term is coded (which contrasts, which column names) exactly as statsmodels
does; afterfit keeps each term's evaluated columns in a cache keyed by the term and its coding, so a
refit after adding one term evaluates only that term.  Factor memorisation (categorical levels,
stateful transforms such as ``cr()`` knots) is also done once per factor.

Two speed-ups keep large tables responsive without changing any number:
- text/object columns are handed to patsy as pandas Categoricals (patsy then uses the codes instead
  of a Python loop over 10^6 values); the levels are the same sorted levels patsy would find;
- ``C(x)`` without options returns that Categorical directly for the same reason.

Rows are never dropped silently: every design carries a finite-row mask and the caller reports the
rows it loses.  patsy internals used here (``_factors_memorize``, ``_examine_factor_types``,
``_make_subterm_infos``) are pinned by tests that compare column names and values with statsmodels.
"""
from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass
from functools import cached_property

import numpy as np
import pandas as pd
import patsy
from patsy.build import _examine_factor_types, _factors_memorize, _make_subterm_infos
from patsy.design_info import DesignInfo, FactorInfo

__all__ = ["DesignCache", "TermColumns", "working_frame"]


def _fast_C(data, contrast=None, levels=None):
    """patsy's ``C()`` with a fast path for the plain case (same levels, same coding)."""
    if contrast is None and levels is None:
        if isinstance(getattr(data, "dtype", None), pd.CategoricalDtype):
            cat = data
        else:
            arr = pd.Series(np.asarray(data)) if not isinstance(data, pd.Series) else data
            if arr.dtype.kind in "biufcm":
                # numbers as categories: keep patsy's own handling (levels sorted numerically)
                return patsy.builtins.C(data)
            cat = arr.astype("category")
        return cat
    return patsy.builtins.C(data, contrast, levels)


_ENV = patsy.EvalEnvironment([{"np": np, "C": _fast_C}])


def working_frame(df: pd.DataFrame, columns=None) -> pd.DataFrame:
    """A positional-index view of ``df`` with text columns as pandas Categoricals.

    The user's frame is never modified (a new frame is built; pandas copy-on-write makes untouched
    columns free).
    """
    # a shallow copy: numeric columns keep sharing the user's arrays (nothing is copied), and
    # copy-on-write keeps the user's frame as it is whatever is set here
    frame = (df if columns is None else df[list(columns)]).copy(deep=False)
    frame.index = pd.RangeIndex(len(frame))
    for i in range(frame.shape[1]):
        s = frame.iloc[:, i]
        if s.dtype == object or pd.api.types.is_string_dtype(s.dtype):
            vals = s.to_numpy(dtype=object)
            try:
                frame.isetitem(i, pd.Categorical(vals))
            except TypeError:  # unorderable mixed types: leave it to patsy's own error
                frame.isetitem(i, pd.Series(vals, dtype=object, index=frame.index))
    return frame


@dataclass(frozen=True, eq=False)
class TermColumns:
    """One term's evaluated columns over every row of the working frame (NaN where missing)."""

    term: patsy.Term
    names: tuple
    values: np.ndarray  # (n, q) float64, C-contiguous
    design_info: DesignInfo  # for evaluating the same coding on new rows (holdout)

    @cached_property
    def finite(self) -> np.ndarray:
        """Rows where every column of the term is finite (computed once per term)."""
        return np.isfinite(self.values).all(axis=1)

    @cached_property
    def all_finite(self) -> bool:
        return bool(self.finite.all())


def _coding_key(subterms) -> tuple:
    key = []
    for st in subterms:
        cms = tuple(
            (f.name(), st.contrast_matrices[f].matrix.tobytes(),
             tuple(st.contrast_matrices[f].column_suffixes))
            for f in st.factors if f in st.contrast_matrices
        )
        key.append((tuple(f.name() for f in st.factors), cms, st.num_columns))
    return tuple(key)


class DesignCache:
    """Evaluates terms of formulas over one working frame, caching factors and term columns.

    Parameters
    ----------
    frame : DataFrame from :func:`working_frame` (positional index). Stateful transforms (spline
        knots, centring) are memorised on all of its rows, as statsmodels does on the data it is given.
    """

    def __init__(self, frame: pd.DataFrame):
        self.frame = frame
        self.n = len(frame)
        self._factor_state: dict = {}
        self._num_cols: dict = {}
        self._cat_levels: dict = {}
        self._terms: dict = {}

    # -- factors -------------------------------------------------------------------------------
    def _memorize(self, factors) -> None:
        new = [f for f in factors if f not in self._factor_state]
        if not new:
            return
        maker = lambda: iter([self.frame])  # noqa: E731
        try:
            with np.errstate(all="ignore"):  # log(0) etc.: the rows become non-finite and are reported
                states = _factors_memorize(set(new), maker, _ENV)
                num, cat = _examine_factor_types(set(new), states, maker, patsy.NAAction())
        except patsy.PatsyError as exc:
            raise ValueError(_explain(exc)) from None
        except NameError as exc:
            raise ValueError(
                f"{exc}. Formulas may use the data's columns, numpy as np and patsy's built-ins "
                "(C, I, Q, cr, bs, center, ...); quote awkward column names as Q(\"name\")"
            ) from None
        self._factor_state.update(states)
        self._num_cols.update(num)
        self._cat_levels.update(cat)

    def factor_info(self, f) -> FactorInfo:
        if f in self._num_cols:
            return FactorInfo(f, "numerical", self._factor_state[f], num_columns=self._num_cols[f])
        return FactorInfo(f, "categorical", self._factor_state[f],
                          categories=self._cat_levels[f][0])

    # -- terms ---------------------------------------------------------------------------------
    def codings(self, terms) -> "OrderedDict":
        """patsy's ordering and coding of ``terms`` (a list of patsy Terms, intercept included)."""
        factors = {f for t in terms for f in t.factors}
        self._memorize(factors)
        return _make_subterm_infos(list(terms), self._num_cols, self._cat_levels)

    def columns(self, term, subterms, *, keep: bool = True) -> TermColumns:
        """One term's columns; kept for later designs unless ``keep=False`` (a one-off look)."""
        key = (term, _coding_key(subterms))
        hit = self._terms.get(key)
        if hit is not None:
            return hit
        finfo = {f: self.factor_info(f) for f in term.factors}
        names = []
        from patsy.build import _subterm_column_names_iter

        for st in subterms:
            names.extend(_subterm_column_names_iter(finfo, st))
        di = DesignInfo(names, factor_infos=finfo, term_codings=OrderedDict([(term, subterms)]))
        values = self._plain_column(term)
        if values is None:
            values = self._evaluate(di, self.frame)
        tc = TermColumns(term=term, names=tuple(names), values=values, design_info=di)
        if keep:
            self._terms[key] = tc
        return tc

    def _plain_column(self, term) -> np.ndarray | None:
        """A term that is one float column of the frame, as a view of it (no copy), else None.

        Under copy-on-write the view is read-only, so nothing here can change the user's data.
        """
        if len(term.factors) != 1:
            return None
        f = term.factors[0]
        if self._num_cols.get(f) != 1 or f.code not in self.frame.columns:
            return None
        col = self.frame[f.code]
        if not isinstance(col, pd.Series) or col.dtype != np.float64:
            return None
        values = col.to_numpy()
        return values.reshape(-1, 1) if values.flags.c_contiguous else None

    def _evaluate(self, di: DesignInfo, frame: pd.DataFrame) -> np.ndarray:
        n = len(frame)
        if not di.factor_infos:  # the intercept
            return np.ones((n, len(di.column_names)))
        try:
            with np.errstate(all="ignore"):
                (m,) = patsy.build_design_matrices([di], frame, NA_action=patsy.NAAction(),
                                                   return_type="dataframe")
        except patsy.PatsyError as exc:
            raise ValueError(_explain(exc)) from None
        vals = np.asarray(m, dtype=float)
        if len(m) == n:
            return np.ascontiguousarray(vals)
        out = np.full((n, vals.shape[1]), np.nan)
        out[np.asarray(m.index, dtype=np.intp)] = vals
        return out

    def evaluate_on(self, tc: TermColumns, frame: pd.DataFrame) -> np.ndarray:
        """The same term, same coding and memorised state, on other rows (e.g. the holdout)."""
        return self._evaluate(tc.design_info, frame)

    def response(self, code: str) -> np.ndarray:
        """The response as a float vector (NaN where missing); a clear error if not numeric."""
        f = patsy.EvalFactor(code)
        self._memorize([f])
        if f not in self._num_cols or self._num_cols[f] != 1:
            raise ValueError(
                f"the response {code!r} must be one numeric column; it reads as categorical or "
                "multi-column. Convert it to numbers (e.g. pd.to_numeric) first"
            )
        t = patsy.Term([f])
        subs = _make_subterm_infos([t], self._num_cols, self._cat_levels)[t]
        return self.columns(t, subs).values[:, 0]

    def response_on(self, code: str, frame: pd.DataFrame) -> np.ndarray:
        """The response evaluated on other rows (same memorised state)."""
        f = patsy.EvalFactor(code)
        t = patsy.Term([f])
        self.response(code)
        subs = _make_subterm_infos([t], self._num_cols, self._cat_levels)[t]
        return self._evaluate(self.columns(t, subs).design_info, frame)[:, 0]


def extended_values(cache: "DesignCache", tc: TermColumns) -> np.ndarray:
    """A term's columns in numpy ``longdouble``, exact for powers and products of columns.

    Factors written as a column (``x``, ``Q("x")``), a power ``I(x ** k)`` / ``np.power(x, k)``
    or a product of those are evaluated in extended precision from the data; anything else is
    the double-precision value widened (no gain, no loss).  Used by the kernel's extended path
    for ill-conditioned polynomial designs.
    """
    LD = np.longdouble
    if not tc.term.factors:
        return np.ones(tc.values.shape, dtype=LD)
    if len(tc.names) != 1:
        return tc.values.astype(LD)
    out = None
    for f in tc.term.factors:
        col = _ld_factor(cache.frame, f.name())
        if col is None:
            return tc.values.astype(LD)
        out = col if out is None else out * col
    return out.reshape(-1, 1)


def _ld_factor(frame: pd.DataFrame, code: str):
    import ast

    try:
        node = ast.parse(code, mode="eval").body
    except SyntaxError:
        return None

    def column(n):
        if isinstance(n, ast.Name) and n.id in frame.columns:
            name = n.id
        elif (isinstance(n, ast.Call) and isinstance(n.func, ast.Name) and n.func.id == "Q"
              and len(n.args) == 1 and isinstance(n.args[0], ast.Constant)
              and isinstance(n.args[0].value, str) and n.args[0].value in frame.columns):
            name = n.args[0].value
        else:
            return None
        s = frame[name]
        if not pd.api.types.is_numeric_dtype(s.dtype) or pd.api.types.is_bool_dtype(s.dtype):
            return None
        return s.to_numpy(dtype=np.longdouble)

    def power(base, exp):
        x = column(base)
        if x is None or not (isinstance(exp, ast.Constant) and isinstance(exp.value, int)
                             and 0 < exp.value <= 64):
            return None
        return x ** exp.value

    direct = column(node)
    if direct is not None:
        return direct
    if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id == "I" \
            and len(node.args) == 1:
        inner = node.args[0]
        if isinstance(inner, ast.BinOp) and isinstance(inner.op, ast.Pow):
            return power(inner.left, inner.right)
        return None
    if (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
            and isinstance(node.func.value, ast.Name) and node.func.value.id == "np"
            and node.func.attr == "power" and len(node.args) == 2):
        return power(node.args[0], node.args[1])
    return None


def _explain(exc: Exception) -> str:
    msg = str(exc).strip()
    return (
        f"patsy could not evaluate the formula: {msg}\n"
        "Check that every name is a column of the data (quote awkward names as Q(\"name\")) "
        "and that categorical levels are present."
    )


def design_for(cache: DesignCache, rhs_terms) -> tuple[list, list[str], list[TermColumns]]:
    """Ordered term list, column names and the per-term columns of a right-hand side."""
    codings = cache.codings(rhs_terms)
    tcs = [cache.columns(t, subs) for t, subs in codings.items()]
    names = [nm for tc in tcs for nm in tc.names]
    return list(codings), names, tcs
