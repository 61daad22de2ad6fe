"""Candidate columns for the evidence test, evaluated without patsy's per-factor overhead.

The partial F test of adding a term (:func:`afterfit.model.candidates.score_candidates`) depends
only on the column *span* of the term's columns together with the current design, not on how
patsy codes them.  :func:`evaluate_block` computes, for the numeric term shapes the catalogue
proposes (and a few safe categorical ones), columns with exactly that span in plain numpy -- or
says ``None``, "not handled, ask patsy".

Factor code is never executed: it is parsed with :mod:`ast` and only a whitelist of node types is
interpreted (data columns, ``Q("...")``, numbers, ``+ - * / **``, comparisons, a few numpy
functions, ``I()``, ``C(name)``, ``cr()``, ``center()``, ``standardize()``).  Column names and
string literals are data: they are looked up in the frame, never evaluated.

Stateful transforms (``cr`` knots and centring constraint, ``center``, ``standardize``) are
memorised on every row of the frame given, as patsy/statsmodels memorise on the data they are
given, and then evaluated on the requested rows only.
"""
from __future__ import annotations

import ast
import functools
import math
from typing import Sequence

import numpy as np
import pandas as pd
import patsy
import scipy.linalg as sla
from patsy.mgcv_cubic_splines import _get_all_sorted_knots, _get_natural_f

__all__ = ["evaluate_block"]

# Longer term text is left to patsy (it parses anything; this module only needs catalogue terms).
_MAX_TERM_CHARS = 10_000
# Names patsy resolves from its environment; a data column with one of these names shadows it in
# patsy (data first), so such code is left to patsy and its own error.
_RESERVED = frozenset({"np", "I", "Q", "C", "cr", "center", "standardize", "scale"})
_UNARY = {"log": np.log, "exp": np.exp, "sqrt": np.sqrt, "sin": np.sin, "cos": np.cos,
          "abs": np.abs}
_BINARY = {"maximum": np.maximum, "minimum": np.minimum}
# Rows per chunk of the spline basis: its temporaries stay in the cache.
_SPLINE_CHUNK = 1 << 15
_BINOPS = {ast.Add: np.add, ast.Sub: np.subtract, ast.Mult: np.multiply,
           ast.Div: np.true_divide, ast.Pow: np.power}
_CMPOPS = {ast.GtE: np.greater_equal, ast.Gt: np.greater, ast.LtE: np.less_equal,
           ast.Lt: np.less, ast.Eq: np.equal, ast.NotEq: np.not_equal}


class _Unsupported(Exception):
    """The term (or the data under it) is outside what this module reproduces exactly."""


def evaluate_block(term: str, frame: pd.DataFrame, rows: np.ndarray | None, *,
                   intercept: bool, model_terms: Sequence[str] | None = None
                   ) -> np.ndarray | None:
    """Columns spanning what ``term`` adds to a model, or None when patsy should decide.

    Parameters
    ----------
    term : str
        Formula text of one or more patsy terms joined by ``+`` (a catalogue candidate).
    frame : DataFrame
        The working frame the model's design is memorised on
        (:func:`afterfit.model.design.working_frame` rows, positional index, text columns as
        Categoricals).  Stateful transforms are memorised on all of its rows.
    rows : ndarray of bool or None
        The model's fitted rows within ``frame`` (None: all rows).
    intercept : bool
        Whether the current model has an intercept (decides the coding of ``C(g)`` and of a
        comparison such as ``I(t >= c)``; without an intercept those return None).
    model_terms : sequence of str, optional
        The current model's terms in patsy's spelling (``Study.terms``).  Optional, but it
        saves the scorer work: terms already in the model are left out (as patsy's
        ``term_block`` does), and ``C(g):x`` with ``x`` in the model gets patsy's own columns
        (every level but the first) instead of a block that repeats ``x``, which the scorer
        can only resolve with another pass over the rows.

    Returns
    -------
    ndarray or None
        Float64 array ``(rows.sum(), q)``, C-contiguous, whose columns together with the current
        design span the same space as the columns patsy would add for ``term`` in
        :class:`~afterfit.model.study.Study`.  Rows where a value the term needs is missing, or
        where the result is not finite, are NaN or infinite (the scorer then reports no
        evidence).  None when the term's shape, its data types or its names are not handled.

    Notes
    -----
    Handled factor shapes: numeric columns (bare or ``Q("...")``), arithmetic with numbers,
    ``np.log/exp/sqrt/sin/cos/abs/maximum/minimum``, ``np.pi``, ``I()``, ``center()``,
    ``standardize()``, ``cr(x, df=k)`` with or without ``constraints="center"``; products of
    numeric factors (``x:z``); ``C(g)`` alone (model with intercept: indicators of all levels
    but the first, as treatment coding); ``C(g)`` times numeric factors (``x`` times every
    level's indicator, or every level but the first when ``model_terms`` holds ``x``: with the
    current design either spans what patsy's coding adds); a comparison ``I(t >= c)`` alone
    (with intercept: one 0/1 column) or times numeric factors (as a two-level ``C()``).
    Categorical x categorical, ``bs``/``cc``/``te``, ``C()`` with contrasts or levels, and
    anything outside the whitelist return None.

    Deliberate differences from patsy, both on the safe side: a comparison with a missing
    operand gives a missing row (patsy reads it as False), and integer columns are read as
    floats (patsy's integer arithmetic can overflow silently, e.g. ``I(x ** 2)`` beyond 3e9).
    """
    if not isinstance(frame, pd.DataFrame):
        raise TypeError(f"frame must be a pandas DataFrame, got {type(frame).__name__}")
    n = len(frame)
    if rows is not None:
        rows = np.asarray(rows)
        if rows.dtype != bool or rows.shape != (n,):
            raise ValueError(
                f"rows must be a boolean mask with one value per frame row ({n}), got dtype "
                f"{rows.dtype} and shape {rows.shape}; pass None for all rows"
            )
        if rows.all():
            rows = None
    if not isinstance(term, str):
        return None
    plan = _plan(term)
    if plan is None:
        return None
    terms, reserved = plan
    if any(name in frame.columns for name in reserved):
        return None
    have = frozenset()
    if model_terms is not None:
        have = _term_keys(tuple(model_terms))
        if have is None:
            return None
    terms = [(key, factors) for key, factors in terms if key not in have]
    # the numeric parts whose columns the model (or this block) already holds
    known = have | {key for key, _ in terms}
    ev = _Evaluator(frame, rows)
    try:
        with np.errstate(all="ignore"):  # log(0), x/0: non-finite rows, reported by the scorer
            blocks = [_term_columns(factors, ev, intercept=intercept, known=known)
                      for _, factors in terms]
    except (_Unsupported, RecursionError, MemoryError):
        return None
    if not blocks:
        return np.empty((ev.n, 0))
    out = np.concatenate(blocks, axis=1) if len(blocks) > 1 else blocks[0]
    return np.ascontiguousarray(out, dtype=np.float64)


# --------------------------------------------------------------------------------------------
# parsing: term text -> a plan of whitelisted nodes (cached; independent of the data)


def _patsy_terms(term: str):
    """patsy's terms (with factors) of formula text, or None when patsy cannot read it."""
    if len(term) > _MAX_TERM_CHARS or not term.strip():
        return None
    try:
        desc = patsy.ModelDesc.from_formula("__y__ ~ 0 + " + term)
    except Exception:  # noqa: BLE001 -- any text patsy cannot read is patsy's to report
        return None
    return [t for t in desc.rhs_termlist if t.factors]


def _key(factor_codes) -> frozenset:
    # patsy compares terms by their set of factors, and factors by their normalised code
    return frozenset(factor_codes)


@functools.lru_cache(maxsize=256)
def _term_keys(model_terms: tuple):
    """Keys of the model's terms, or None when one of them is not a string patsy reads."""
    keys = set()
    for text in model_terms:
        terms = _patsy_terms(text) if isinstance(text, str) else None
        if terms is None:
            return None
        keys.update(_key(getattr(f, "code", None) for f in t.factors) for t in terms)
    return frozenset(keys)


@functools.lru_cache(maxsize=4096)
def _plan(term: str):
    """``(terms, reserved names used)`` or None; each term is ``(key, factor plans)``."""
    terms = _patsy_terms(term)
    if not terms:
        return None
    reserved: set = set()
    out = []
    try:
        for t in terms:
            factors = []
            for f in t.factors:
                code = getattr(f, "code", None)
                if not isinstance(code, str):
                    return None
                factors.append((code, _parse_factor(code, reserved)))
            out.append((_key(code for code, _ in factors), tuple(factors)))
    except (_Unsupported, SyntaxError, ValueError, OverflowError, RecursionError, MemoryError):
        return None  # OverflowError: an integer literal beyond float range
    return tuple(out), frozenset(reserved)


def _parse_factor(code: str, reserved: set):
    node = ast.parse(code, mode="eval").body
    while _is_call(node, "I", 1):  # I() is the identity
        reserved.add("I")
        node = node.args[0]
    if _is_call(node, "C", 1):
        reserved.add("C")
        return ("cat", _column_name(node.args[0], reserved))
    if isinstance(node, ast.Compare):
        if len(node.ops) != 1 or type(node.ops[0]) not in _CMPOPS:
            raise _Unsupported
        return ("bool", _CMPOPS[type(node.ops[0])], _expr(node.left, reserved),
                _expr(node.comparators[0], reserved))
    if _is_call(node, "cr", None):
        reserved.add("cr")
        return _parse_cr(node, reserved)
    return ("num", _expr(node, reserved))


def _is_call(node, name, nargs) -> bool:
    return (isinstance(node, ast.Call) and isinstance(node.func, ast.Name)
            and node.func.id == name
            and (nargs is None or (len(node.args) == nargs and not node.keywords)))


def _column_name(node, reserved) -> str:
    """A bare identifier or ``Q("literal")``: the name of a data column."""
    if isinstance(node, ast.Name):
        if node.id in _RESERVED:
            raise _Unsupported
        return node.id
    if _is_call(node, "Q", 1) and isinstance(node.args[0], ast.Constant) \
            and isinstance(node.args[0].value, str):
        reserved.add("Q")
        return node.args[0].value
    raise _Unsupported


def _parse_cr(node, reserved):
    if len(node.args) not in (1, 2) or any(isinstance(a, ast.Starred) for a in node.args):
        raise _Unsupported
    kw = {}
    for k in node.keywords:
        if k.arg not in ("df", "constraints") or k.arg in kw:
            raise _Unsupported
        kw[k.arg] = k.value
    if len(node.args) == 2:
        if "df" in kw:
            raise _Unsupported
        kw["df"] = node.args[1]
    df = kw.get("df")
    if not (isinstance(df, ast.Constant) and type(df.value) is int):
        raise _Unsupported
    centre = False
    if "constraints" in kw:
        c = kw["constraints"]
        if not (isinstance(c, ast.Constant) and c.value == "center" and type(c.value) is str):
            raise _Unsupported
        centre = True
    return ("cr", _expr(node.args[0], reserved), int(df.value), centre)


def _expr(node, reserved):
    """A numeric expression as a nested tuple of whitelisted operations."""
    if isinstance(node, ast.Constant):
        if type(node.value) in (int, float):
            return ("const", float(node.value))
        raise _Unsupported
    if isinstance(node, ast.Name) or _is_call(node, "Q", 1):
        return ("col", _column_name(node, reserved))
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
        inner = _expr(node.operand, reserved)
        return ("neg", inner) if isinstance(node.op, ast.USub) else inner
    if isinstance(node, ast.BinOp) and type(node.op) in _BINOPS:
        return ("bin", _BINOPS[type(node.op)], _expr(node.left, reserved),
                _expr(node.right, reserved))
    if isinstance(node, ast.Attribute):
        if _is_np(node, reserved) and node.attr == "pi":
            return ("const", math.pi)
        raise _Unsupported
    if isinstance(node, ast.Call):
        if node.keywords or any(isinstance(a, ast.Starred) for a in node.args):
            raise _Unsupported
        f = node.func
        if _is_call(node, "I", 1):
            reserved.add("I")
            return _expr(node.args[0], reserved)
        if isinstance(f, ast.Name) and f.id in ("center", "standardize", "scale") \
                and len(node.args) == 1:
            reserved.add(f.id)
            return (f.id if f.id == "center" else "standardize", _expr(node.args[0], reserved))
        if isinstance(f, ast.Attribute) and _is_np(f, reserved):
            if f.attr in _UNARY and len(node.args) == 1:
                return ("fn", _UNARY[f.attr], _expr(node.args[0], reserved))
            if f.attr in _BINARY and len(node.args) == 2:
                return ("fn2", _BINARY[f.attr], _expr(node.args[0], reserved),
                        _expr(node.args[1], reserved))
    raise _Unsupported


def _is_np(node, reserved) -> bool:
    ok = isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name) \
        and node.value.id == "np"
    if ok:
        reserved.add("np")
    return ok


# --------------------------------------------------------------------------------------------
# evaluation


class _Evaluator:
    """Evaluates plans on the frame: ``full`` over every frame row, otherwise over ``rows``."""

    def __init__(self, frame: pd.DataFrame, rows):
        self.frame = frame
        self.rows = rows
        self.n_full = len(frame)
        self.n = self.n_full if rows is None else int(rows.sum())
        self._cols: dict = {}

    def take(self, values):
        """Rows of a full-length array (the array itself when every row is used)."""
        return values if self.rows is None else values[self.rows]

    def series(self, name):
        if name not in self.frame.columns:
            raise _Unsupported
        s = self.frame[name]
        if not isinstance(s, pd.Series):  # duplicated column names
            raise _Unsupported
        return s

    def column(self, name, full):
        key = (name, full)
        hit = self._cols.get(key)
        if hit is None:
            base = self._cols.get((name, True))
            if base is None:
                s = self.series(name)
                dt = s.dtype
                # numpy integers and floats only: bool/categorical/text read as categorical in
                # patsy, nullable extension types are left to patsy's own handling
                if not isinstance(dt, np.dtype) or dt.kind not in "iuf":
                    raise _Unsupported
                base = s.to_numpy(dtype=np.float64)
                self._cols[(name, True)] = base
            hit = base if full else self.take(base)
            self._cols[key] = hit
        return hit

    def value(self, node, full):
        kind = node[0]
        if kind == "const":
            return node[1]
        if kind == "col":
            return self.column(node[1], full)
        if kind == "neg":
            return np.negative(self.value(node[1], full))
        if kind == "bin":
            a, b = self.value(node[2], full), self.value(node[3], full)
            if np.ndim(a) == 0 and np.ndim(b) == 0:
                if node[1] is np.power:  # no huge Python-number work: float64 semantics
                    return float(np.power(np.float64(a), np.float64(b)))
                return float(node[1](np.float64(a), np.float64(b)))
            return node[1](a, b)
        if kind == "fn":
            return node[1](self.value(node[2], full))
        if kind == "fn2":
            return node[1](self.value(node[2], full), self.value(node[3], full))
        if kind in ("center", "standardize"):
            x = self.value(node[1], True)
            if np.ndim(x) != 1 or not np.isfinite(x).all() or x.size == 0:
                raise _Unsupported  # patsy's state would be NaN or its own error
            # standardize() only rescales besides centring: the span is that of x - mean
            centred = (x if full else self.take(x)) - x.mean()
            if kind == "standardize":
                sd = float(np.sqrt(np.mean((x - x.mean()) ** 2)))
                if not sd > 0:
                    raise _Unsupported
                centred = centred / sd
            return centred
        raise _Unsupported

    def vector(self, node):
        """A numeric factor over the used rows, as an (n, 1) array."""
        v = self.value(node, False)
        if np.ndim(v) != 1 or v.shape[0] != self.n:
            raise _Unsupported  # a constant factor: patsy's business
        if any(v is c for c in self._cols.values()):
            v = v.copy()  # a bare column: never hand out a view of the frame's data
        return np.asarray(v, dtype=np.float64)[:, None]

    def spline(self, node):
        """Natural cubic regression spline basis (patsy's ``cr``), same knots and constraint."""
        _, arg, df, centre = node
        x = self.value(arg, True)
        if np.ndim(x) != 1 or x.size == 0 or not np.isfinite(x).all():
            raise _Unsupported
        n_constraints = 1 if centre else 0
        if df < (1 if centre else 2):
            raise _Unsupported
        try:
            knots = _get_all_sorted_knots(x, n_inner_knots=df - 2 + n_constraints)
            F = _get_natural_f(knots)
        except (ValueError, np.linalg.LinAlgError):  # too few distinct values: patsy says so
            raise _Unsupported from None
        k = knots.size
        # row chunks small enough for the cache: the basis is never formed whole
        step = _SPLINE_CHUNK
        if centre:
            # column sums of the free basis over every frame row:
            # B[r] = ajm e_j + ajp e_{j+1} + cjm F[j] + cjp F[j+1]
            at_j, at_j1 = np.zeros(k), np.zeros(k)
            c_j, c_j1 = np.zeros(k), np.zeros(k)
            for lo in range(0, x.size, step):
                ajm, ajp, cjm, cjp, j = _base_functions(x[lo:lo + step], knots)
                at_j += np.bincount(j, ajm, k)
                at_j1 += np.bincount(j + 1, ajp, k)
                c_j += np.bincount(j, cjm, k)
                c_j1 += np.bincount(j + 1, cjp, k)
            sums = at_j + at_j1 + (c_j + c_j1) @ F
            constraint = (sums / x.size).reshape(k, 1)
            # the same null space basis as patsy's _absorb_constraints
            q, _ = sla.qr(constraint)
            Z = q[:, 1:]
        else:
            Z = np.eye(k)
        FZ = F @ Z
        xr = self.take(x)
        out = np.empty((xr.size, Z.shape[1]))
        for lo in range(0, xr.size, step):
            ajm, ajp, cjm, cjp, j = _base_functions(xr[lo:lo + step], knots)
            part = out[lo:lo + step]
            for c in range(Z.shape[1]):  # 1-D gathers from the k-row tables
                zc, fc = Z[:, c], FZ[:, c]
                col = ajm * zc[:-1].take(j)
                col += ajp * zc[1:].take(j)
                col += cjm * fc[:-1].take(j)
                col += cjp * fc[1:].take(j)
                part[:, c] = col
        return out

    def categorical(self, name):
        """Level codes over the used rows (-1 where missing) and the number of levels."""
        s = self.series(name)
        dt = s.dtype
        if isinstance(dt, pd.CategoricalDtype):
            codes = s.cat.codes.to_numpy().astype(np.intp)
            k = len(dt.categories)
        elif isinstance(dt, np.dtype) and dt.kind == "b":
            codes = s.to_numpy().astype(np.intp)
            k = 2
        elif isinstance(dt, np.dtype) and dt.kind in "iuf":
            v = s.to_numpy(dtype=np.float64)
            miss = np.isnan(v)
            levels = np.unique(v[~miss])  # patsy's levels: sorted distinct values, all rows
            codes = np.searchsorted(levels, v).astype(np.intp)
            codes[miss] = -1
            k = levels.size
        else:
            raise _Unsupported
        return self.take(codes), k

    def comparison(self, node):
        """A comparison as level codes False=0 / True=1 (-1 where an operand is missing)."""
        _, op, left, right = node
        a, b = self.value(left, False), self.value(right, False)
        if np.ndim(a) == 0 and np.ndim(b) == 0:
            raise _Unsupported
        codes = op(a, b).astype(np.intp)
        miss = np.isnan(a) | np.isnan(b)
        codes = np.where(miss, -1, codes) if np.any(miss) else codes
        if np.ndim(codes) != 1 or codes.shape[0] != self.n:
            raise _Unsupported
        return codes, 2


def _base_functions(x, knots):
    """patsy's ``_compute_base_functions`` (same formulas), with fewer full-length temporaries."""
    j = np.searchsorted(knots, x) - 1
    j[j == -1] = 0
    j[j == knots.size - 1] = knots.size - 2
    h = np.diff(knots)
    hj = h[j]
    xj1_x = knots[j + 1] - x
    x_xj = x - knots[j]
    ajm = xj1_x / hj
    ajp = x_xj / hj
    cjm = xj1_x * xj1_x * xj1_x / (6.0 * hj)
    cjm[x > knots[-1]] = 0.0
    cjm -= hj * xj1_x / 6.0
    cjp = x_xj * x_xj * x_xj / (6.0 * hj)
    cjp[x < knots[0]] = 0.0
    cjp -= hj * x_xj / 6.0
    return ajm, ajp, cjm, cjp, j


def _term_columns(factors, ev: _Evaluator, *, intercept: bool, known) -> np.ndarray:
    """One patsy term's columns (up to span) over the used rows."""
    numeric, cats, numeric_codes = [], [], []
    for code, f in factors:
        if f[0] in ("num", "cr"):
            numeric_codes.append(code)
        if f[0] == "num":
            numeric.append(ev.vector(f[1]))
        elif f[0] == "cr":
            numeric.append(ev.spline(f))
        elif f[0] == "cat":
            cats.append(ev.categorical(f[1]))
        else:
            cats.append(ev.comparison(f))
    if len(cats) > 1:
        raise _Unsupported  # categorical x categorical: patsy's coding rules decide the span
    prod = _row_products(numeric, ev.n)
    if not cats:
        return prod
    codes, k = cats[0]
    if prod is None:
        # a main effect: with the intercept, every level's indicator but the first (treatment
        # coding); without it patsy's coding depends on the other terms, so patsy decides
        if not intercept or k < 1:
            raise _Unsupported
        return _level_columns(codes, k, None, first=1)
    # levels times numeric factors.  When the numeric part alone is a term of the model (or
    # of this block), its columns are there: every level but the first, as patsy codes it.
    # Otherwise every level: patsy keeps every level too unless the numeric part's columns
    # reached the model another way (C(h):x, say), and then the first level's columns lie in
    # the span of the others and the model's, so the span is the same either way.
    first = 1 if _key(numeric_codes) in known else 0
    return _level_columns(codes, k, prod, first=first)


def _level_columns(codes, k, prod, *, first) -> np.ndarray:
    """``prod`` times each level's indicator, levels ``first..k-1`` (level-major columns).

    ``prod`` None stands for a column of ones.  A row whose level or numeric part is missing
    or not finite is NaN throughout (patsy drops such a row; the scorer then gives no number).
    """
    n = codes.size
    m = 1 if prod is None else prod.shape[1]
    width = (k - first) * m
    out = np.zeros((n, width))
    r = np.flatnonzero(codes >= first)
    if width and r.size:
        at = r * width + (codes[r] - first) * m  # flat positions of each row's first column
        flat = out.reshape(-1)
        for i in range(m):
            flat[at + i] = 1.0 if prod is None else prod[r, i]
    bad = codes < 0
    if prod is not None:
        bad |= ~np.isfinite(prod).all(axis=1)
    if bad.any():
        out[bad] = np.nan
    return out


def _row_products(mats, n):
    """Row-wise Kronecker product of numeric factors' columns (None when there are none)."""
    if not mats:
        return None
    out = mats[0]
    for m in mats[1:]:
        out = (out[:, :, None] * m[:, None, :]).reshape(n, -1)
    return out
